"""A complete robot loop on foray_client: a simulated cart of our own (a mass on a rail, a force
in, position and velocity out) registers once, then runs episodes: each control period it asks
for a plan through the watchdog, applies the action, and records the transition. The cart earns
reward only near x = 0.6 m, which it does not know; the planner's information gain drives it
to try what the model does not yet predict.

    /usr/bin/python3 client/python/examples/robot_loop.py --address 127.0.0.1:50151 \\
        --admin-token-file foray-data/admin-token --episodes 5

On a real robot the loop is the same, with the robot's driver where `Cart` is. Foray is not a
safety system: keep emergency stops and safety-rated limits in place, and follow your lab's
risk assessment and local rules.
"""

import argparse
import os
import sys
import time

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), ".."))
from foray_client import RobotSession  # noqa: E402

PERIOD_S = 0.05

SPEC = {
    "name": "example-cart",
    "control_period_s": PERIOD_S,
    "state": [{"label": "x", "unit": "m"}, {"label": "v", "unit": "m/s"}],
    "action": [{"label": "force", "unit": "N", "min": -2.0, "max": 2.0, "max_step": 0.5}],
    "model": {"ensemble_size": 5, "hidden_widths": [32, 32]},
    "training": {"min_transitions": 100, "every_n_transitions": 200, "max_epochs": 20},
    "planner": {"horizon": 10, "population": 100, "elites": 10, "iterations": 3},
    "coverage": {"indices": [0, 1], "lower": [-1, -1.5], "upper": [1, 1.5]},
}


class Cart:
    """x'' = (force - 0.5 v) / 1 kg, semi-implicit Euler at 1 ms, walls at |x| = 1 m."""

    def __init__(self, rng):
        self.rng = rng
        self.reset()

    def reset(self):
        self.s = np.array([self.rng.uniform(-0.2, 0.2), 0.0])
        return self.s.copy()

    def step(self, force):
        x, v = self.s
        for _ in range(int(round(PERIOD_S / 0.001))):
            v += 0.001 * (float(force[0]) - 0.5 * v)
            x += 0.001 * v
            if abs(x) > 1.0:
                x, v = np.sign(x) * 1.0, 0.0
        self.s = np.array([x, v])
        return self.s.copy()

    @staticmethod
    def reward(s):
        return 1.0 if abs(s[0] - 0.6) < 0.05 else 0.0


def main(argv=None):
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--address", default="127.0.0.1:50151")
    p.add_argument("--admin-token-file", default="foray-data/admin-token")
    p.add_argument("--identity-file", default="foray-data/example-cart.identity")
    p.add_argument("--episodes", type=int, default=5)
    p.add_argument("--steps", type=int, default=100)
    p.add_argument("--realtime", action="store_true", help="pace the loop to the control period")
    p.add_argument("--seed", type=int, default=1)
    args = p.parse_args(argv)
    print("Foray is not a safety system: keep emergency stops and safety-rated limits in place.",
          file=sys.stderr)

    identity = RobotSession.load_or_register(args.identity_file, args.address, args.admin_token_file, SPEC)
    cart = Cart(np.random.default_rng(args.seed))
    with RobotSession(args.address, identity.robot_id, identity.token, safe_action="zeros") as session:
        session.wait_connected(10)
        first_episode = (session.stats()["next_seq"] - 1) // args.steps + 1
        for episode in range(first_episode, first_episode + args.episodes):
            state, action = cart.reset(), np.zeros(1)
            total, planned = 0.0, 0
            for t in range(args.steps):
                started = time.monotonic()
                decision = session.act(state, action, deadline=0.6 * PERIOD_S,
                                       wait=PERIOD_S if args.realtime else 5.0)
                action = decision.action
                planned += decision.planned
                next_state = cart.step(action)
                reward = cart.reward(next_state)
                total += reward
                session.record(episode, t, state, action, next_state, reward, terminal=t + 1 == args.steps)
                state = next_state
                if args.realtime:
                    time.sleep(max(0.0, PERIOD_S - (time.monotonic() - started)))
            stats = session.stats()
            print(f"{SPEC['name']} episode {episode}: return {total:.0f}, {planned}/{args.steps} steps planned, "
                  f"{stats['durable_seq']} transitions durable so far")
        session.flush(30)
        print(f"all {session.stats()['durable_seq']} transitions durable")
    return 0


if __name__ == "__main__":
    sys.exit(main())
