#!/usr/bin/env bash
# The test command: installs what is missing, builds with warnings as errors, runs every test.
# Usage: deploy/check.sh [build-dir]     (default: build)
set -euo pipefail
cd "$(dirname "$0")/.."
build=${1:-build}
deploy/install-deps.sh
cmake -S . -B "$build" -DCMAKE_BUILD_TYPE=Release -DVEER_WERROR=ON >/dev/null
cmake --build "$build" -j2
ctest --test-dir "$build" --output-on-failure -j2 --timeout 600
