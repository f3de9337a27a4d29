"""Reference trajectories of the simulated robots' equations from scipy's solve_ivp (RK45 with
tight tolerances), for the RK4 integrator of client/sim/physics.cc.

The equations are written here again, independently, from the same textbook forms:
- gantry: the cart-pendulum from its Lagrangian (payload hanging down);
- arm: the two-link manipulator equation (Spong, Hutchinson & Vidyasagar, ch. 7), uniform
  links, no joint limits.
Each case holds a constant input for 5 s; the state is written every 0.5 s.

Writes, in the manifest format of tests/testing/reference.h:
  gantry_cases (n, 5): x, x', theta, theta', F
  gantry_traj  (n * 11, 4): states at t = 0, 0.5, ..., 5
  arm_cases    (n, 6): q1, q2, q1', q2', tau1, tau2
  arm_traj     (n * 11, 4)

    /usr/bin/python3 physics_reference.py --out DIR
"""

import argparse
import os

import numpy as np
from scipy.integrate import solve_ivp

G = 9.81
# Same parameters as the defaults in client/sim/physics.h.
M_CART, M_LOAD, L_CABLE, C_X, C_TH = 2.0, 0.5, 0.8, 0.5, 0.01
M1, M2, L1, L2, C_J = 1.0, 0.8, 0.5, 0.4, 0.05


def gantry(t, s, force):
    x, xd, th, thd = s
    a = np.array([[M_CART + M_LOAD, M_LOAD * L_CABLE * np.cos(th)],
                  [M_LOAD * L_CABLE * np.cos(th), M_LOAD * L_CABLE ** 2]])
    b = np.array([force - C_X * xd + M_LOAD * L_CABLE * thd ** 2 * np.sin(th),
                  -M_LOAD * G * L_CABLE * np.sin(th) - C_TH * thd])
    xdd, thdd = np.linalg.solve(a, b)
    return [xd, xdd, thd, thdd]


def arm(t, s, tau):
    q1, q2, q1d, q2d = s
    lc1, lc2 = L1 / 2, L2 / 2
    i1, i2 = M1 * L1 ** 2 / 12, M2 * L2 ** 2 / 12
    c2 = np.cos(q2)
    m = np.array([[M1 * lc1 ** 2 + M2 * (L1 ** 2 + lc2 ** 2 + 2 * L1 * lc2 * c2) + i1 + i2,
                   M2 * (lc2 ** 2 + L1 * lc2 * c2) + i2],
                  [M2 * (lc2 ** 2 + L1 * lc2 * c2) + i2, M2 * lc2 ** 2 + i2]])
    h = -M2 * L1 * lc2 * np.sin(q2)
    cor = np.array([h * q2d ** 2 + 2 * h * q1d * q2d, -h * q1d ** 2])
    grav = np.array([(M1 * lc1 + M2 * L1) * G * np.cos(q1) + M2 * lc2 * G * np.cos(q1 + q2),
                     M2 * lc2 * G * np.cos(q1 + q2)])
    qdd = np.linalg.solve(m, np.asarray(tau) - C_J * np.array([q1d, q2d]) - cor - grav)
    return [q1d, q2d, qdd[0], qdd[1]]


def trajectory(f, s0, u):
    times = np.linspace(0.0, 5.0, 11)
    sol = solve_ivp(f, (0.0, 5.0), s0, args=(u,), method="RK45", t_eval=times,
                    rtol=1e-11, atol=1e-12)
    assert sol.success
    return sol.y.T


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--out", required=True)
    args = parser.parse_args()
    gantry_cases = np.array([[0.0, 0.0, 0.3, 0.0, 0.0],
                             [0.1, 0.5, -0.2, 1.0, 3.0],
                             [-0.5, 0.0, 1.2, 0.0, -2.0]])
    arm_cases = np.array([[0.2, 0.5, 0.0, 0.0, 0.0, 0.0],
                          [-0.3, 1.0, 1.0, -0.5, 4.0, 1.0],
                          [0.0, -0.8, 0.0, 2.0, 6.0, -0.5]])
    arrays = {
        "gantry_cases": gantry_cases,
        "gantry_traj": np.vstack([trajectory(gantry, c[:4], c[4]) for c in gantry_cases]),
        "arm_cases": arm_cases,
        "arm_traj": np.vstack([trajectory(arm, c[:4], c[4:]) for c in arm_cases]),
    }
    with open(os.path.join(args.out, "manifest.txt"), "w") as manifest:
        for name, value in arrays.items():
            value = np.ascontiguousarray(value, dtype="<f8")
            value.tofile(os.path.join(args.out, name + ".bin"))
            manifest.write(f"{name} {value.shape[0]} {value.shape[1]}\n")


if __name__ == "__main__":
    main()
