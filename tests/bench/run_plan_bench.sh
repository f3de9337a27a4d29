#!/usr/bin/env bash
# Planner benchmark: one plan of Foray's planner (1 and 2 threads) at the "small" and "arm"
# configurations beside the same computation written for PyTorch (Debian's python3-torch with
# OpenBLAS, 1 and 2 threads), in one run; prints medians, the ratio against the faster PyTorch,
# and the GFLOP/s per thread of the model part against the SGEMM peak measured at the start (the
# fastest of 8 products: the machine is shared and noisy, and a peak is a best case).
# Writes build/bench/plan_bench.json.
#
#   ./tests/bench/run_plan_bench.sh [repeats]
set -euo pipefail
cd "$(dirname "$0")/../.."
BUILD_DIR="${FORAY_BUILD_DIR:-build}"
cmake --build "$BUILD_DIR" --target foray_plan_bench >/dev/null
mkdir -p "$BUILD_DIR/bench"
OUT="$BUILD_DIR/bench/plan_bench.json"
REPEATS="${1:-10}"
{
  "$BUILD_DIR/tests/bench/foray_plan_bench" "$REPEATS"
  # The machine's OpenBLAS settings pin an older kernel; the reference runs with its native
  # kernel so that it is as fast as it can be here.
  for threads in 1 2; do
    env -u OPENBLAS_CORETYPE -u OPENBLAS_L2_SIZE /usr/bin/python3 tests/bench/plan_bench_torch.py \
      --threads "$threads" --repeats "$(( (REPEATS + 1) / 2 ))"
  done
} > "$OUT"
/usr/bin/python3 - "$OUT" <<'PY'
import json, sys
rows = [json.loads(line) for line in open(sys.argv[1])]
ours = {(r["name"], r.get("threads", 1)): r for r in rows if r["impl"] == "foray"}
sgemm = ours[("sgemm_peak", 1)]
peak = 2.0 * sgemm["n"] ** 3 / (sgemm["min_ms"] * 1e6)
print(f"SGEMM peak (Eigen, 1 thread, n={sgemm['n']}, fastest of 8): {peak:.1f} GFLOP/s")
print(f"{'figure':11} {'threads':>7} {'foray ms':>9} {'model GFLOP/s/thread':>21} {'%peak':>6} "
      f"{'torch1 ms':>10} {'torch2 ms':>10} {'speed-up':>9}")
for name in ("plan_small", "plan_arm"):
    t = {r["threads"]: r["median_ms"] for r in rows if r["impl"] == "torch" and r["name"] == name}
    best = min(t.values())
    for threads in (1, 2):
        f = ours[(name, threads)]
        print(f"{name:11} {threads:7d} {f['median_ms']:9.1f} {f['model_gflops']:21.1f} "
              f"{100 * f['model_gflops'] / peak:5.0f}% {t[1]:10.1f} {t[2]:10.1f} {best / f['median_ms']:8.2f}x")
PY
