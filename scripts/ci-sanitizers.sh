#!/usr/bin/env bash
# Sanitizer builds (CI runs this after the README's test command):
#  1. the whole test suite under AddressSanitizer + UndefinedBehaviorSanitizer;
#  2. the whole test suite under ThreadSanitizer, with an instrumented oneTBB.
# Both run the whole suite except the Slurm tests (the cluster runs the release
# binary; scripts/test.sh covers them).
# Warnings are checked (as errors) by the release build of scripts/test.sh; under the
# sanitizers GCC 12 reports false -Wmaybe-uninitialized inside libstdc++'s <regex>,
# so these builds do not turn warnings into errors.
set -euo pipefail
cd "$(dirname "$0")/.."
jobs=$(nproc)
# -O1 without debug information, as the sanitizers' own documentation suggests for
# speed: on CI's 2 cores it halves the compile time of the two instrumented
# builds against RelWithDebInfo's -O2 -g (measured on one pipeline file: 102 s
# against 214 s), which keeps CI well inside its time limit. Reports still name
# the functions; rebuild with -g locally for line numbers.
san_flags=(-DCMAKE_BUILD_TYPE=RelWithDebInfo "-DCMAKE_CXX_FLAGS_RELWITHDEBINFO=-O1 -DNDEBUG"
           "-DCMAKE_C_FLAGS_RELWITHDEBINFO=-O1 -DNDEBUG")

cmake -S . -B build-asan -G Ninja "${san_flags[@]}" \
  -DSKERRY_SANITIZE="address;undefined" -DSKERRY_BENCHMARKS=OFF -DSKERRY_WERROR=OFF >/dev/null
cmake --build build-asan --parallel "$jobs"
(cd build-asan && ASAN_OPTIONS=detect_leaks=1:abort_on_error=1:allocator_may_return_null=1 UBSAN_OPTIONS=print_stacktrace=1:halt_on_error=1 \
  SKERRY_SANITIZER_BUILD=1 ctest --output-on-failure --parallel "$jobs" --timeout 2400 -E "Slurm")

# ThreadSanitizer: the whole suite again, with a TSan-instrumented libtbb built from
# Debian's source package of the installed oneTBB (scripts/tsan-tbb.sh) put in
# front of the packaged one, so that TSan sees TBB's own synchronisation and no
# suppressions are needed. Test binaries that run `skerry` pass the environment on,
# so the command-line tests (determinism for 1/2/8 threads, extract, bands, the
# local survey engine) are checked too.
tbb_lib=$(scripts/tsan-tbb.sh build-tsan-tbb)
cmake -S . -B build-tsan -G Ninja "${san_flags[@]}" \
  -DSKERRY_SANITIZE=thread -DSKERRY_BENCHMARKS=OFF -DSKERRY_WERROR=OFF >/dev/null
cmake --build build-tsan --parallel "$jobs"
if ! LD_LIBRARY_PATH="$tbb_lib" ldd build-tsan/skerry | grep -F "$tbb_lib/libtbb.so.12" >/dev/null; then
  echo "ci-sanitizers: build-tsan/skerry does not load the instrumented libtbb from $tbb_lib" >&2
  exit 1
fi
(cd build-tsan && LD_LIBRARY_PATH="$tbb_lib" TSAN_OPTIONS="halt_on_error=1 second_deadlock_stack=1 history_size=4" \
  SKERRY_SANITIZER_BUILD=1 ctest --output-on-failure --parallel "$jobs" --timeout 2400 -E "Slurm")
