"""Any language: a Node.js client on @grpc/grpc-js + @grpc/proto-loader (tests/interop,
loading proto/ directly) registers a robot, streams transitions over the session stream, gets
acks and a plan; the C++ CLI then reads back the same data and plans for the same robot."""

import json
import math
import os
import subprocess
import sys

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", "server"))
from conftest import forayd  # noqa: F401,E402  (the fixture)

HERE = os.path.dirname(os.path.abspath(__file__))
REPO = os.path.abspath(os.path.join(HERE, "..", ".."))
COUNT = 120


def expected_rows():
    """The closed forms of robot_client.mjs, in export column order without episode/step."""
    rows = []
    for seq in range(1, COUNT + 1):
        x, v, a = math.sin(0.1 * seq), math.cos(0.07 * seq), 0.9 * math.sin(0.05 * seq)
        nx, nv = x + 0.05 * v, v + 0.05 * a
        rows.append([seq, x, v, a, nx, nv, -nx * nx, 1.0 if seq % 40 == 0 else 0.0])
    return np.array(rows)


def test_node_client_streams_and_plans_like_the_cpp_client(forayd, tmp_path):  # noqa: F811
    node = subprocess.run(
        ["node", os.path.join(HERE, "robot_client.mjs"), forayd.address,
         os.path.join(forayd.data_dir, "admin-token"), os.path.join(REPO, "proto"), str(COUNT)],
        capture_output=True, text=True, timeout=60, cwd=HERE)
    assert node.returncode == 0, node.stdout + node.stderr
    seen = json.loads(node.stdout)
    assert seen["welcome_last_seq"] == 0 and seen["errors"] == []
    assert seen["durable_seq"] == COUNT and seen["accepted"] == COUNT
    plan = seen["plan"]
    assert plan["request_id"] == "7" and plan["from_prior"] and len(plan["actions"]) == 7
    assert all(-1.0 <= a[0] <= 1.0 for a in plan["actions"]) and abs(plan["actions"][0][0] - 0.8) <= 0.5 + 1e-9

    # JavaScript numbers are IEEE 754 doubles too: what Node sent is stored bit for bit (JSON
    # carries the shortest round-trip form). The closed forms agree to rounding (V8's sin and
    # the C library's may differ in the last bit).
    exported = np.array(seen["exported"], dtype=float)
    assert np.array_equal(exported, np.array(seen["sent"], dtype=float))
    assert np.allclose(exported, expected_rows(), rtol=1e-14, atol=1e-15)

    # The C++ CLI reads the same rows back (.npy, seq/episode/step first) ...
    npy = tmp_path / "node.npy"
    cli = os.environ["FORAY_CLI"]
    admin = f"--token_file={os.path.join(forayd.data_dir, 'admin-token')}"
    done = subprocess.run([cli, f"--address={forayd.address}", admin, "export", seen["robot_id"], f"--out={npy}"],
                          capture_output=True, text=True, timeout=60)
    assert done.returncode == 0, done.stderr
    table = np.load(npy)
    assert np.array_equal(np.delete(table, [1, 2], axis=1), exported)

    # ... and plans for the robot with its token: the same horizon, limits and prior plan.
    token_file = tmp_path / "robot.token"
    token_file.write_text(seen["token"] + "\n")
    planned = subprocess.run([cli, f"--address={forayd.address}", f"--token_file={token_file}", "plan",
                              seen["robot_id"], "--state=0.1,-0.2", "--previous_action=0.8", "--deadline_ms=50"],
                             capture_output=True, text=True, timeout=60)
    assert planned.returncode == 0, planned.stderr
    assert "plan of 7 steps, model v0 (no model yet" in planned.stdout
    actions = [float(line.split()[1]) for line in planned.stdout.splitlines()[2:]]
    assert len(actions) == 7 and all(-1.0 <= a <= 1.0 for a in actions) and abs(actions[0] - 0.8) <= 0.5 + 1e-9
