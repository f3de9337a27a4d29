"""The Python client (client/python, foray_client) against a real forayd on loopback: register,
stream, resume after the server restarts, plan, export; numpy arrays round-trip; the watchdog;
the robot-loop example; and installing the package with pip."""

import os
import shutil
import signal
import subprocess
import sys
import time

import numpy as np
import pytest

sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", "server"))
from conftest import forayd  # noqa: F401,E402  (the fixture)

from foray_client import ForayError, RobotSession, load_spec, spec_from_dict  # noqa: E402

REPO = os.path.abspath(os.path.join(os.path.dirname(__file__), "..", ".."))

SPEC = {
    "name": "py-cart",
    "control_period_s": 0.05,
    "state": [{"label": "x", "unit": "m"}, {"label": "v", "unit": "m/s"}],
    "action": [{"label": "force", "unit": "N", "min": -1.0, "max": 1.0, "max_step": 0.5}],
    "model": {"ensemble_size": 3, "hidden_widths": [32, 32], "activation": "silu"},
    "training": {"min_transitions": 100000},
    "planner": {"horizon": 6, "population": 32, "elites": 4, "iterations": 2},
}


def cart_rows(n, seed):
    """(states, actions, next_states, rewards) of x' = x + 0.05 v, v' = v + 0.05 a (our own)."""
    rng = np.random.default_rng(seed)
    s = rng.uniform(-1, 1, size=(n, 2))
    a = rng.uniform(-1, 1, size=(n, 1))
    ns = np.column_stack([s[:, 0] + 0.05 * s[:, 1], s[:, 1] + 0.05 * a[:, 0]])
    return s, a, ns, -ns[:, 0] ** 2


def session_for(server, tmp_path, **kwargs):
    identity = RobotSession.load_or_register(str(tmp_path / "py.identity"), server.address,
                                             os.path.join(server.data_dir, "admin-token"), SPEC)
    return RobotSession(server.address, identity.robot_id, identity.token, initial_backoff=0.05,
                        max_backoff=0.4, **kwargs)


def test_stream_resume_after_restart_plan_and_export(forayd, tmp_path):  # noqa: F811
    s, a, ns, r = cart_rows(300, seed=5)
    with session_for(forayd, tmp_path) as session:
        session.wait_connected(10)
        session.record_many(1, s[:150], a[:150], ns[:150], r[:150])
        session.flush(20)
        assert session.stats()["durable_seq"] == 150

        # SIGKILL mid-stream: what is recorded meanwhile waits in the buffer and goes out after
        # the restart; nothing is lost or stored twice.
        forayd.stop(sig=signal.SIGKILL)
        session.record_many(2, s[150:], a[150:], ns[150:], r[150:], last_is_terminal=True)
        with pytest.raises(ForayError):
            session.plan(s[0], deadline=0.02, wait=0.2)
        forayd.start_again()
        session.flush(30)
        stats = session.stats()
        assert stats["durable_seq"] == 300 and stats["connects"] >= 2 and stats["rejected"] == 0

        exported = session.export_transitions()
        assert np.array_equal(exported["seq"], np.arange(1, 301))
        # Every value comes back bit for bit (doubles all the way).
        assert np.array_equal(exported["state"], s) and np.array_equal(exported["action"], a)
        assert np.array_equal(exported["next_state"], ns) and np.array_equal(exported["reward"], r)
        assert exported["terminal"].sum() == 1 and exported["terminal"][-1]

        plan = session.plan([0.1, -0.2], previous_action=[0.8], deadline=0.05, wait=10)
        assert plan.actions.shape == (6, 1) and plan.from_prior  # no model yet (min_transitions)
        assert np.all(np.abs(plan.actions) <= 1.0) and abs(plan.actions[0, 0] - 0.8) <= 0.5 + 1e-9


def test_watchdog_returns_the_safe_action_in_time(forayd, tmp_path):  # noqa: F811
    with session_for(forayd, tmp_path, safe_action=[0.25]) as session:
        session.wait_connected(10)
        d = session.act([0.0, 0.0], [0.1], deadline=0.02, wait=2.0)
        assert d.planned and d.plan.actions.shape == (6, 1)
        forayd.stop(sig=signal.SIGKILL)
        started = time.monotonic()
        d = session.act([0.0, 0.0], [0.1], deadline=0.02, wait=0.1)
        assert time.monotonic() - started < 0.5  # bounded by `wait` plus scheduling, not by the outage
        assert not d.planned and d.action.tolist() == [0.25] and d.why
        assert session.stats()["safe_actions"] == 1


def test_bad_input_is_refused_with_the_field_named(forayd, tmp_path):  # noqa: F811
    with session_for(forayd, tmp_path) as session:
        session.wait_connected(10)
        with pytest.raises(ValueError, match="state has 3 values, the robot's spec has 2"):
            session.record(1, 0, [0, 0, 0], [0], [0, 0], 0.0)
        with pytest.raises(ValueError, match=r"next_state\[1\] is nan"):
            session.record(1, 0, [0, 0], [0], [0, float("nan")], 0.0)
        # Out of the action limits: the server refuses it and the session drops it.
        session.record(1, 0, [0, 0], [5.0], [0, 0], 0.0)
        session.record(1, 1, [0, 0], [0.5], [0, 0], 0.0)
        session.flush(10)
        stats = session.stats()
        assert stats["rejected"] == 1 and "outside the limits" in stats["last_error"]
        assert session.export_transitions()["action"].tolist() == [[0.5]]
    with pytest.raises(ValueError, match="planner.horizn: unknown key"):
        spec_from_dict(dict(SPEC, planner={"horizn": 3}))
    with pytest.raises(ValueError, match="'gelu' is not one of silu, relu, tanh"):
        spec_from_dict(dict(SPEC, model={"activation": "gelu"}))
    with pytest.raises(ValueError, match="seed: -7 is not a whole number"):
        spec_from_dict(dict(SPEC, seed=-7))
    assert spec_from_dict(dict(SPEC, seed=2 ** 64 - 1)).seed == 2 ** 64 - 1


def test_spec_files_read_the_same_in_python_and_in_the_cli(tmp_path):
    # The CLI's own example spec (DEVELOPERS.md) through the Python reader.
    spec = load_spec(os.path.join(REPO, "deploy", "examples", "crane.json"))
    assert spec.name == "crane-1" and len(spec.action_limits) == len(spec.action) == 1
    assert spec.model.activation == spec.model.ACTIVATION_SILU
    # The rail's stops: state 0's "min" and "max" (spec.state_limits).
    assert [(l.index, l.min, l.max) for l in spec.state_limits] == [(0, 0.0, 2.0)]
    with pytest.raises(ValueError, match=r"state\[0\].max: 0 is below min 1"):
        spec_from_dict(dict(SPEC, state=[{"label": "x", "min": 1, "max": 0}]))
    with pytest.raises(ValueError, match=r"state\[0\].max_step: unknown key"):
        spec_from_dict(dict(SPEC, state=[{"label": "x", "max_step": 1}]))


def test_robot_loop_example_runs(forayd, tmp_path):  # noqa: F811
    result = subprocess.run(
        [sys.executable, os.path.join(REPO, "client", "python", "examples", "robot_loop.py"),
         "--address", forayd.address, "--admin-token-file", os.path.join(forayd.data_dir, "admin-token"),
         "--identity-file", str(tmp_path / "cart.identity"), "--episodes", "2", "--steps", "40"],
        capture_output=True, text=True, timeout=120)
    assert result.returncode == 0, result.stdout + result.stderr
    assert "not a safety system" in result.stderr
    assert "example-cart episode 2: return" in result.stdout and "all 80 transitions durable" in result.stdout


def test_pip_installs_the_package_with_generated_stubs(tmp_path, forayd):  # noqa: F811
    # From a copy of the two folders the build reads, so the source tree gets no build files.
    tree = tmp_path / "tree"
    shutil.copytree(os.path.join(REPO, "client", "python"), tree / "client" / "python",
                    ignore=shutil.ignore_patterns("__pycache__", "build", "*.egg-info"))
    shutil.copytree(os.path.join(REPO, "proto"), tree / "proto")
    target = tmp_path / "site"
    built = subprocess.run(
        ["/usr/bin/python3", "-m", "pip", "install", "--no-deps", "--no-build-isolation", "--no-index",
         "--target", str(target), str(tree / "client" / "python")],
        capture_output=True, text=True, timeout=300)
    assert built.returncode == 0, built.stdout + built.stderr
    assert (target / "foray" / "v1" / "session_pb2_grpc.py").exists()
    # The installed copy alone (no source tree, no build/python on the path) registers a robot.
    probe = ("import foray_client, foray.v1.session_pb2 as s, sys;"
             "assert foray_client.__file__.startswith(sys.argv[1]) and s.__file__.startswith(sys.argv[1]);"
             "from foray_client import RobotSession;"
             "print(RobotSession.register(sys.argv[2], open(sys.argv[3]).read().strip(),"
             " {'name': 'pip-cart', 'control_period_s': 0.1, 'state': [{'label': 'x'}],"
             " 'action': [{'label': 'f', 'min': -1, 'max': 1}]}).robot_id)")
    ran = subprocess.run(["/usr/bin/python3", "-c", probe, str(target), forayd.address,
                          os.path.join(forayd.data_dir, "admin-token")],
                         capture_output=True, text=True, timeout=60, cwd=str(tmp_path),
                         env={"PYTHONPATH": str(target), "PATH": os.environ.get("PATH", "")})
    assert ran.returncode == 0, ran.stderr
    assert ran.stdout.startswith("r-")
