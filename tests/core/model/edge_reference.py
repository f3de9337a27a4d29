"""Random episodes of a 1-D cart with an irrecoverable edge, integrated with scipy's solve_ivp.

    x'' = u - c x',   c = 0.5 1/s,  u in [-1, 1] m/s^2 held for dt = 0.1 s (zero-order hold),

integrated with RK45 at rtol 1e-10, atol 1e-12 (scipy.integrate.solve_ivp). An episode starts
at rest at x ~ U(0, 0.9) m and takes uniformly random accelerations, each held for 5 steps
(random exploration with action repeat, common practice); it ends in an
irrecoverable state (terminal = 1) when x passes the edge at 1.0 m, or is cut after 60 steps
(time limit: not a terminal). The reward is 1 while 0.6 <= x <= 0.9 m after the step, else 0.
Writes states, actions, next_states, rewards, terminals in the manifest format of
torch_reference.py.

    /usr/bin/python3 edge_reference.py --out DIR --episodes 30 --seed 3
"""

import argparse
import os

import numpy as np
from scipy.integrate import solve_ivp

DAMPING, DT, EDGE, STEPS = 0.5, 0.1, 1.0, 60


def step(x, v, u):
    sol = solve_ivp(lambda _, y: [y[1], u - DAMPING * y[1]], (0.0, DT), [x, v], method="RK45",
                    rtol=1e-10, atol=1e-12)
    return sol.y[:, -1]


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--out", required=True)
    parser.add_argument("--episodes", type=int, default=30)
    parser.add_argument("--seed", type=int, default=3)
    args = parser.parse_args()
    rng = np.random.default_rng(args.seed)
    rows = {k: [] for k in ("states", "actions", "next_states", "rewards", "terminals")}
    for _ in range(args.episodes):
        x, v = rng.uniform(0.0, 0.9), 0.0
        for t in range(STEPS):
            if t % 5 == 0:
                u = rng.uniform(-1.0, 1.0)
            nx, nv = step(x, v, u)
            ended = nx > EDGE
            rows["states"].append([x, v])
            rows["actions"].append([u])
            rows["next_states"].append([nx, nv])
            rows["rewards"].append(1.0 if 0.6 <= nx <= 0.9 else 0.0)
            rows["terminals"].append(1.0 if ended else 0.0)
            if ended:
                break
            x, v = nx, nv
    os.makedirs(args.out, exist_ok=True)
    with open(os.path.join(args.out, "manifest.txt"), "w") as manifest:
        for name, values in rows.items():
            a = np.ascontiguousarray(np.asarray(values, dtype="<f8").reshape(len(values), -1))
            a.tofile(os.path.join(args.out, name + ".bin"))
            manifest.write(f"{name} {a.shape[0]} {a.shape[1]}\n")


if __name__ == "__main__":
    main()
