#!/usr/bin/env bash
# Model benchmark: Foray's ensemble forward and training epoch beside the same computations in
# PyTorch (Debian's python3-torch, with OpenBLAS), in one run; prints both, the ratios, and
# GFLOP/s against the SGEMM peak measured at the start. Writes build/bench/model_bench.json.
#
#   ./tests/bench/run_model_bench.sh [repeats]
set -euo pipefail
cd "$(dirname "$0")/../.."
BUILD_DIR="${FORAY_BUILD_DIR:-build}"
cmake --build "$BUILD_DIR" --target foray_model_bench >/dev/null
mkdir -p "$BUILD_DIR/bench"
OUT="$BUILD_DIR/bench/model_bench.json"
REPEATS="${1:-30}"
{
  "$BUILD_DIR/tests/bench/foray_model_bench" "$REPEATS"
  # The machine's OpenBLAS settings pin an older kernel; the reference runs with its native
  # kernel so that it is as fast as it can be here.
  env -u OPENBLAS_CORETYPE -u OPENBLAS_L2_SIZE /usr/bin/python3 tests/bench/model_bench_torch.py --threads 1 --repeats "$REPEATS"
  env -u OPENBLAS_CORETYPE -u OPENBLAS_L2_SIZE /usr/bin/python3 tests/bench/model_bench_torch.py --threads 2 --repeats "$REPEATS"
} > "$OUT"
/usr/bin/python3 - "$OUT" <<'PY'
import json, sys
rows = [json.loads(line) for line in open(sys.argv[1])]
ours = {r["name"]: r for r in rows if r["impl"] == "foray"}
peak = ours["sgemm_peak"]["gflops"]
print(f"SGEMM peak (Eigen, 1 thread, n=1536): {peak:.1f} GFLOP/s")
print(f"{'figure':18} {'foray ms':>9} {'GFLOP/s':>8} {'%peak':>6} {'torch1 ms':>10} {'torch2 ms':>10} {'speed-up':>9}")
for name in ("ensemble_forward", "train_epoch"):
    f = ours[name]
    t = {r["threads"]: r["median_ms"] for r in rows if r["impl"] == "torch" and r["name"] == name}
    best = min(t.values())
    print(f"{name:18} {f['median_ms']:9.3f} {f['gflops']:8.1f} {100 * f['gflops'] / peak:5.0f}% "
          f"{t[1]:10.3f} {t[2]:10.3f} {best / f['median_ms']:8.2f}x")
PY
