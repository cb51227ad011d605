#!/bin/sh
# Makes the SMALL and STANDARD random-weight bundles with the Python exporter (veer.synth
# presets) and runs bench_veerd on them over tcp and ipc.
# Usage: run_bench_veerd.sh [BUILD_DIR] [PACED_SECONDS]   (default 30 s of paced load per case)
set -eu
here=$(cd "$(dirname "$0")" && pwd)
src=$(cd "$here/../.." && pwd)
build=$(cd "${1:-$src/build}" && pwd)
seconds=${2:-30}
out="$build/bench"
mkdir -p "$out"
export PYTHONPATH="$build/python:$src/clients/python"
for preset in small standard; do
    if [ ! -s "$out/$preset.veer" ]; then
        /usr/bin/python3 -m veer.bundle random --preset "$preset" --rng-key 1 -o "$out/$preset.veer"
    fi
done
exec "$build/bin/bench_veerd" "$build/bin/veerd" "$out/small.veer" "$out/standard.veer" --seconds "$seconds"
