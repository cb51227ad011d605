#!/usr/bin/env bash
# Installs every Debian package veer needs to build, test, benchmark and run its demo.
# Idempotent: packages already present are left alone, and apt is only asked when something
# is missing. Run as root (or with sudo available).
set -euo pipefail

packages=(
  build-essential cmake pkg-config
  libzmq3-dev libprotobuf-c-dev protobuf-c-compiler protobuf-compiler
  libopenblas-dev liblapacke-dev libuv1-dev libcmocka-dev libxxhash-dev libsodium-dev libcjson-dev libhttp-parser-dev
  python3-numpy python3-scipy python3-zmq python3-protobuf python3-pytest
  python3-prometheus-client tmux
  clang libclang-rt-14-dev
)

missing=()
for p in "${packages[@]}"; do
  if ! dpkg-query -W -f='${Status}' "$p" 2>/dev/null | grep -q "install ok installed"; then
    missing+=("$p")
  fi
done

if [ ${#missing[@]} -eq 0 ]; then
  echo "install-deps: all ${#packages[@]} packages present"
  exit 0
fi

SUDO=""
if [ "$(id -u)" -ne 0 ]; then SUDO="sudo"; fi
echo "install-deps: installing ${missing[*]}"
export DEBIAN_FRONTEND=noninteractive
$SUDO apt-get update -qq
$SUDO apt-get install -y -qq --no-install-recommends "${missing[@]}"
