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
cmake -S . -B "$BUILD_DIR" -G Ninja -DCMAKE_BUILD_TYPE=Release ${FORAY_CMAKE_ARGS:-}
cmake --build "$BUILD_DIR" --parallel "$(nproc)"
cd "$BUILD_DIR"
ctest --output-on-failure --parallel "$(nproc)" "$@"
