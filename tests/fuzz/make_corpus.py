"""Writes the seed corpus of the fuzz targets (tests/fuzz/corpus): valid and nearly valid
messages of our own robots, so that fuzzing starts from inputs that reach deep into the
checks. Run once from the repository root with the generated modules on the path:

    PYTHONPATH=build/python /usr/bin/python3 tests/fuzz/make_corpus.py
"""

import json
import os
import shutil
import struct

from foray.v1 import models_pb2, registry_pb2, session_pb2, types_pb2 as t

ROOT = os.path.join(os.path.dirname(os.path.abspath(__file__)), "corpus")


def spec(state_dim=2, action_dim=1):
    s = t.RobotSpec(name="seed-robot", control_period_s=0.05)
    for k in range(state_dim):
        s.state.add(label=f"s{k}", unit="m")
    for j in range(action_dim):
        s.action.add(label=f"a{j}", unit="N")
        s.action_limits.add(min=-1, max=1, max_step=0.5)
    s.model.hidden_widths.extend([16, 16])
    s.planner.horizon = 5
    s.objective.known_reward.quadratic.target.extend([0.0] * state_dim)
    return s


def case(robot, selector, message):
    head = robot.SerializeToString()
    return struct.pack("<H", len(head)) + head + bytes([selector]) + message.SerializeToString()


def main():
    wire = os.path.join(ROOT, "wire_fuzz")
    shutil.rmtree(wire, ignore_errors=True)
    os.makedirs(wire)
    robot = spec()
    batch = session_pb2.AppendTransitionsRequest(robot_id="r-0011223344556677")
    for seq in range(1, 4):
        batch.transitions.add(seq=seq, episode=1, step=seq - 1, state=[0.1, 0.2], action=[0.3],
                              next_state=[0.11, 0.2], reward=-0.01, terminal=seq == 3)
    cases = {
        "transitions": case(robot, 0, batch),
        "plan": case(robot, 1, t.PlanRequest(request_id=7, state=[0.1, 0.2], previous_action=[0.2], deadline_ms=50,
                                             planner=t.PlannerSettings(horizon=8, population=64))),
        "settings": case(robot, 2, registry_pb2.UpdateRobotSettingsRequest(
            robot_id="r-0011223344556677", planner=t.PlannerSettings(iterations=3),
            objective=t.ObjectiveSettings(information_weight=0.5, discount=0.99))),
        "model": case(robot, 3, models_pb2.EnsembleModel(format=1, state_dim=2, action_dim=1)),
        "spec": case(robot, 4, spec(4, 2)),
        "bad_plan": case(robot, 1, t.PlanRequest(state=[float("nan"), 1e308], deadline_ms=-1)),
    }
    for name, data in cases.items():
        with open(os.path.join(wire, name), "wb") as f:
            f.write(data)

    files = os.path.join(ROOT, "spec_file_fuzz")
    shutil.rmtree(files, ignore_errors=True)
    os.makedirs(files)
    shutil.copy(os.path.join(ROOT, "..", "..", "..", "deploy", "examples", "crane.json"), os.path.join(files, "crane.json"))
    small = {"name": "c", "control_period_s": 0.1, "state": [{"label": "x"}],
             "action": [{"label": "f", "min": -1, "max": 1, "max_step": 0.2}],
             "objective": {"known_reward": {"region": {"indices": [0], "lower": [0], "upper": [1]}}},
             "coverage": {"indices": [0, 0], "cells": 4}}
    with open(os.path.join(files, "small.json"), "w") as f:
        json.dump(small, f)
    with open(os.path.join(files, "broken.json"), "w") as f:
        f.write('{"name": "c", "state": [{"label": 1}], "planner": {"horizon": -2.5}')


if __name__ == "__main__":
    main()
