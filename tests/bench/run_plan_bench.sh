#!/usr/bin/env bash
# Planner benchmark: one plan of Foray's planner (1 and 2 threads) at the "small" and "arm"
# configurations beside the same computation written for PyTorch (Debian's python3-torch with
# OpenBLAS, 1 and 2 threads, two allocator settings: see torch_env.sh), in one run; prints
# medians, the ratio against the fastest PyTorch, the GFLOP/s per thread of the model part
# against the FMA peak of the cores measured at the start (vector FMAs in registers at the
# kernels' target: the hardware's limit), and the largest speed-up over PyTorch any
# implementation could reach at that thread count (all the model work at the FMA peak) with the
# share of it the plan reaches. Eigen's SGEMM (the fastest of 8 products, built for the baseline
# ISA like all of Foray outside its dispatched kernels) is printed for reference.
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
fma = {t: ours[("fma_peak", t)]["gflops"] for t in (1, 2)}
print(f"SGEMM (Eigen at the baseline ISA, 1 thread, n={sgemm['n']}, fastest of 8): {peak:.1f} GFLOP/s")
print(f"SIMD target of the kernels: {ours[('simd_target', 1)]['target']} (FORAY_SIMD_TARGET caps it); "
      f"FMA peak there: {fma[1]:.0f} GFLOP/s on 1 thread, {fma[2]:.0f} on 2")
print(f"{'figure':11} {'threads':>7} {'foray ms':>9} {'model GFLOP/s/thread':>21} {'%FMA':>5} "
      f"{'torch ms, threads/allocator':>44} {'speed-up':>9} {'bound':>6} {'%bound':>7}")
for name in ("plan_small", "plan_arm"):
    t = {(r["threads"], r["allocator"]): r["median_ms"] for r in rows if r["impl"] == "torch" and r["name"] == name}
    best = min(t.values())
    each = " ".join(f"{ms:.0f}({k[0]}/{k[1][0]})" for k, ms in sorted(t.items()))
    for threads in (1, 2):
        f = ours[(name, threads)]
        # The fastest any implementation could do Foray's model work on this many cores: all of
        # it at their FMA peak.
        floor_ms = f["flops"] / (fma[threads] * 1e6)
        speedup, bound = best / f["median_ms"], best / floor_ms
        print(f"{name:11} {threads:7d} {f['median_ms']:9.1f} {f['model_gflops']:21.1f} "
              f"{100 * f['model_gflops'] / fma[1]:4.0f}% {each:>44} {speedup:8.2f}x {bound:5.1f}x "
              f"{100 * speedup / bound:6.0f}%")
print("allocator: d = glibc default, h = heap (tests/bench/torch_env.sh); speed-up against the fastest;")
print("bound: the speed-up if all of Foray's model work ran at the FMA peak of that many cores")
for name in ("plan_small", "plan_arm"):
    best = min(r["median_ms"] for r in rows if r["impl"] == "torch" and r["name"] == name)
    f = ours[(name, 2)]
    print(f"{name}: PyTorch does {f['flops_every_particle'] / (best * 1e6):.0f} GFLOP/s at its fastest; Foray's "
          f"model work at the 2-core FMA peak would take {f['flops'] / (fma[2] * 1e6):.1f} ms")
PY
