#!/usr/bin/env bash
# Every benchmark in one run: the model (forward, training epoch) and the planner ("small",
# "arm") beside PyTorch, then the service (gRPC overhead, streaming, load with 1..16 robots).
# Each part measures the machine's SGEMM peak (Eigen) at its start. Prints one table and writes
# build/bench/results.json: a list with one object per figure (name, config, median, min, max,
# unit, and the reference figure and ratio where there is one). About 15 minutes.
#
#   ./tests/bench/run_all.sh
set -euo pipefail
cd "$(dirname "$0")/../.."
BUILD_DIR="${FORAY_BUILD_DIR:-build}"
./deploy/install-deps.sh >/dev/null
cmake -S . -B "$BUILD_DIR" -G Ninja -DCMAKE_BUILD_TYPE=Release >/dev/null
cmake --build "$BUILD_DIR" --parallel "$(nproc)" >/dev/null
./tests/bench/run_model_bench.sh
./tests/bench/run_plan_bench.sh
./tests/bench/run_service_bench.sh
/usr/bin/python3 tests/bench/collect_results.py "$BUILD_DIR/bench"
