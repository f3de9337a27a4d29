"""foray-sim against a real forayd on loopback: it registers, runs its episodes, streams every
transition once, and resumes its sequence numbers on the next run."""

import os
import sqlite3
import subprocess
import sys

import grpc

sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", "server"))
from conftest import forayd  # noqa: F401,E402  (the fixture)
from foray.v1 import registry_pb2 as reg  # noqa: E402
from foray.v1 import registry_pb2_grpc  # noqa: E402
from foray.v1 import types_pb2  # noqa: E402


# Under the sanitizers a plan takes about a second (one CEM iteration always runs, whatever the
# deadline), so a run of a few episodes takes minutes there (69 s for this file on an idle
# 2-core machine under TSan, 131 s with other builds running).
RUN_TIMEOUT_S = 600 if os.environ.get("FORAY_SANITIZED") else 120


def run_sim(server, *args):
    return subprocess.run(
        [os.environ["FORAY_SIM"], f"--address={server.address}",
         f"--admin_token_file={os.path.join(server.data_dir, 'admin-token')}",
         f"--state_dir={os.path.join(server.data_dir, 'sim')}", *args],
        capture_output=True, text=True, timeout=RUN_TIMEOUT_S)


def stored(server):
    db = sqlite3.connect(os.path.join(server.data_dir, "foray.db"))
    try:
        return db.execute("SELECT robot_id, COUNT(*), COUNT(DISTINCT seq), MAX(seq) FROM transitions "
                          "GROUP BY robot_id").fetchall()
    finally:
        db.close()


def test_sim_streams_its_episodes_and_resumes(forayd):  # noqa: F811
    first = run_sim(forayd, "--robots=gantry", "--episodes=3", "--steps=30")
    assert first.returncode == 0, first.stdout + first.stderr
    assert "not a safety system" in first.stderr
    lines = [l for l in first.stdout.splitlines() if " episode " in l]
    assert len(lines) == 3 and lines[-1].startswith("sim-gantry-1 exploration episode 3: time up")
    assert "registered as r-" in first.stdout
    ((robot_id, count, distinct, top),) = stored(forayd)
    assert (count, distinct, top) == (90, 90, 90)

    second = run_sim(forayd, "--robots=gantry", "--episodes=2", "--steps=30")
    assert second.returncode == 0, second.stdout + second.stderr
    assert "registered" not in second.stdout  # the kept token was used
    assert "episode 4:" in second.stdout and "episode 5:" in second.stdout
    assert stored(forayd) == [(robot_id, 150, 150, 150)]


def test_sim_runs_evaluation_episodes_once_a_model_exists(forayd):  # noqa: F811
    from foray.v1 import monitoring_pb2, monitoring_pb2_grpc

    # Training after each episode: from the second episode on there is a model; every second
    # exploration episode is followed by an evaluation episode.
    result = run_sim(forayd, "--robots=gantry", "--episodes=6", "--steps=25", "--min_transitions=20",
                     "--train_each_episode", "--evaluate_every=2", "--deadline_ms=20")
    assert result.returncode == 0, result.stdout + result.stderr
    kinds = [l.split(" episode ")[0].split()[-1] for l in result.stdout.splitlines() if " episode " in l]
    assert kinds == ["exploration", "exploration", "evaluation", "exploration", "exploration", "evaluation"]
    # The time limit is not a terminal: nothing the sim recorded is marked terminal.
    db = sqlite3.connect(os.path.join(forayd.data_dir, "foray.db"))
    try:
        assert db.execute("SELECT COUNT(*) FROM transitions WHERE terminal != 0").fetchone()[0] == 0
    finally:
        db.close()
    # The server counts the evaluation episodes apart (the last one closes when its successor
    # starts, so 1 of the 2 is closed by now).
    with grpc.insecure_channel(forayd.address) as channel:
        progress = monitoring_pb2_grpc.MonitoringStub(channel).GetProgress(
            monitoring_pb2.GetProgressRequest(), metadata=(("authorization", f"Bearer {forayd.admin_token}"),),
            timeout=10).robots[0]
    assert progress.evaluation.episodes == 1 and progress.exploration.episodes == 4


def test_sim_refuses_an_unknown_robot(forayd):  # noqa: F811
    result = run_sim(forayd, "--robots=crane")
    assert result.returncode == 2
    assert 'unknown robot "crane"' in result.stderr


def test_sim_names_a_broken_model_file(forayd, tmp_path, monkeypatch):  # noqa: F811
    broken = tmp_path / "bench.xml"
    broken.write_text("<mujoco>\n  <worldbody>\n    <body><geom type='box' size='1'/></body>\n  <oops/>\n"
                      "  </worldbody>\n</mujoco>\n")
    monkeypatch.setenv("FORAY_SIM_MODELS", str(tmp_path))
    result = run_sim(forayd, "--robots=bench")
    assert result.returncode == 2
    assert str(broken) in result.stderr and "line" in result.stderr, result.stderr
    assert not (tmp_path / "MUJOCO_LOG.TXT").exists() and not os.path.exists("MUJOCO_LOG.TXT")


def test_bench_robot_records_lost_pucks_as_terminal(forayd):  # noqa: F811
    # The noise baseline never loses the puck; striking it is what loses it. Prior plans (no
    # model: --min_transitions above the run) are coloured noise over the whole speed range.
    result = run_sim(forayd, "--robots=bench", "--episodes=6", "--min_transitions=100000", "--steps=100")
    assert result.returncode == 0, result.stdout + result.stderr
    lines = [l for l in result.stdout.splitlines() if " episode " in l]
    assert len(lines) == 6
    lost = [l for l in lines if ": lost," in l]
    db = sqlite3.connect(os.path.join(forayd.data_dir, "foray.db"))
    try:
        terminals = db.execute("SELECT COUNT(*) FROM transitions WHERE terminal != 0").fetchone()[0]
        episodes = db.execute("SELECT COUNT(DISTINCT episode) FROM transitions").fetchone()[0]
    finally:
        db.close()
    assert terminals == len(lost)  # one terminal transition per lost puck, none for a time limit
    assert episodes == 6


def test_table_robot_runs_and_records_its_eight_dimensional_states(forayd):  # noqa: F811
    # The table robot (MuJoCo, a rod on a two-axis stage pushing a puck) through forayd: its
    # spec carries the state and action labels with units, and every transition the 8-dimensional
    # state; a lost puck is one terminal transition.
    result = run_sim(forayd, "--robots=table", "--episodes=3", "--min_transitions=100000", "--steps=60",
                     "--name_prefix=tab")
    assert result.returncode == 0, result.stdout + result.stderr
    lines = [l for l in result.stdout.splitlines() if l.startswith("tab-table-1 ") and " episode " in l]
    assert len(lines) == 3, result.stdout
    assert "within 0.05 m of (0.15, 0.15) m" in result.stdout  # the hidden goal, said at registration
    channel = grpc.insecure_channel(forayd.address)
    robots = registry_pb2_grpc.RobotRegistryStub(channel).ListRobots(
        reg.ListRobotsRequest(), metadata=[("authorization", f"Bearer {forayd.admin_token}")]).robots
    table = [r for r in robots if r.spec.name == "tab-table-1"][0].spec
    assert [d.label for d in table.state] == ["rod_x", "rod_y", "rod_velocity_x", "rod_velocity_y",
                                              "puck_x", "puck_y", "puck_velocity_x", "puck_velocity_y"]
    assert [d.unit for d in table.state] == ["m"] * 2 + ["m/s"] * 2 + ["m"] * 2 + ["m/s"] * 2
    assert [(a.min, a.max) for a in table.action_limits] == [(-0.8, 0.8), (-0.8, 0.8)]
    # The stage's travel stops, given as state limits (plans hold predicted states inside them).
    assert [(l.index, l.min, l.max) for l in table.state_limits] == [(0, -0.28, 0.28), (1, -0.28, 0.28)]


def test_sim_registers_the_reward_estimate_it_is_given(forayd):  # noqa: F811
    bad = run_sim(forayd, "--robots=gantry", "--reward_estimate=best")
    assert bad.returncode == 2 and '--reward_estimate is "best"' in bad.stderr, bad.stderr
    result = run_sim(forayd, "--robots=gantry", "--episodes=1", "--steps=5", "--min_transitions=100000",
                     "--reward_estimate=nearby", "--name_prefix=near")
    assert result.returncode == 0, result.stdout + result.stderr
    channel = grpc.insecure_channel(forayd.address)
    robots = registry_pb2_grpc.RobotRegistryStub(channel).ListRobots(
        reg.ListRobotsRequest(), metadata=[("authorization", f"Bearer {forayd.admin_token}")]).robots
    gantry = [r for r in robots if r.spec.name == "near-gantry-1"][0].spec
    assert gantry.objective.reward_estimate == types_pb2.REWARD_ESTIMATE_NEARBY


def test_sim_evaluates_with_the_reward_estimate_it_is_given(forayd):  # noqa: F811
    bad = run_sim(forayd, "--robots=gantry", "--evaluation_reward_estimate=best")
    assert bad.returncode == 2 and '--evaluation_reward_estimate is "best"' in bad.stderr, bad.stderr
    # Evaluation plans carry the override (with a value weight in the same objective override);
    # the robot itself stays on the model's reward.
    result = run_sim(forayd, "--robots=gantry", "--episodes=3", "--steps=20", "--min_transitions=20",
                     "--train_each_episode", "--evaluate_every=2", "--deadline_ms=20",
                     "--evaluation_reward_estimate=nearby", "--evaluation_value_weight=0.5",
                     "--name_prefix=evalnear")
    assert result.returncode == 0, result.stdout + result.stderr
    assert "evalnear-gantry-1 evaluation episode 3:" in result.stdout, result.stdout
    channel = grpc.insecure_channel(forayd.address)
    robots = registry_pb2_grpc.RobotRegistryStub(channel).ListRobots(
        reg.ListRobotsRequest(), metadata=[("authorization", f"Bearer {forayd.admin_token}")]).robots
    gantry = [r for r in robots if r.spec.name == "evalnear-gantry-1"][0].spec
    assert gantry.objective.reward_estimate == types_pb2.REWARD_ESTIMATE_UNSPECIFIED


def test_sim_over_tls(tmp_path):
    # A TLS-only forayd with an openssl certificate made at test time (as the CLI's TLS test):
    # with --tls_ca foray-sim registers, streams and plans over TLS; without it the plaintext
    # channel is refused; a CA file that is not PEM is a usage error naming the file.
    from conftest import tls_forayd

    server, cert = tls_forayd(tmp_path, "IP:127.0.0.1,DNS:foray.lab")
    try:
        secure = run_sim(server, f"--tls_ca={cert}", "--robots=gantry", "--episodes=1", "--steps=20",
                         "--name_prefix=tls")
        assert secure.returncode == 0, secure.stdout + secure.stderr
        assert "tls-gantry-1 exploration episode 1" in secure.stdout
        # The certificate's DNS name instead of the address's host: registration, the session's
        # stream and Predict all check it; a name the certificate does not hold is refused.
        named = run_sim(server, f"--tls_ca={cert}", "--tls_server_name=foray.lab", "--robots=gantry",
                        "--episodes=1", "--steps=20", "--name_prefix=named")
        assert named.returncode == 0, named.stdout + named.stderr
        assert "named-gantry-1 exploration episode 1" in named.stdout
        wrong = run_sim(server, f"--tls_ca={cert}", "--tls_server_name=other.lab", "--robots=gantry",
                        "--episodes=1", "--steps=5", "--name_prefix=wrong")
        assert wrong.returncode == 1, wrong.stdout + wrong.stderr
        alone = run_sim(server, "--tls_server_name=foray.lab", "--robots=gantry", "--episodes=1")
        assert alone.returncode == 2 and "--tls_server_name needs --tls_ca" in alone.stderr
        plain = run_sim(server, "--robots=gantry", "--episodes=1", "--steps=5", "--name_prefix=plain")
        assert plain.returncode == 1, plain.stdout + plain.stderr
        not_pem = tmp_path / "ca.txt"
        not_pem.write_text("not a certificate\n")
        bad = run_sim(server, f"--tls_ca={not_pem}", "--robots=gantry", "--episodes=1")
        assert bad.returncode == 2 and str(not_pem) in bad.stderr and "no PEM" in bad.stderr
    finally:
        assert server.stop() == 0
