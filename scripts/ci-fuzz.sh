#!/usr/bin/env bash
# Short libFuzzer runs of every input reader (clang + ASan/UBSan), 60 s per target
# by default (FUZZ_SECONDS). Prints executions and coverage per target; a crash
# fails CI and leaves the input in build-fuzz/crashes/ (add it to
# tests/fuzz/corpus/NAME/ so the fuzz_corpus_NAME test replays it from then on).
set -euo pipefail
cd "$(dirname "$0")/.."
seconds=${FUZZ_SECONDS:-60}
# A fixed seed makes the CI run repeatable (the same inputs in the same order, as far
# as the time allows); search for new crashes with longer runs and other seeds
# (FUZZ_SEED=0 lets libFuzzer pick one).
seed=${FUZZ_SEED:-1}
CC=clang CXX=clang++ cmake -S . -B build-fuzz -G Ninja -DCMAKE_BUILD_TYPE=RelWithDebInfo \
  -DSKERRY_FUZZ=ON -DSKERRY_BENCHMARKS=OFF -DBUILD_TESTING=ON >/dev/null
targets=(fits_image fits_table csv votable config)
cmake --build build-fuzz --parallel "$(nproc)" --target "${targets[@]/#/fuzz_}"
mkdir -p build-fuzz/crashes
status=0
for t in "${targets[@]}"; do
  work=build-fuzz/corpus-$t
  rm -rf "$work"; mkdir -p "$work"; cp tests/fuzz/corpus/$t/* "$work"/
  log=build-fuzz/fuzz-$t.log
  # allocator_may_return_null: an absurd allocation inside CFITSIO (from a header
  # field) returns NULL as in production, where CFITSIO reports it as an error;
  # our own code would throw std::bad_alloc, which the targets do not catch.
  if ASAN_OPTIONS=detect_leaks=1:allocator_may_return_null=1 ./build-fuzz/tests/fuzz/fuzz_$t "$work" -max_total_time="$seconds" -seed="$seed" \
       -rss_limit_mb=4096 -timeout=20 -artifact_prefix=build-fuzz/crashes/$t- -print_final_stats=1 >"$log" 2>&1; then
    :
  else
    status=1; echo "fuzz_$t: FAILED (see $log)"; tail -40 "$log"
  fi
  runs=$(grep -oE "Done [0-9]+ runs" "$log" | tail -1 || true)
  cov=$(grep -oE "cov: [0-9]+ ft: [0-9]+" "$log" | tail -1 || true)
  echo "fuzz_$t: ${runs:-no summary} in ${seconds}s; ${cov:-cov: ?}; corpus $(ls "$work" | wc -l) files"
done
exit $status
