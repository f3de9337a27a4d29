"""Merges the benchmark outputs (model_bench.json, plan_bench.json, service_bench.json: one JSON
object per line, as each runner writes them) into results.json, one object per figure with the
same keys (name, config, median, min, max, unit, reference, reference_median, ratio), and prints
the table. The reference is PyTorch's fastest setting (threads, allocator: torch_env.sh). Ratios
are the reference's median over Foray's for times, Foray's over the
reference's for rates: above 1 means Foray is faster."""

import json
import os
import sys


def lines(path):
    if not os.path.exists(path):
        return []
    with open(path) as f:
        return [json.loads(line) for line in f if line.startswith("{")]


def figure(name, config, median, lo, hi, unit, reference=None, reference_median=None, ratio=None, **extra):
    out = {"name": name, "config": config, "median": median, "min": lo, "max": hi, "unit": unit,
           "reference": reference, "reference_median": reference_median, "ratio": ratio}
    out.update(extra)
    return out


def main(folder):
    results = []
    model, plan, service = (lines(os.path.join(folder, f)) for f in
                            ("model_bench.json", "plan_bench.json", "service_bench.json"))
    for rows, label in ((model, "model bench"), (plan, "plan bench")):
        for r in rows:
            if r["impl"] == "foray" and r["name"] == "sgemm_peak":
                flops = 2.0 * r["n"] ** 3
                results.append(figure(f"sgemm_peak ({label})", f"Eigen, 1 thread, {r['n']}x{r['n']} float",
                                      flops / (r["median_ms"] * 1e6), flops / (r["max_ms"] * 1e6),
                                      flops / (r["min_ms"] * 1e6), "GFLOP/s"))
    for r in plan:
        if r["impl"] == "foray" and r["name"] == "fma_peak":
            results.append(figure(f"fma_peak_{r['threads']}t", "vector FMAs in registers, the cores' limit",
                                  r["gflops"], r["gflops"], r["gflops"], "GFLOP/s"))
    fma2 = next((r["gflops"] for r in plan if r["name"] == "fma_peak" and r["threads"] == 2), None)
    for rows in (model, plan):
        torch = {}
        for r in rows:
            if r["impl"] == "torch":
                best = torch.get(r["name"])
                if best is None or r["median_ms"] < best["median_ms"]:
                    torch[r["name"]] = r
        for r in rows:
            if r["impl"] != "foray" or r["name"] in ("sgemm_peak", "fma_peak"):
                continue
            t = torch.get(r["name"])
            threads = r.get("threads", 1)
            name = f"{r['name']}_{threads}t" if "threads" in r else r["name"]
            ref = (f"PyTorch (OpenBLAS), {t['threads']} thread(s), {t.get('allocator', 'default')} allocator"
                   if t else None)
            config = json.dumps(r["config"]) if "config" in r else ""
            results.append(figure(name, config, r["median_ms"], r["min_ms"], r["max_ms"], "ms", ref,
                                  t["median_ms"] if t else None, t["median_ms"] / r["median_ms"] if t else None))
            if r["name"].startswith("plan_") and t and fma2 and threads == 2:
                # Foray's model work done at the 2-core FMA peak: no implementation can beat it.
                floor_ms = r["flops"] / (fma2 * 1e6)
                results.append(figure(f"{r['name']}_bound", "PyTorch's time over Foray's model work at the "
                                      "2-core FMA peak: the largest possible speed-up",
                                      t["median_ms"] / floor_ms, t["median_ms"] / floor_ms,
                                      t["median_ms"] / floor_ms, "x"))
            if r["name"] == "train_epoch" and t:
                per_s = lambda ms: 5000 / (ms / 1000.0)  # noqa: E731  (5,000 transitions per epoch)
                results.append(figure(f"train_throughput_{threads}t", "5,000 transitions, batch 256, B=5, 3x64",
                                      per_s(r["median_ms"]), per_s(r["max_ms"]), per_s(r["min_ms"]),
                                      "transitions/s per epoch", ref, per_s(t["median_ms"]),
                                      t["median_ms"] / r["median_ms"]))
    for r in service:
        extra = {k: v for k, v in r.items() if k not in ("name", "impl", "config", "median", "min", "max", "unit",
                                                          "reference", "reference_median", "ratio")}
        results.append(figure(r["name"], r["config"], r["median"], r["min"], r["max"], r["unit"], r.get("reference"),
                              r.get("reference_median"), r.get("ratio"), **extra))
    with open(os.path.join(folder, "results.json"), "w") as f:
        json.dump(results, f, indent=1)
    print(f"{'figure':34} {'median':>10} {'min':>10} {'max':>10}  {'unit':22} {'reference':>10} {'ratio':>7}")
    for r in results:
        ref = f"{r['reference_median']:10.4g}" if r["reference_median"] is not None else f"{'-':>10}"
        ratio = f"{r['ratio']:6.2f}x" if r["ratio"] is not None else f"{'-':>7}"
        print(f"{r['name']:34} {r['median']:10.4g} {r['min']:10.4g} {r['max']:10.4g}  {r['unit']:22} {ref} {ratio}")
    print(f"wrote {os.path.join(folder, 'results.json')}")


if __name__ == "__main__":
    main(sys.argv[1] if len(sys.argv) > 1 else "build/bench")
