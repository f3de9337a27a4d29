#!/usr/bin/env bash
# Installs what is missing, builds Foray (Release), and runs every test suite through ctest:
# C++ unit tests, Python reference checks, and the loopback server tests.
# Ends with ctest's summary; exits non-zero on any failure.
#
#   ./tests/run.sh                 # everything
#   FORAY_BUILD_DIR=b ./tests/run.sh -R ensemble   # extra arguments go to ctest
set -euo pipefail
cd "$(dirname "$0")/.."

./deploy/install-deps.sh
BUILD_DIR="${FORAY_BUILD_DIR:-build}"

# The portable build (no -march=native: Eigen products instead of the AVX-512 tiles) of the
# model and planner checks that exercise that code path, ahead of the full suite.
if [ "${FORAY_SKIP_PORTABLE:-0}" != 1 ]; then
  PORTABLE_DIR="$BUILD_DIR-portable"
  PORTABLE_TESTS=(core/model/core_model_inference_test core/plan/core_plan_rollout_test
                  core/plan/core_plan_planner_test)
  cmake -S . -B "$PORTABLE_DIR" -G Ninja -DCMAKE_BUILD_TYPE=Release -DFORAY_PORTABLE=ON >/dev/null
  cmake --build "$PORTABLE_DIR" --parallel "$(nproc)" --target "${PORTABLE_TESTS[@]##*/}"
  for t in "${PORTABLE_TESTS[@]}"; do
    "$PORTABLE_DIR/tests/$t" --gtest_brief=1 | tail -n 3
  done
fi

cmake -S . -B "$BUILD_DIR" -G Ninja -DCMAKE_BUILD_TYPE=Release ${FORAY_CMAKE_ARGS:-}
cmake --build "$BUILD_DIR" --parallel "$(nproc)"
cd "$BUILD_DIR"
ctest --output-on-failure --parallel "$(nproc)" "$@"
