#!/bin/sh
# Starts two veerd on 127.0.0.1 (free ports, temporary state directories) serving a random-weight
# bundle (veer.synth preset, default standard), one with --monitors 1 and one with --monitors 0, runs bench_overhead
# against both in the same run, and stops both by process id.
#   Usage: run_bench_overhead.sh [BUILD_DIR] [ROUNDS] [PER_ROUND] [PRESET] [FIRST_MONITORS]
# FIRST_MONITORS 0 runs both services with monitors off: the A/A run that shows how far the two
# processes differ on this machine with nothing different between them (the noise floor).
set -eu
here=$(cd "$(dirname "$0")" && pwd)
src=$(cd "$here/../.." && pwd)
build=$(cd "${1:-$src/build}" && pwd)
rounds=${2:-100}
per_round=${3:-250}
preset=${4:-standard}
first_monitors=${5:-1}
if [ "$first_monitors" = 0 ]; then
    export VEER_BENCH_FIRST_LABEL="off (A/A)"
fi
out="$build/bench"
mkdir -p "$out"
export PYTHONPATH="$build/python:$src/clients/python"
bundle="$out/$preset.veer"
if [ ! -s "$bundle" ]; then
    /usr/bin/python3 -m veer.bundle random --preset "$preset" --rng-key 1 -o "$bundle"
fi
work=$(mktemp -d)
ports=$(/usr/bin/python3 -c '
import socket
ss = [socket.socket() for _ in range(6)]
for s in ss: s.bind(("127.0.0.1", 0))
print(" ".join(str(s.getsockname()[1]) for s in ss))')
set -- $ports
pids=""
cleanup() {
    for p in $pids; do kill "$p" 2>/dev/null || true; done
    for p in $pids; do while kill -0 "$p" 2>/dev/null; do sleep 0.1; done; done
    rm -rf "$work"
}
trap cleanup EXIT INT TERM
start() { # name monitors act admin events
    "$build/bin/veerd" --bundle "$bundle" --state-dir "$work/$1" --monitors "$2" \
        --act "tcp://127.0.0.1:$3" --admin "tcp://127.0.0.1:$4" --events "tcp://127.0.0.1:$5" \
        >"$work/$1.log" 2>&1 &
    pids="$pids $!"
    i=0
    until grep -q "ready:" "$work/$1.log"; do
        i=$((i + 1)); [ $i -lt 200 ] || { cat "$work/$1.log"; exit 1; }; sleep 0.05
    done
}
start on "$first_monitors" "$1" "$2" "$3"
on_pid=$(echo $pids | awk '{print $1}')
start off 0 "$4" "$5" "$6"
off_pid=$(echo $pids | awk '{print $2}')
"$build/bin/bench_overhead" "tcp://127.0.0.1:$1" "tcp://127.0.0.1:$2" "$on_pid" \
    "tcp://127.0.0.1:$4" "tcp://127.0.0.1:$5" "$off_pid" "$bundle" "$rounds" "$per_round"
