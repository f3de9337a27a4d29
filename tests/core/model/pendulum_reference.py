"""Transitions of a damped, torque-driven pendulum integrated with scipy's solve_ivp.

    theta'' = -(g / L) sin(theta) - c theta' + u / (m L^2)

with g = 9.81 m/s^2, L = 1 m, m = 1 kg, c = 0.5 1/s, the torque u held for one control period
dt = 0.05 s (zero-order hold). States (theta, omega) are drawn uniformly from [-pi, pi] x [-4, 4]
and torques from [-2, 2] N m; each transition is integrated with RK45 at rtol 1e-10,
atol 1e-12 (scipy.integrate.solve_ivp). The reward is cos(theta) of the next state.

Writes train and test arrays in the manifest format of torch_reference.py.

    /usr/bin/python3 pendulum_reference.py --out DIR --train 2000 --test 500 --seed 7
"""

import argparse
import os

import numpy as np
from scipy.integrate import solve_ivp

G, LENGTH, MASS, DAMPING, DT = 9.81, 1.0, 1.0, 0.5, 0.05


def step(theta, omega, torque):
    def rhs(_, y):
        return [y[1], -(G / LENGTH) * np.sin(y[0]) - DAMPING * y[1] + torque / (MASS * LENGTH ** 2)]
    sol = solve_ivp(rhs, (0.0, DT), [theta, omega], method="RK45", rtol=1e-10, atol=1e-12)
    return sol.y[:, -1]


def sample(rng, n):
    states = np.column_stack([rng.uniform(-np.pi, np.pi, n), rng.uniform(-4, 4, n)])
    actions = rng.uniform(-2, 2, (n, 1))
    next_states = np.array([step(s[0], s[1], a[0]) for s, a in zip(states, actions)])
    rewards = np.cos(next_states[:, 0])
    return states, actions, next_states, rewards


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--out", required=True)
    parser.add_argument("--train", type=int, default=2000)
    parser.add_argument("--test", type=int, default=500)
    parser.add_argument("--seed", type=int, default=7)
    args = parser.parse_args()
    rng = np.random.default_rng(args.seed)
    os.makedirs(args.out, exist_ok=True)
    with open(os.path.join(args.out, "manifest.txt"), "w") as manifest:
        for split, n in (("train", args.train), ("test", args.test)):
            for name, array in zip(("states", "actions", "next_states", "rewards"), sample(rng, n)):
                a = np.ascontiguousarray(np.asarray(array, dtype="<f8").reshape(n, -1))
                a.tofile(os.path.join(args.out, f"{split}_{name}.bin"))
                manifest.write(f"{split}_{name} {a.shape[0]} {a.shape[1]}\n")


if __name__ == "__main__":
    main()
