#!/usr/bin/env bash
# The demo command. Installs what is missing, builds, and runs the demo.
# Until the arm demo lands, it serves the shipped untrained example bundle through libveer and
# prints actions for two tasks (examples/embed.c shows how).
set -euo pipefail
cd "$(dirname "$0")/.."
cat <<'TXT'
=== veer demo ===
CAUTION: veer is not a safety system. Keep hardware emergency stops and independent limits
(torque, speed, position) that act whatever veer replies. Try every new model and every new task
in simulation first. Follow the local codes and the machinery-safety standards that apply.
TXT
deploy/install-deps.sh
cmake -S . -B build -DCMAKE_BUILD_TYPE=Release >/dev/null
cmake --build build -j2 >/dev/null
echo "--- the example bundle (untrained, random weights: its actions mean nothing) ---"
./build/bin/veer inspect examples/parcel-arm-untrained.veer | head -12
echo "--- serving it: two tasks, actions for four states each ---"
./build/bin/veer-embed-example examples/parcel-arm-untrained.veer \
  examples/parcel-arm-samples.csv examples/parcel-arm-rewards.csv
