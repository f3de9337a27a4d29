"""Worked example of the survival-weighted score, in numpy, for survival_test.cc.

A one-member, zero-variance model of a 1-D system s' = s + a. The known reward is
r_t = -q (s_{t+1} - target)^2 - c a_t^2. The score of an action sequence (rollout.h):

    J = sum_t gamma^t [ S_t r_t + (S_t - S_{t+1}) V ],   S_0 = 1,   S_{t+1} = S_t (1 - p_t),

with V the terminal value. Two cases:
  region: p_t = 1 when s_{t+1} lies outside [lower, upper], else 0 (a known termination region);
  head:   p_t = sigmoid(k (s_t + a_t - edge)) (a termination head's logit, linear in the input).
Prints one line: "region J_region head J_head" (float64).

    /usr/bin/python3 survival_reference.py --s0 2.5 --actions 0.2,0.2,0.2,0.2,0.2 ...
"""

import argparse

import numpy as np


def score(s0, actions, q, target, c, gamma, value, termination):
    s, alive, total = s0, 1.0, 0.0
    for t, a in enumerate(actions):
        p = termination(s, a)
        s = s + a
        r = -q * (s - target) ** 2 - c * a ** 2
        total += gamma ** t * (alive * r + alive * p * value)
        alive *= 1.0 - p
    return total


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--s0", type=float, required=True)
    parser.add_argument("--actions", required=True)
    parser.add_argument("--q", type=float, default=1.0)
    parser.add_argument("--target", type=float, default=0.0)
    parser.add_argument("--c", type=float, default=0.0)
    parser.add_argument("--gamma", type=float, default=1.0)
    parser.add_argument("--value", type=float, default=0.0)
    parser.add_argument("--lower", type=float, required=True)
    parser.add_argument("--upper", type=float, required=True)
    parser.add_argument("--k", type=float, required=True)
    parser.add_argument("--edge", type=float, required=True)
    args = parser.parse_args()
    actions = np.array([float(x) for x in args.actions.split(",")])
    common = (args.s0, actions, args.q, args.target, args.c, args.gamma, args.value)
    region = score(*common, lambda s, a: 0.0 if args.lower <= s + a <= args.upper else 1.0)
    head = score(*common, lambda s, a: 1.0 / (1.0 + np.exp(-args.k * (s + a - args.edge))))
    print(f"region {region!r} head {head!r}")


if __name__ == "__main__":
    main()
