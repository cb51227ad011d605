#!/usr/bin/env bash
# The sanitizer runs STYLE.md asks for: the whole test suite under AddressSanitizer and UBSan
# (CMAKE_BUILD_TYPE=Sanitize, defined in the top CMakeLists.txt), and the threaded parts under
# ThreadSanitizer (cmake/ThreadSanitize.cmake): veerd's act thread beside its admin loop, the
# channel table, the histogram recorders and drift monitor read across threads, the clients,
# and the runtime's shared-bundle test.
#
# Usage: deploy/sanitize.sh [asan|tsan|all]      (default: all)
#   VEER_ASAN_BUILD / VEER_TSAN_BUILD   build directories (default build-sanitize, build-tsan)
#   VEER_JOBS                           parallel build and test jobs (default 2)
#   VEER_TSAN_TESTS                     ctest -R pattern of the threaded tests (default below)
#
# Tests that load libveer into a program built without the sanitizer (Debian's Python through
# ctypes; the install test's pkg-config program) need the sanitizer runtime loaded first, so the
# Python and install tests run with it preloaded; under ASan leak checking is off for them only
# (the interpreter itself keeps memory to exit) and stays on for every C test. Exit status: 0
# when every selected suite passed.
set -euo pipefail
cd "$(dirname "$0")/.."
what=${1:-all}
asan_dir=${VEER_ASAN_BUILD:-build-sanitize}
tsan_dir=${VEER_TSAN_BUILD:-build-tsan}
jobs=${VEER_JOBS:-2}
tsan_tests=${VEER_TSAN_TESTS:-'^(service_|test_service_|clients_|test_client_|test_histogram|test_drift|test_tribuf|ops_metrics|ops_http|ops_events|test_ops_|runtime_policy|fuzz_act|fuzz_admin|fuzz_client_reply)'}
cc=${CC:-cc}
status=0

# Sanitizer reports end the process with a failure, and UBSan prints where.
export UBSAN_OPTIONS=${UBSAN_OPTIONS:-print_stacktrace=1:halt_on_error=1}
# TSan cannot see how Debian's uninstrumented libzmq and OpenBLAS hand memory between threads;
# tests/fuzz/tsan.supp leaves out reports that pass through them, and nothing else.
export TSAN_OPTIONS=${TSAN_OPTIONS:-halt_on_error=1:second_deadlock_stack=1:suppressions=$PWD/tests/fuzz/tsan.supp}

run_asan() {
  echo "sanitize: ASan + UBSan build in $asan_dir"
  cmake -S . -B "$asan_dir" -DCMAKE_BUILD_TYPE=Sanitize >/dev/null
  cmake --build "$asan_dir" -j"$jobs"
  local asan_rt
  asan_rt=$("$cc" -print-file-name=libasan.so)
  echo "sanitize: C tests under ASan + UBSan (leak checking on)"
  ASAN_OPTIONS=${ASAN_OPTIONS:-detect_leaks=1:abort_on_error=1} \
    ctest --test-dir "$asan_dir" --output-on-failure -j"$jobs" -LE 'python|install' || status=1
  echo "sanitize: Python and install tests with the ASan runtime preloaded (leak checking off)"
  LD_PRELOAD="$asan_rt" ASAN_OPTIONS=detect_leaks=0:abort_on_error=1 \
    ctest --test-dir "$asan_dir" --output-on-failure -j"$jobs" -L 'python|install' || status=1
}

run_tsan() {
  echo "sanitize: TSan build in $tsan_dir"
  cmake -C cmake/ThreadSanitize.cmake -S . -B "$tsan_dir" >/dev/null
  cmake --build "$tsan_dir" -j"$jobs"
  local tsan_rt
  tsan_rt=$("$cc" -print-file-name=libtsan.so)
  echo "sanitize: threaded tests under TSan ($tsan_tests)"
  ctest --test-dir "$tsan_dir" --output-on-failure -j"$jobs" -LE python -R "$tsan_tests" || status=1
  LD_PRELOAD="$tsan_rt" ctest --test-dir "$tsan_dir" --output-on-failure -j"$jobs" -L python \
    -R "$tsan_tests" || status=1
}

case "$what" in
  asan) run_asan ;;
  tsan) run_tsan ;;
  all) run_asan; run_tsan ;;
  *) echo "usage: $0 [asan|tsan|all]" >&2; exit 2 ;;
esac
if [ "$status" -ne 0 ]; then
  echo "sanitize: FAILED (see the reports above)" >&2
fi
exit "$status"
