"""PyTorch reference for the model benchmark: the same ensemble computations written the usual
way for PyTorch on a CPU (members batched with torch.baddbmm, autograd, torch.optim.AdamW).

Prints one JSON object per figure on stdout. Run by run_model_bench.sh beside the C++ side.
"""

import argparse
import json
import math
import time

import torch

import torch.nn.functional as F


def make_params(members, sizes, requires_grad=False):
    params = []
    for fan_in, fan_out in zip(sizes[:-1], sizes[1:]):
        w = (torch.randn(members, fan_in, fan_out) / (2 * math.sqrt(fan_in))).requires_grad_(requires_grad)
        b = torch.zeros(members, 1, fan_out).requires_grad_(requires_grad)
        params.append((w, b))
    return params


def forward(params, x, max_lv, min_lv):
    """x: (members, rows, in) -> mean, log_var (members, rows, out)."""
    h = x
    for i, (w, b) in enumerate(params):
        h = torch.baddbmm(b, h, w)
        if i + 1 < len(params):
            h = F.silu(h)
    d = h.shape[-1] // 2
    mean, raw = h[..., :d], h[..., d:]
    lv = max_lv - F.softplus(max_lv - raw)
    lv = min_lv + F.softplus(lv - min_lv)
    return mean, lv


def median_time(fn, repeats, warmup=3):
    for _ in range(warmup):
        fn()
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        fn()
        times.append(time.perf_counter() - start)
    times.sort()
    return times[len(times) // 2], times[0], times[-1]


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--threads", type=int, default=1)
    parser.add_argument("--repeats", type=int, default=30)
    args = parser.parse_args()
    torch.set_num_threads(args.threads)
    torch.manual_seed(0)
    state_dim, action_dim, members, widths = 4, 1, 5, [64, 64, 64]
    sizes = [state_dim + action_dim] + widths + [2 * (state_dim + 1)]
    out_dim = state_dim + 1

    # Forward: every member at the same 1,000 rows.
    rows = 1000
    params = make_params(members, sizes)
    max_lv = torch.full((out_dim,), 0.5)
    min_lv = torch.full((out_dim,), -10.0)
    x = torch.randn(rows, state_dim + action_dim)

    def run_forward():
        with torch.no_grad():
            forward(params, x.expand(members, rows, -1), max_lv, min_lv)

    med, lo, hi = median_time(run_forward, args.repeats * 10)
    print(json.dumps({"name": "ensemble_forward", "impl": "torch", "median_ms": med * 1e3,
                      "min_ms": lo * 1e3, "max_ms": hi * 1e3, "threads": args.threads}))

    # One training epoch: 5,000 transitions, minibatch 256 per member, bootstrap indices, then
    # the evaluation of the epoch's weights.
    n, batch = 5000, 256
    data_x = torch.randn(n, state_dim + action_dim)
    data_y = torch.randn(n, out_dim)
    tparams = make_params(members, sizes, requires_grad=True)
    tmax = torch.full((out_dim,), 0.5, requires_grad=True)
    tmin = torch.full((out_dim,), -10.0, requires_grad=True)
    flat = [p for pair in tparams for p in pair]
    opt = torch.optim.AdamW([{"params": flat, "weight_decay": 1e-5},
                             {"params": [tmax, tmin], "weight_decay": 0.0}], lr=1e-3)
    boot = torch.randint(0, n, (members, n))

    def run_epoch():
        order = boot[:, torch.randperm(n)]
        for start in range(0, n, batch):
            idx = order[:, start:start + batch]
            xb, yb = data_x[idx], data_y[idx]
            opt.zero_grad()
            mean, lv = forward(tparams, xb, tmax, tmin)
            nll = 0.5 * (((mean - yb) ** 2) * torch.exp(-lv) + lv).mean(dim=(1, 2)).sum()
            loss = nll + 0.01 * (tmax.sum() - tmin.sum())
            loss.backward()
            opt.step()
        # The end-of-epoch evaluation that early stopping needs, as the C++ trainer does it:
        # every member's NLL over the evaluation rows (here all 5,000, as there is no holdout).
        # In blocks of 1,000 rows: in one piece its large temporaries made the epoch about 50 ms
        # slower here (measured), which would flatter the C++ side.
        with torch.no_grad():
            total = torch.zeros(members)
            for start in range(0, n, 1000):
                xs, ys = data_x[start:start + 1000], data_y[start:start + 1000]
                mean, lv = forward(tparams, xs.expand(members, xs.shape[0], -1), tmax, tmin)
                total += (0.5 * (((mean - ys) ** 2) * torch.exp(-lv) + lv)).sum(dim=(1, 2))
            return (total / (n * out_dim)).mean().item()

    med, lo, hi = median_time(run_epoch, max(5, args.repeats // 3), warmup=10)
    print(json.dumps({"name": "train_epoch", "impl": "torch", "median_ms": med * 1e3,
                      "min_ms": lo * 1e3, "max_ms": hi * 1e3, "threads": args.threads}))


if __name__ == "__main__":
    main()
