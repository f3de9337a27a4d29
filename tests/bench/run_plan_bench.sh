#!/usr/bin/env bash
# Planner benchmark: one plan of Foray's planner (1 and 2 threads) at the "small" and "arm"
# configurations beside the same computation written for PyTorch (Debian's python3-torch with
# OpenBLAS, 1 and 2 threads, two allocator settings: see torch_env.sh), in one run; prints
# medians, the ratio against the fastest PyTorch,
# and the GFLOP/s per thread of the model part against the SGEMM peak measured at the start (the
# fastest of 8 products: the machine is shared and noisy, and a peak is a best case); then the
# cores' FMA peak and, from it, the largest speed-up over PyTorch any implementation could reach.
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
source tests/bench/torch_env.sh
{
  "$BUILD_DIR/tests/bench/foray_plan_bench" "$REPEATS"
  for threads in 1 2; do
    run_torch tests/bench/plan_bench_torch.py --threads "$threads" --repeats "$(( (REPEATS + 1) / 2 ))"
  done
} > "$OUT"
/usr/bin/python3 - "$OUT" <<'PY'
import json, sys
rows = [json.loads(line) for line in open(sys.argv[1])]
ours = {(r["name"], r.get("threads", 1)): r for r in rows if r["impl"] == "foray"}
sgemm = ours[("sgemm_peak", 1)]
peak = 2.0 * sgemm["n"] ** 3 / (sgemm["min_ms"] * 1e6)
print(f"SGEMM peak (Eigen, 1 thread, n={sgemm['n']}, fastest of 8): {peak:.1f} GFLOP/s")
print(f"SIMD target of the model's kernels: {ours[('simd_target', 1)]['target']} "
      "(FORAY_SIMD_TARGET caps it; the FMA peak uses the CPU's best)")
print(f"{'figure':11} {'threads':>7} {'foray ms':>9} {'model GFLOP/s/thread':>21} {'%peak':>6} "
      f"{'torch ms, threads/allocator':>44} {'speed-up':>9}")
for name in ("plan_small", "plan_arm"):
    t = {(r["threads"], r["allocator"]): r["median_ms"] for r in rows if r["impl"] == "torch" and r["name"] == name}
    best = min(t.values())
    each = " ".join(f"{ms:.0f}({k[0]}/{k[1][0]})" for k, ms in sorted(t.items()))
    for threads in (1, 2):
        f = ours[(name, threads)]
        print(f"{name:11} {threads:7d} {f['median_ms']:9.1f} {f['model_gflops']:21.1f} "
              f"{100 * f['model_gflops'] / peak:5.0f}% {each:>44} {best / f['median_ms']:8.2f}x")
print("allocator: d = glibc default, h = heap (tests/bench/torch_env.sh); speed-up against the fastest")
fma1, fma2 = ours[("fma_peak", 1)]["gflops"], ours[("fma_peak", 2)]["gflops"]
print(f"FMA peak of the cores (the hardware's limit): {fma1:.0f} GFLOP/s on 1 thread, {fma2:.0f} on 2")
for name in ("plan_small", "plan_arm"):
    best = min(r["median_ms"] for r in rows if r["impl"] == "torch" and r["name"] == name)
    f = ours[(name, 2)]
    # The fastest any implementation could do Foray's model work: all of it at the 2-core FMA peak.
    floor_ms = f["flops"] / (fma2 * 1e6)
    print(f"{name}: PyTorch does {f['flops_every_particle'] / (best * 1e6):.0f} GFLOP/s; Foray's model work at the "
          f"2-core FMA peak would take {floor_ms:.1f} ms, so no implementation could be more than "
          f"{best / floor_ms:.1f}x faster than PyTorch here")
PY
