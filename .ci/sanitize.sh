#!/usr/bin/env bash
# Builds slopecast with AddressSanitizer + UndefinedBehaviorSanitizer into
# build-sanitize/ and runs every unit and integration test under them (the
# benchmarks are left out). Any memory error, leak or undefined behaviour
# fails the test that hit it. Needs the packages `bash .ci/quickstart.sh test`
# installs. Usage: bash .ci/sanitize.sh [ctest arguments, e.g. -R pipeline]
set -euo pipefail
cd "$(dirname "$0")/.."
jobs="$(nproc)"
cmake -S . -B build-sanitize -DCMAKE_BUILD_TYPE=RelWithDebInfo -DSLOPECAST_SANITIZE=ON -DSLOPECAST_BUILD_BENCH=OFF
cmake --build build-sanitize -j"$jobs"
export ASAN_OPTIONS="${ASAN_OPTIONS:-abort_on_error=0:halt_on_error=1:detect_leaks=1:strict_string_checks=1}"
export UBSAN_OPTIONS="${UBSAN_OPTIONS:-print_stacktrace=1:halt_on_error=1}"
exec ctest --test-dir build-sanitize --output-on-failure -j"$jobs" "$@"
