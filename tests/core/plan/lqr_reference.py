"""Reference for the planner: the optimal finite-horizon cost of a linear-quadratic problem.

Dynamics x_{t+1} = A x_t + B u_t; cost J = sum_{t=0}^{H-1} ( x_{t+1}^T Q x_{t+1} + u_t^T R u_t ),
which is the planner's objective with the quadratic known reward (target 0) and discount 1,
negated. The optimum comes from the backward Riccati recursion of discrete-time LQR (textbook
dynamic programming, e.g. Bertsekas, "Dynamic Programming and Optimal Control", vol. 1, ch. 4):
  P_H = Q,  K_t = (R + B^T P_{t+1} B)^{-1} B^T P_{t+1} A,
  P_t = Q_t + A^T P_{t+1} (A - B K_t),  Q_t = Q for t >= 1 and Q_0 = 0 (x_0 is not charged),
  J* = x_0^T P_0 x_0,  u_t = -K_t x_t.
As a cross-check of the recursion, P_t for a long horizon must approach the solution of the
discrete algebraic Riccati equation from scipy.linalg.solve_discrete_are.

Writes, in the manifest format of tests/testing/reference.h:
  problem (1, 5): dt, x0[0], x0[1], horizon, R
  q       (1, 2): diagonal of Q
  cost    (1, 1): J*
  actions (H, 1): the optimal u_t

    /usr/bin/python3 lqr_reference.py --out DIR
"""

import argparse
import os

import numpy as np
from scipy import linalg


def riccati(a, b, q, r, horizon):
    p = q.copy()
    gains = []
    for t in range(horizon - 1, -1, -1):
        k = np.linalg.solve(r + b.T @ p @ b, b.T @ p @ a)
        q_t = q if t >= 1 else np.zeros_like(q)
        p = q_t + a.T @ p @ (a - b @ k)
        gains.append(k)
    return p, gains[::-1]


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--out", required=True)
    args = parser.parse_args()

    dt, horizon, r_scalar = 0.1, 20, 0.01
    a = np.array([[1.0, dt], [0.0, 1.0]])
    b = np.array([[0.5 * dt * dt], [dt]])
    q = np.diag([1.0, 0.1])
    r = np.array([[r_scalar]])
    x0 = np.array([1.0, 0.0])

    p0, gains = riccati(a, b, q, r, horizon)
    cost = float(x0 @ p0 @ x0)

    # Roll the optimal policy forward and charge it: the same J*.
    x, charged, actions = x0.copy(), 0.0, []
    for k in gains:
        u = -k @ x
        x = a @ x + b @ u
        charged += float(x @ q @ x + u @ r @ u)
        actions.append(float(u[0]))
    assert abs(charged - cost) < 1e-9 * max(1.0, cost), (charged, cost)

    # Long horizon: the stationary P of the recursion (with Q charged at every step) is the DARE
    # solution.
    p_long = q.copy()
    for _ in range(5000):
        k = np.linalg.solve(r + b.T @ p_long @ b, b.T @ p_long @ a)
        p_long = q + a.T @ p_long @ (a - b @ k)
    p_are = linalg.solve_discrete_are(a, b, q, r)
    assert np.allclose(p_long, p_are, rtol=1e-8, atol=1e-10), (p_long, p_are)

    arrays = {
        "problem": np.array([[dt, x0[0], x0[1], horizon, r_scalar]]),
        "q": np.array([np.diag(q)]),
        "cost": np.array([[cost]]),
        "actions": np.array(actions).reshape(-1, 1),
    }
    with open(os.path.join(args.out, "manifest.txt"), "w") as manifest:
        for name, value in arrays.items():
            value = np.ascontiguousarray(value, dtype="<f8")
            value.tofile(os.path.join(args.out, name + ".bin"))
            manifest.write(f"{name} {value.shape[0]} {value.shape[1]}\n")


if __name__ == "__main__":
    main()
