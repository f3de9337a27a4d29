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

# The baseline pass: the service, client and reliability tests once more with forayd's model
# kernels capped at the SCALAR target (no SIMD beyond the x86-64 baseline), so the dispatched
# fallback serves real robots end to end (deploy.baseline_isa checks the rest of the machine
# code statically). FORAY_SKIP_BASELINE=1 skips it.
if [ "${FORAY_SKIP_BASELINE:-0}" != 1 ]; then
  (cd "$BUILD_DIR" && FORAY_TEST_SIMD_TARGET=SCALAR ctest --output-on-failure --parallel "$(nproc)" \
    -R '^(server|client|reliability)\.')
fi

cd "$BUILD_DIR"
ctest --output-on-failure --parallel "$(nproc)" "$@"
