"""PyTorch reference computations for the ensemble tests.

Writes a random ensemble (weights, normalisers, log-variance bounds), inputs and what PyTorch
computes from them, so the C++ test can compare. Every array is written as raw little-endian
float64, `NAME.bin`, with a line `NAME ROWS COLS` in `manifest.txt` (logical shape, row-major
bytes). Weights are written as (fan_in, fan_out), i.e. torch.nn.Linear.weight transposed.

The reference math is PyTorch's own: torch.nn.Linear-style affine layers, torch.nn.functional
silu / relu / tanh / softplus, torch.nn.functional.gaussian_nll_loss (full=True) for the loss,
torch.nn.functional.binary_cross_entropy_with_logits (with pos_weight) for the termination head,
torch.autograd for the gradients and torch.optim.AdamW for the optimiser steps.

    /usr/bin/python3 torch_reference.py --case forward --activation silu --out DIR
    /usr/bin/python3 torch_reference.py --case adamw --out DIR
"""

import argparse
import math
import os

import numpy as np
import torch

ACTIVATIONS = {
    "silu": torch.nn.functional.silu,
    "relu": torch.nn.functional.relu,
    "tanh": torch.tanh,
}
ACTIVATION_CODE = {"silu": 1, "relu": 2, "tanh": 3}


class Writer:
    def __init__(self, out):
        os.makedirs(out, exist_ok=True)
        self.out = out
        self.manifest = open(os.path.join(out, "manifest.txt"), "w")

    def put(self, name, array):
        a = np.asarray(array.detach().numpy() if torch.is_tensor(array) else array,
                       dtype=np.float64)
        if a.ndim == 0:
            a = a.reshape(1, 1)
        elif a.ndim == 1:
            a = a.reshape(-1, 1)
        a = np.ascontiguousarray(a)
        a.astype("<f8").tofile(os.path.join(self.out, name + ".bin"))
        self.manifest.write(f"{name} {a.shape[0]} {a.shape[1]}\n")

    def close(self):
        self.manifest.close()


def f32(rng, *shape, scale=1.0):
    """float32 values (exactly representable in both languages), held as float64 tensors."""
    return torch.tensor((rng.standard_normal(shape) * scale).astype(np.float32), dtype=torch.float64)


def make_ensemble(rng, state_dim, action_dim, members, widths, head=True):
    sizes = [state_dim + action_dim] + widths + [2 * (state_dim + 1) + (1 if head else 0)]
    layers = []
    for _ in range(members):
        member = []
        for fan_in, fan_out in zip(sizes[:-1], sizes[1:]):
            w = f32(rng, fan_in, fan_out, scale=1.5 / math.sqrt(fan_in)).requires_grad_()
            b = f32(rng, fan_out, scale=0.3).requires_grad_()
            member.append((w, b))
        layers.append(member)
    d = state_dim + 1
    max_lv = (f32(rng, d, scale=0.1) + 0.5).requires_grad_()
    min_lv = (f32(rng, d, scale=0.1) - 1.5).requires_grad_()
    return layers, max_lv, min_lv


def member_forward(member, x, max_lv, min_lv, activation):
    """Returns (mean, bounded log-variance, termination logit or None) in normalised units."""
    h = x
    for i, (w, b) in enumerate(member):
        h = h @ w + b
        if i + 1 < len(member):
            h = ACTIVATIONS[activation](h)
    d = max_lv.shape[0]
    mean, raw = h[:, :d], h[:, d:2 * d]
    logit = h[:, 2 * d] if h.shape[1] > 2 * d else None
    lv = max_lv - torch.nn.functional.softplus(max_lv - raw)
    lv = min_lv + torch.nn.functional.softplus(lv - min_lv)
    return mean, lv, logit


def bce(logit, terminal, pos_weight):
    return torch.nn.functional.binary_cross_entropy_with_logits(
        logit, terminal, pos_weight=torch.tensor(pos_weight, dtype=torch.float64), reduction="mean")


def nll(mean, log_var, target):
    return torch.nn.functional.gaussian_nll_loss(
        mean, target, torch.exp(log_var), full=True, eps=1e-30, reduction="mean")


def write_weights(w, layers, max_lv, min_lv, prefix=""):
    for b, member in enumerate(layers):
        for l, (weight, bias) in enumerate(member):
            w.put(f"{prefix}w_{b}_{l}", weight)
            w.put(f"{prefix}bias_{b}_{l}", bias)
    w.put(f"{prefix}max_lv", max_lv)
    w.put(f"{prefix}min_lv", min_lv)


def write_ensemble(w, layers, max_lv, min_lv, meta, head=True):
    state_dim, action_dim, members, widths, activation = meta
    w.put("meta", [state_dim, action_dim, members, ACTIVATION_CODE[activation]] + widths)
    w.put("head", [1 if head else 0])
    write_weights(w, layers, max_lv, min_lv)


def case_forward(args):
    rng = np.random.default_rng(args.seed)
    state_dim, action_dim, members, widths = 4, 2, 3, [32, 24]
    rows = 50
    head = not args.no_head
    pos_weight = 3.5
    layers, max_lv, min_lv = make_ensemble(rng, state_dim, action_dim, members, widths, head)
    in_mean, in_std = f32(rng, state_dim + action_dim), f32(rng, state_dim + action_dim).abs() + 0.5
    out_mean, out_std = f32(rng, state_dim + 1), f32(rng, state_dim + 1).abs() + 0.5
    states = f32(rng, rows, state_dim, scale=2.0)
    actions = f32(rng, rows, action_dim, scale=2.0)
    target = f32(rng, rows, state_dim + 1)
    terminal = torch.tensor((rng.random(rows) < 0.2).astype(np.float64))

    w = Writer(args.out)
    write_ensemble(w, layers, max_lv, min_lv, (state_dim, action_dim, members, widths, args.activation), head)
    w.put("terminal", terminal)
    w.put("pos_weight", [pos_weight])
    for name, value in [("in_mean", in_mean), ("in_std", in_std), ("out_mean", out_mean),
                        ("out_std", out_std), ("states", states), ("actions", actions),
                        ("target", target)]:
        w.put(name, value)
    x = (torch.cat([states, actions], dim=1) - in_mean) / in_std
    w.put("x_norm", x)
    for b, member in enumerate(layers):
        mean, lv, logit = member_forward(member, x, max_lv, min_lv, args.activation)
        w.put(f"mean_{b}", mean)
        w.put(f"log_var_{b}", lv)
        w.put(f"raw_mean_{b}", mean * out_std + out_mean)
        w.put(f"raw_var_{b}", torch.exp(lv) * out_std ** 2)
        loss = nll(mean, lv, target)
        # The beta-NLL (Seitzer et al., ICLR 2022): each element's term weighted by
        # var.detach() ** beta, with the reward's column (the last) at its own beta; the
        # gradient target. The reported loss stays the plain NLL.
        reward_beta = args.nll_beta if args.reward_nll_beta is None else args.reward_nll_beta
        betas = torch.tensor([args.nll_beta] * state_dim + [reward_beta], dtype=torch.float64)
        total = loss if args.nll_beta == 0 and reward_beta == 0 else (
            0.5 * ((mean - target) ** 2 * torch.exp(-lv) + lv + math.log(2 * math.pi))
            * torch.exp(lv).detach() ** betas).mean()
        if head:
            termination = bce(logit, terminal, pos_weight)
            total = total + termination  # termination weight 1
            w.put(f"logit_{b}", logit)
            w.put(f"probability_{b}", torch.sigmoid(logit))
            w.put(f"bce_{b}", termination)
        params = [p for pair in member for p in pair] + [max_lv, min_lv]
        grads = torch.autograd.grad(total, params)
        w.put(f"loss_{b}", loss)
        for l in range(len(member)):
            w.put(f"grad_w_{b}_{l}", grads[2 * l])
            w.put(f"grad_bias_{b}_{l}", grads[2 * l + 1])
        w.put(f"grad_max_lv_{b}", grads[-2])
        w.put(f"grad_min_lv_{b}", grads[-1])
    w.close()


def case_adamw(args):
    """Full-batch AdamW steps on the summed member NLL plus the bound penalty plus the
    termination head's BCE (weight 1, pos_weight = non-terminal rows / terminal rows: 56 / 8)."""
    rng = np.random.default_rng(args.seed)
    state_dim, action_dim, members, widths = 3, 1, 2, [16, 16]
    rows, steps, lr, wd, penalty = 64, 3, 1e-2, 1e-2, 0.01
    layers, max_lv, min_lv = make_ensemble(rng, state_dim, action_dim, members, widths)
    x = f32(rng, rows, state_dim + action_dim)
    y = f32(rng, rows, state_dim + 1)
    terminal = torch.zeros(rows, dtype=torch.float64)
    terminal[rng.choice(rows, 8, replace=False)] = 1.0
    pos_weight = (rows - 8) / 8
    w = Writer(args.out)
    write_ensemble(w, layers, max_lv, min_lv, (state_dim, action_dim, members, widths, "silu"))
    w.put("x_norm", x)
    w.put("target", y)
    w.put("terminal", terminal)
    w.put("settings", [steps, lr, wd, penalty])
    member_params = [p for member in layers for pair in member for p in pair]
    opt = torch.optim.AdamW(
        [{"params": member_params, "weight_decay": wd},
         {"params": [max_lv, min_lv], "weight_decay": 0.0}],
        lr=lr, betas=(0.9, 0.999), eps=1e-8)
    for _ in range(steps):
        opt.zero_grad()
        loss = 0
        for m in layers:
            mean, lv, logit = member_forward(m, x, max_lv, min_lv, "silu")
            loss = loss + nll(mean, lv, y) + bce(logit, terminal, pos_weight)
        loss = loss + penalty * (max_lv.sum() - min_lv.sum())
        loss.backward()
        opt.step()
    write_weights(w, layers, max_lv, min_lv, prefix="after_")
    w.close()


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--case", choices=["forward", "adamw"], required=True)
    parser.add_argument("--activation", choices=sorted(ACTIVATIONS), default="silu")
    parser.add_argument("--seed", type=int, default=2026)
    parser.add_argument("--no_head", action="store_true", help="an ensemble without a termination head")
    parser.add_argument("--nll_beta", type=float, default=0.0, help="gradients of the beta-NLL")
    parser.add_argument("--reward_nll_beta", type=float, default=None,
                        help="the reward column's beta; default: --nll_beta")
    parser.add_argument("--out", required=True)
    args = parser.parse_args()
    torch.manual_seed(args.seed)
    {"forward": case_forward, "adamw": case_adamw}[args.case](args)


if __name__ == "__main__":
    main()
