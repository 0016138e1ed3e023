#!/usr/bin/env bash
# Sanitizer builds (CI runs this after the README's test command):
#  1. the whole test suite under AddressSanitizer + UndefinedBehaviorSanitizer;
#  2. the tests of the parallel stages under ThreadSanitizer.
# Debian's oneTBB is not built with TSan, so TSan cannot see the happens-before
# edges inside the library's task scheduler; tests/tsan.supp suppresses reports
# whose frames lie entirely inside libtbb (never our own frames), and the TSan
# tests run with TBB's own worker threads, as in production.
# Warnings are checked (as errors) by the release build of scripts/test.sh; under the
# sanitizers GCC 12 reports false -Wmaybe-uninitialized inside libstdc++'s <regex>,
# so these builds do not turn warnings into errors.
set -euo pipefail
cd "$(dirname "$0")/.."
jobs=$(nproc)

cmake -S . -B build-asan -G Ninja -DCMAKE_BUILD_TYPE=RelWithDebInfo \
  -DSKERRY_SANITIZE="address;undefined" -DSKERRY_BENCHMARKS=OFF -DSKERRY_WERROR=OFF >/dev/null
cmake --build build-asan --parallel "$jobs"
(cd build-asan && ASAN_OPTIONS=detect_leaks=1:abort_on_error=1:allocator_may_return_null=1 UBSAN_OPTIONS=print_stacktrace=1:halt_on_error=1 \
  SKERRY_SANITIZER_BUILD=1 ctest --output-on-failure --parallel "$jobs" --timeout 2400 -LE "cluster")

tsan_tests=(test_background test_islands test_fitting test_simulate test_crossmatch test_bands_forced test_bands_resolution test_io)
cmake -S . -B build-tsan -G Ninja -DCMAKE_BUILD_TYPE=RelWithDebInfo \
  -DSKERRY_SANITIZE=thread -DSKERRY_BENCHMARKS=OFF >/dev/null
targets=()
for t in "${tsan_tests[@]}"; do
  if cmake --build build-tsan --target help | grep -q "^$t:"; then targets+=("$t"); fi
done
cmake --build build-tsan --parallel "$jobs" --target "${targets[@]}"
for t in "${targets[@]}"; do
  bin=$(find build-tsan/tests -name "$t" -type f -perm -u+x | head -1)
  echo "== $t under ThreadSanitizer"
  TSAN_OPTIONS="suppressions=$PWD/tests/tsan.supp halt_on_error=1 second_deadlock_stack=1" \
    SKERRY_SANITIZER_BUILD=1 "$bin" --gtest_brief=1
done
