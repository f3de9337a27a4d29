"""PyTorch reference for the planner benchmark: one plan written the straightforward way for
PyTorch on a CPU, the same computation as Foray's planner:

- iCEM over action sequences: coloured noise along the horizon (1/f^beta, built by scaling
  white noise in the frequency domain with torch.fft), a fraction of the elites kept between
  iterations, population decay, the mean added in the last iteration, clipping to the bounds,
  momentum on the mean and spread, the best sequence seen returned;
- particle rollouts (TS-inf: particle p keeps member p mod B): at every step every member is
  evaluated at every particle's state (members batched with torch.baddbmm), the particle's next
  state is sampled from its own member, and the pairwise-KL information gain over the members
  (Kolchinsky & Tracey 2017) is computed by broadcasting;
- score J = mean_p sum_t (r + I).

Prints one JSON object per configuration. Run by run_plan_bench.sh beside the C++ side.
"""

import argparse
import json
import math
import time

import torch
import torch.nn.functional as F

CONFIGS = {
    # name: state_dim, action_dim, members, width, layers, population, elites, particles, horizon, iterations
    "small": (4, 1, 5, 64, 3, 200, 20, 5, 20, 4),
    "arm": (14, 4, 5, 200, 3, 400, 40, 5, 25, 5),
}


class Ensemble:
    def __init__(self, state_dim, action_dim, members, width, layers):
        sizes = [state_dim + action_dim] + [width] * layers + [2 * (state_dim + 1)]
        self.params = []
        for fan_in, fan_out in zip(sizes[:-1], sizes[1:]):
            w = torch.randn(members, fan_in, fan_out) / (2 * math.sqrt(fan_in))
            self.params.append((w, torch.zeros(members, 1, fan_out)))
        self.max_lv = torch.full((state_dim + 1,), 0.5)
        self.min_lv = torch.full((state_dim + 1,), -10.0)
        self.in_mean = torch.zeros(state_dim + action_dim)
        self.in_std = torch.ones(state_dim + action_dim)
        self.out_mean = torch.zeros(state_dim + 1)
        self.out_std = torch.ones(state_dim + 1)
        self.members = members

    def __call__(self, states, actions):
        """(rows, sd), (rows, ad) -> mean, log_var (members, rows, sd + 1), normalised outputs."""
        x = (torch.cat([states, actions], dim=1) - self.in_mean) / self.in_std
        h = x.expand(self.members, -1, -1)
        for i, (w, b) in enumerate(self.params):
            h = torch.baddbmm(b, h, w)
            if i + 1 < len(self.params):
                h = F.silu(h)
        d = h.shape[-1] // 2
        mean, raw = h[..., :d], h[..., d:]
        lv = self.max_lv - F.softplus(self.max_lv - raw)
        lv = self.min_lv + F.softplus(lv - self.min_lv)
        return mean, lv


def pairwise_kl_information(mean, log_var):
    """mean, log_var: (B, rows, d) -> (rows,) nats."""
    members = mean.shape[0]
    var = log_var.exp()
    mi, mj = mean.unsqueeze(1), mean.unsqueeze(0)
    li, lj = log_var.unsqueeze(1), log_var.unsqueeze(0)
    vi, vj = var.unsqueeze(1), var.unsqueeze(0)
    kl = 0.5 * (lj - li + (vi + (mi - mj) ** 2) / vj - 1.0).sum(-1)  # (B, B, rows)
    inner = torch.logsumexp(-kl, dim=1) - math.log(members)  # (B, rows)
    return (-inner.mean(0)).clamp(min=0.0)


def score(model, state, sequences, particles, generator):
    """sequences: (n, H, ad) -> (n,) scores."""
    n, horizon, _ = sequences.shape
    members = model.members
    rows = n * particles
    states = state.expand(rows, -1).clone()
    member = torch.arange(particles) % members          # TS-inf
    member_rows = member.repeat(n)                       # (rows,)
    row_index = torch.arange(rows)
    noise = torch.randn(horizon, particles, state.shape[0], generator=generator)
    total = torch.zeros(rows)
    sd = state.shape[0]
    for t in range(horizon):
        actions = sequences[:, t, :].repeat_interleave(particles, dim=0)
        mean, lv = model(states, actions)
        info = pairwise_kl_information(mean[..., :sd], lv[..., :sd])
        own_mean = mean[member_rows, row_index]          # (rows, sd + 1)
        own_lv = lv[member_rows, row_index]
        eps = noise[t].repeat(n, 1)
        delta = own_mean[:, :sd] + (0.5 * own_lv[:, :sd]).exp() * eps
        states = states + delta * model.out_std[:sd] + model.out_mean[:sd]
        reward = own_mean[:, sd] * model.out_std[sd] + model.out_mean[sd]
        total += reward + info
    return total.view(n, particles).mean(1)


def colored_noise(beta, shape, horizon, generator):
    """Gaussian noise (shape..., horizon) with power spectrum 1/f^beta, unit variance per step."""
    freqs = torch.fft.rfftfreq(horizon)
    freqs[0] = freqs[1]
    scale = freqs ** (-beta / 2.0)
    white = torch.randn(*shape, freqs.shape[0], 2, generator=generator)
    spectrum = torch.complex(white[..., 0], white[..., 1]) * scale
    x = torch.fft.irfft(spectrum, n=horizon)
    return x / x.std(dim=-1, keepdim=True).mean().clamp(min=1e-12)


def plan(model, state, cfg, generator):
    sd, ad, _, _, _, population, elites, particles, horizon, iterations = cfg
    lower, upper = -torch.ones(ad), torch.ones(ad)
    mean = torch.zeros(horizon, ad)
    std = 0.5 * (upper - lower).expand(horizon, ad).clone()
    keep = round(0.3 * elites)
    kept = None
    best, best_score = None, -float("inf")
    for it in range(iterations):
        fresh = min(population, max(round(population / 1.25 ** it), 2 * elites))
        noise = colored_noise(2.0, (fresh, ad), horizon, generator).transpose(1, 2)  # (fresh, H, ad)
        samples = mean + std * noise
        parts = [samples] if kept is None else [kept, samples]
        if it == iterations - 1:
            parts.append(mean.unsqueeze(0))
        candidates = torch.cat(parts).clamp(lower, upper)
        scores = score(model, state, candidates, particles, generator)
        top = torch.topk(scores, elites)
        if top.values[0] > best_score:
            best_score, best = float(top.values[0]), candidates[top.indices[0]].clone()
        elite = candidates[top.indices]
        mean = 0.1 * mean + 0.9 * elite.mean(0)
        std = 0.1 * std + 0.9 * elite.std(0, unbiased=False)
        kept = elite[:keep]
    return best, best_score


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--threads", type=int, default=1)
    parser.add_argument("--repeats", type=int, default=5)
    parser.add_argument("--config", default="")
    args = parser.parse_args()
    torch.set_num_threads(args.threads)
    torch.manual_seed(0)
    for name, cfg in CONFIGS.items():
        if args.config and args.config != name:
            continue
        sd, ad, members, width, layers = cfg[:5]
        model = Ensemble(sd, ad, members, width, layers)
        state = 0.1 * torch.randn(sd)
        generator = torch.Generator().manual_seed(1)
        times = []
        with torch.no_grad():
            for i in range(args.repeats + 1):
                start = time.perf_counter()
                plan(model, state, cfg, generator)
                if i > 0:  # the first call warms up
                    times.append(time.perf_counter() - start)
        times.sort()
        print(json.dumps({"name": "plan_" + name, "impl": "torch", "median_ms": times[len(times) // 2] * 1e3,
                          "min_ms": times[0] * 1e3, "max_ms": times[-1] * 1e3, "threads": args.threads}),
              flush=True)


if __name__ == "__main__":
    main()
