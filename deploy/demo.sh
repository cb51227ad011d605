#!/usr/bin/env bash
# The demo command. Installs what is missing, builds, and runs the demo.
set -euo pipefail
cd "$(dirname "$0")/.."
cat <<'TXT'
veer demo. veer is not a safety system: keep hardware emergency stops and independent limits,
try every new model and task in simulation first, and follow the local codes and
machinery-safety standards that apply.
TXT
deploy/install-deps.sh
cmake -S . -B build -DCMAKE_BUILD_TYPE=Release >/dev/null
cmake --build build -j2 >/dev/null
./build/bin/veer version
