"""The foray CLI's reading commands against a real forayd on loopback: robots, status, and
watch (the live progress stream), with the exit codes scripts rely on."""

import os
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
    assert f"{rid} episode 3: return" in watched.stdout


def test_exit_codes_say_what_went_wrong(forayd, tmp_path):  # noqa: F811
    assert foray(forayd, "fly").returncode == 2
    assert foray(forayd).returncode == 2
    wrong = tmp_path / "token"
    wrong.write_text("not-a-token\n")
    refused = foray(forayd, "robots", token_file=str(wrong))
    assert refused.returncode == 1 and "check --token" in refused.stderr
    assert "not a safety system" in foray(forayd, "--help").stderr + foray(forayd, "--help").stdout
