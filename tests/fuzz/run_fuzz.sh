#!/usr/bin/env bash
# Builds the libFuzzer targets with clang (AddressSanitizer and UndefinedBehaviorSanitizer on)
# in build-fuzz/ and runs each for a bounded time on a scratch copy of its checked-in corpus
# (tests/fuzz/corpus/TARGET). Exits non-zero when a target finds a crash; the input that did it
# is left in build-fuzz/findings/ (turn it into a unit test, then add it to the corpus).
#
#   ./tests/fuzz/run_fuzz.sh [seconds per target, default 60]
set -euo pipefail
cd "$(dirname "$0")/../.."
SECONDS_EACH="${1:-60}"
BUILD="${FORAY_FUZZ_BUILD_DIR:-build-fuzz}"
CC=clang-14 CXX=clang++-14 cmake -S . -B "$BUILD" -G Ninja -DCMAKE_BUILD_TYPE=RelWithDebInfo \
  -DFORAY_FUZZ=ON -DFORAY_BUILD_TESTS=OFF -DFORAY_SANITIZE="address;undefined" >/dev/null
cmake --build "$BUILD" --parallel "$(nproc)" --target wire_fuzz spec_file_fuzz
mkdir -p "$BUILD/findings"
status=0
for target in wire_fuzz spec_file_fuzz; do
  work="$BUILD/corpus/$target"
  rm -rf "$work"
  mkdir -p "$work"
  cp tests/fuzz/corpus/"$target"/* "$work"/
  echo "run_fuzz: $target for ${SECONDS_EACH} s"
  if ! UBSAN_OPTIONS=halt_on_error=1:print_stacktrace=1 "$BUILD/tests/fuzz/$target" \
      -max_total_time="$SECONDS_EACH" -timeout=10 -rss_limit_mb=2048 -print_final_stats=1 \
      -artifact_prefix="$BUILD/findings/$target-" "$work" 2>&1 | tail -n 12; then
    status=1
  fi
done
exit $status
