#!/usr/bin/env bash
# Builds the libFuzzer targets (clang, AddressSanitizer + UBSan) into
# build-fuzz/ and runs each for SECONDS (default 20) from its seed corpus
# under fixtures/fuzz/<target>/, new inputs going to build-fuzz/corpus/.
# A crash, leak or hang stops that target, leaves the input as
# build-fuzz/crash-* (or leak-*, timeout-*) and fails the script; turn it
# into a regression test. FUZZ_SEED fixes libFuzzer's random seed (CI uses
# 1 so that its short runs repeat; the default 0 picks a new one each run).
# Usage: bash .ci/fuzz.sh [SECONDS] [TARGET...]
set -euo pipefail
cd "$(dirname "$0")/.."
seconds="${1:-20}"
shift || true
targets=("$@")
if ((${#targets[@]} == 0)); then targets=(frame_fuzz control_fuzz config_fuzz fits_fuzz layout_fuzz recording_fuzz); fi
CC=clang CXX=clang++ cmake -S . -B build-fuzz -DCMAKE_BUILD_TYPE=RelWithDebInfo -DSLOPECAST_FUZZ=ON \
  -DSLOPECAST_BUILD_TESTS=OFF -DSLOPECAST_BUILD_BENCH=OFF >/dev/null
cmake --build build-fuzz -j"$(nproc)" --target "${targets[@]}"
status=0
for t in "${targets[@]}"; do
  mkdir -p "build-fuzz/corpus/$t"
  echo "== $t for ${seconds} s"
  if ! (cd build-fuzz && "./tests/fuzz/$t" -max_total_time="$seconds" -timeout=10 -rss_limit_mb=2048 \
          -seed="${FUZZ_SEED:-0}" \
          -print_final_stats=1 "corpus/$t" "../fixtures/fuzz/$t" 2>"$t.log"); then
    echo "!! $t failed: see build-fuzz/$t.log and the crash-*/leak-*/timeout-* input it names" >&2
    tail -30 "build-fuzz/$t.log" >&2
    status=1
  fi
  grep -E "stat::number_of_executed_units|stat::peak_rss_mb" "build-fuzz/$t.log" | sed "s/^/   $t /" || true
done
exit "$status"
