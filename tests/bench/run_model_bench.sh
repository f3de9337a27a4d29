#!/usr/bin/env bash
# Model benchmark: Foray's ensemble forward and training epoch beside the same computations in
# PyTorch (Debian's python3-torch, with OpenBLAS; 1 and 2 threads, two allocator settings, see
# torch_env.sh), in one run; prints both, the ratios against PyTorch's fastest, and
# GFLOP/s against the SGEMM peak and the FMA peak of one core measured at the start. Writes
# build/bench/model_bench.json.
#
#   ./tests/bench/run_model_bench.sh [repeats]
set -euo pipefail
cd "$(dirname "$0")/../.."
BUILD_DIR="${FORAY_BUILD_DIR:-build}"
cmake --build "$BUILD_DIR" --target foray_model_bench >/dev/null
mkdir -p "$BUILD_DIR/bench"
OUT="$BUILD_DIR/bench/model_bench.json"
REPEATS="${1:-30}"
source tests/bench/torch_env.sh
{
  "$BUILD_DIR/tests/bench/foray_model_bench" "$REPEATS"
  for threads in 1 2; do
    run_torch tests/bench/model_bench_torch.py --threads "$threads" --repeats "$REPEATS"
  done
} > "$OUT"
/usr/bin/python3 - "$OUT" <<'PY'
import json, sys
rows = [json.loads(line) for line in open(sys.argv[1])]
ours = {(r["name"], r.get("threads", 1)): r for r in rows if r["impl"] == "foray"}
peak = ours[("sgemm_peak", 1)]["gflops"]
fma = ours[("fma_peak", 1)]["gflops"]
print(f"SGEMM (Eigen at the baseline ISA, 1 thread, n=1536): {peak:.1f} GFLOP/s; "
      f"FMA peak of one core at the kernels' target: {fma:.1f} GFLOP/s")
print(f"SIMD target of the model's kernels: {ours[('simd_target', 1)]['target']} (FORAY_SIMD_TARGET caps it)")
print(f"{'figure':18} {'threads':>7} {'foray ms':>9} {'GFLOP/s/thread':>15} {'%SGEMM':>6} {'%FMA':>5} "
      f"{'torch ms, threads/allocator':>44} {'speed-up':>9}")
for name in ("ensemble_forward", "train_epoch"):
    t = {(r["threads"], r["allocator"]): r["median_ms"] for r in rows if r["impl"] == "torch" and r["name"] == name}
    best = min(t.values())
    each = " ".join(f"{ms:.2f}({k[0]}/{k[1][0]})" for k, ms in sorted(t.items()))
    for threads in (1, 2):
        f = ours[(name, threads)]
        per_thread = f["gflops"] / threads
        print(f"{name:18} {threads:7d} {f['median_ms']:9.3f} {per_thread:15.1f} {100 * per_thread / peak:5.0f}% {100 * per_thread / fma:4.0f}% "
              f"{each:>44} {best / f['median_ms']:8.2f}x")
print("allocator: d = glibc default, h = heap (tests/bench/torch_env.sh); speed-up against the fastest")
PY
