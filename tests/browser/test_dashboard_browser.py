"""The dashboard in a real browser: Debian's chromium, headless, driven by playwright-core from
npm (dashboard_check.mjs), against a real forayd while two simulated robots (the gantry and the
contact robot "bench") learn through it, with evaluation episodes. Screenshots go to the build
folder (browser-screenshots/)."""

import json
import os
import socket
import subprocess
import sys
import tempfile

sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", "server"))
from conftest import Forayd  # noqa: E402

HERE = os.path.dirname(os.path.abspath(__file__))


def free_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def test_dashboard_shows_a_robot_learning():
    with tempfile.TemporaryDirectory(prefix="foray-browser-") as data_dir:
        port = free_port()
        server = Forayd(data_dir, [f"--http_port={port}"])
        sim = None
        try:
            sim = subprocess.Popen(
                [os.environ["FORAY_SIM"], f"--address={server.address}",
                 f"--admin_token_file={os.path.join(data_dir, 'admin-token')}",
                 f"--state_dir={os.path.join(data_dir, 'sim')}", "--robots=gantry,bench",
                 "--episodes=16", "--steps=40", "--train_each_episode", "--min_transitions=40",
                 "--evaluate_every=2", "--deadline_ms=30"],
                stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
            check = subprocess.run(
                ["node", os.path.join(HERE, "dashboard_check.mjs"), f"http://127.0.0.1:{port}/",
                 "sim-gantry-1,sim-bench-2", os.path.join(os.environ["FORAY_BUILD_DIR"], "browser-screenshots")],
                capture_output=True, text=True, timeout=240, cwd=HERE)
            seen = json.loads(check.stdout.strip().splitlines()[-1])
            assert check.returncode == 0 and seen["ok"], (seen, check.stderr)
            assert seen["blocked"] == [] and seen["map"]["occupied"] > 0
        finally:
            if sim is not None:
                sim.terminate()
                sim.wait(timeout=30)
            assert server.stop() == 0
