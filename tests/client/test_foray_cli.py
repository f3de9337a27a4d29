"""The foray CLI's reading commands against a real forayd on loopback: robots, status, and
watch (the live progress stream), with the exit codes scripts rely on."""

import os
import re
import subprocess
import sys
import threading
import time

sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", "server"))
from conftest import forayd  # noqa: F401,E402  (the fixture)
from test_service import Client, spec, transitions  # noqa: E402


def foray(server, *args, token_file=None):
    return subprocess.run(
        [os.environ["FORAY_CLI"], f"--address={server.address}",
         f"--token_file={token_file or os.path.join(server.data_dir, 'admin-token')}", *args],
        capture_output=True, text=True, timeout=60)


def test_robots_status_and_watch(forayd):  # noqa: F811
    c = Client(forayd)
    robot = c.register(spec("cli-gantry", 2, 1, min_transitions=40, every_n=100000))
    rid = robot.robot.robot_id
    c.append(robot, transitions(2, 1, 1, 100, episode_len=50))
    c.wait_model(rid, 1)

    listed = foray(forayd, "robots")
    assert listed.returncode == 0, listed.stderr
    assert "cli-gantry" in listed.stdout and rid in listed.stdout

    status = foray(forayd, "status", rid)
    assert status.returncode == 0, status.stderr
    assert "transitions 100, episodes 2, model v1" in status.stdout

    def later():
        time.sleep(1.0)
        c.append(robot, transitions(2, 1, 101, 50, episode_len=50))

    feeder = threading.Thread(target=later)
    feeder.start()
    watched = foray(forayd, "watch", rid, "--seconds=4", "--plain")
    feeder.join()
    assert watched.returncode == 0, watched.stderr
    assert f"{rid} snapshot:" in watched.stdout
    assert f"{rid} exploration episode 3: return" in watched.stdout

    table = foray(forayd, "watch", rid, "--seconds=1.5")  # the redrawing table, with a coverage bar
    assert table.returncode == 0, table.stderr
    assert "Foray learning progress" in table.stdout and "cli-gantry" in table.stdout
    assert re.search(r"\[[#.]{20}\]", table.stdout)


def test_exit_codes_say_what_went_wrong(forayd, tmp_path):  # noqa: F811
    assert foray(forayd, "fly").returncode == 2
    assert foray(forayd).returncode == 2
    wrong = tmp_path / "token"
    wrong.write_text("not-a-token\n")
    refused = foray(forayd, "robots", token_file=str(wrong))
    assert refused.returncode == 1 and "check --token" in refused.stderr
    assert "not a safety system" in foray(forayd, "--help").stderr + foray(forayd, "--help").stdout


# --- Commands that change things, end to end (spec file, import, export, train, checkpoints) ---

import json  # noqa: E402
import stat  # noqa: E402

import numpy as np  # noqa: E402

SPEC = {
    "name": "cli-cart",
    "control_period_s": 0.05,
    "state": [{"label": "x", "unit": "m"}, {"label": "v", "unit": "m/s"}],
    "action": [{"label": "force", "unit": "N", "min": -1.0, "max": 1.0, "max_step": 0.5}],
    "model": {"ensemble_size": 3, "hidden_widths": [32, 32], "activation": "silu"},
    "training": {"min_transitions": 100000, "max_epochs": 5},
    "planner": {"horizon": 8, "population": 64, "elites": 8, "iterations": 2},
    "objective": {"reward_weight": 1.0, "information_weight": 0.5, "estimator": "pairwise_kl"},
    "coverage": {"indices": [0, 1], "lower": [-1, -1], "upper": [1, 1], "cells": 10},
}


def cart_table(n, seed=3):
    """Rows in the export column order of a cart x' = x + 0.05 v, v' = v + 0.05 a (our own)."""
    rng = np.random.default_rng(seed)
    x = rng.uniform(-1, 1, size=(n, 2))
    a = rng.uniform(-1, 1, size=(n, 1))
    nx = np.column_stack([x[:, 0] + 0.05 * x[:, 1], x[:, 1] + 0.05 * a[:, 0]])
    seq = np.arange(1, n + 1, dtype=float)
    episode = 1 + (seq - 1) // 50
    step = (seq - 1) % 50
    reward = -(nx[:, 0] ** 2)
    terminal = (step == 49).astype(float)
    return np.column_stack([seq, episode, step, x, a, nx, reward, terminal])


COLUMNS = "seq,episode,step,state.x,state.v,action.force,next_state.x,next_state.v,reward,terminal"


def test_register_import_export_train_plan_restore(forayd, tmp_path):  # noqa: F811
    spec_file = tmp_path / "cart.json"
    spec_file.write_text(json.dumps(SPEC))
    identity = tmp_path / "cart.identity"
    reg = foray(forayd, "register", str(spec_file), f"--token_out={identity}")
    assert reg.returncode == 0, reg.stderr
    assert stat.S_IMODE(os.stat(identity).st_mode) == 0o600
    rid = identity.read_text().split()[0]
    assert f"registered cli-cart as {rid}" in reg.stdout

    # Import: the robot's own token (its identity file works as a token file).
    table = cart_table(300)
    csv_in = tmp_path / "in.csv"
    csv_in.write_text(COLUMNS + "\n" + "\n".join(",".join(repr(float(v)) for v in row) for row in table) + "\n")
    imported = foray(forayd, "import", rid, str(csv_in), token_file=str(identity))
    assert imported.returncode == 0, imported.stderr
    assert "300 new, 0 already there" in imported.stdout
    again = foray(forayd, "import", rid, str(csv_in), token_file=str(identity))
    assert "0 new, 300 already there" in again.stdout

    # Export to .npy: numpy loads exactly what was sent; CSV too, bit for bit.
    npy = tmp_path / "out.npy"
    exported = foray(forayd, "export", rid, f"--out={npy}")
    assert exported.returncode == 0, exported.stderr
    assert COLUMNS in exported.stdout
    assert np.array_equal(np.load(npy), table)
    csv_out = tmp_path / "out.csv"
    assert foray(forayd, "export", rid, f"--out={csv_out}", "--from_seq=101", "--to_seq=200").returncode == 0
    lines = csv_out.read_text().splitlines()
    assert lines[0] == COLUMNS
    assert np.array_equal(np.array([[float(v) for v in l.split(",")] for l in lines[1:]]), table[100:200])

    # Train now, then plan from a state: the plan keeps the action limits and the rate limit.
    trained = foray(forayd, "train", rid)
    assert trained.returncode == 0, trained.stderr
    assert "model v1: " in trained.stdout and "300 transitions" in trained.stdout
    plan = foray(forayd, "plan", rid, "--state=0.2,-0.1", "--previous_action=0.9", "--deadline_ms=200",
                 token_file=str(identity))
    assert plan.returncode == 0, plan.stderr
    assert "not a safety system" in plan.stderr
    assert "plan of 8 steps, model v1" in plan.stdout
    rows = [l.split() for l in plan.stdout.splitlines()[2:]]
    actions = [float(r[1]) for r in rows]
    assert len(actions) == 8 and all(-1.0 <= a <= 1.0 for a in actions)
    assert abs(actions[0] - 0.9) <= 0.5 + 1e-6  # max_step from the previous action

    # Checkpoints: v1 listed; restoring it publishes it again; an unknown version is refused.
    listed = foray(forayd, "checkpoints", rid)
    assert listed.returncode == 0 and "v1" in listed.stdout
    restored = foray(forayd, "restore", rid, "1")
    assert restored.returncode == 0, restored.stderr
    assert "restored checkpoint v1" in restored.stdout
    missing = foray(forayd, "restore", rid, "99")
    assert missing.returncode == 1 and "99" in missing.stderr


def test_bad_input_files_and_usage_say_what_to_fix(forayd, tmp_path):  # noqa: F811
    bad = dict(SPEC, planner={"horizn": 5})
    spec_file = tmp_path / "bad.json"
    spec_file.write_text(json.dumps(bad))
    refused = foray(forayd, "register", str(spec_file))
    assert refused.returncode == 2 and "planner.horizn: unknown key" in refused.stderr
    spec_file.write_text(json.dumps(dict(SPEC, action=[{"label": "f", "min": 2, "max": -1}])))
    refused = foray(forayd, "register", str(spec_file))
    assert refused.returncode == 2 and "action[0].max: -1 is not above min 2" in refused.stderr
    spec_file.write_text("{\"name\": ")
    assert "not valid JSON" in foray(forayd, "register", str(spec_file)).stderr

    example = os.path.join(os.path.dirname(__file__), "..", "..", "deploy", "examples", "crane.json")
    crane = foray(forayd, "register", example)
    assert crane.returncode == 0 and "registered crane-1 as r-" in crane.stdout, crane.stderr

    good = tmp_path / "good.json"
    good.write_text(json.dumps(SPEC))
    identity = tmp_path / "id"
    assert foray(forayd, "register", str(good), f"--token_out={identity}").returncode == 0
    rid = identity.read_text().split()[0]
    csv_in = tmp_path / "in.csv"
    csv_in.write_text(COLUMNS + "\n1,1,0,0.1,0.2,nan,0.1,0.2,0,0\n")
    nan = foray(forayd, "import", rid, str(csv_in), token_file=str(identity))
    assert nan.returncode == 2 and "line 2 column action.force" in nan.stderr
    csv_in.write_text("seq,episode,step,state.x\n")
    assert "robot \"cli-cart\" needs 10" in foray(forayd, "import", rid, str(csv_in), token_file=str(identity)).stderr
    csv_in.write_text(COLUMNS + "\n1,1,0,0.1,0.2,5.0,0.1,0.2,0,0\n")  # force outside [-1, 1]
    out_of_bounds = foray(forayd, "import", rid, str(csv_in), token_file=str(identity))
    assert out_of_bounds.returncode == 1 and "action[0] is 5, outside the limits" in out_of_bounds.stderr
    assert "nothing was stored" in out_of_bounds.stderr
    assert foray(forayd, "export", rid, f"--out={tmp_path / 'x.npy'}").stdout.startswith("wrote 0 transitions")

    assert foray(forayd, "plan", rid, token_file=str(identity)).returncode == 2  # no --state
    helped = foray(forayd, "plan", "--help")
    assert helped.returncode == 0 and "--state=" in helped.stdout and "not a safety system" in helped.stdout
    for command in ("register", "robots", "status", "watch", "plan", "export", "import", "train",
                    "checkpoints", "restore", "archive"):
        assert foray(forayd, command, "--help").returncode == 0


# --- Over TLS: forayd --tls_cert/--tls_key, foray --tls_ca ---

def test_cli_over_tls(tmp_path):
    """A self-signed certificate for 127.0.0.1 made by openssl at test time (as the service's
    TLS test does): with --tls_ca the CLI reaches a TLS-only forayd, without it the plaintext
    channel is refused; a CA file that is not PEM is a usage error naming the file."""
    from conftest import tls_forayd

    server, cert = tls_forayd(tmp_path, "IP:127.0.0.1,DNS:foray.lab")
    try:
        secure = foray(server, "robots", f"--tls_ca={cert}")
        assert secure.returncode == 0, secure.stderr
        named = foray(server, "robots", f"--tls_ca={cert}", "--tls_server_name=foray.lab")
        assert named.returncode == 0, named.stderr
        wrong_name = foray(server, "robots", f"--tls_ca={cert}", "--tls_server_name=other.lab")
        assert wrong_name.returncode == 1, wrong_name.stdout + wrong_name.stderr
        plain = foray(server, "robots")
        assert plain.returncode == 1, plain.stdout + plain.stderr
        not_pem = tmp_path / "ca.txt"
        not_pem.write_text("not a certificate\n")
        bad = foray(server, "robots", f"--tls_ca={not_pem}")
        assert bad.returncode == 2 and str(not_pem) in bad.stderr and "no PEM" in bad.stderr
        missing = foray(server, "robots", f"--tls_ca={tmp_path / 'absent.pem'}")
        assert missing.returncode == 2 and "cannot be read" in missing.stderr
    finally:
        assert server.stop() == 0
