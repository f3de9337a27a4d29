"""Scale-out on loopback: nginx (deploy/router/router-config.sh) in front of two forayd shards;
four robots register, stream and plan through the single front address with the Python
client; each robot's data is on exactly one shard; one shard is killed and restarted, and its
robots carry on through their clients' reconnect with nothing lost."""

import os
import shutil
import signal
import socket
import sqlite3
import subprocess
import sys
import tempfile
import threading
import time

import grpc
import numpy as np
import pytest

sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", "server"))
from conftest import Forayd  # noqa: E402

from foray.v1 import registry_pb2, registry_pb2_grpc  # noqa: E402
from foray_client import RobotSession  # noqa: E402

REPO = os.path.abspath(os.path.join(os.path.dirname(__file__), "..", ".."))
STEPS = 120

SPEC = {
    "name": "routed",
    "control_period_s": 0.05,
    "state": [{"label": "x", "unit": "m"}, {"label": "v", "unit": "m/s"}],
    "action": [{"label": "force", "unit": "N", "min": -1.0, "max": 1.0}],
    "training": {"min_transitions": 100000},
    "planner": {"horizon": 5, "population": 32, "elites": 4, "iterations": 2},
}


def free_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.fixture
def cluster():
    with tempfile.TemporaryDirectory(prefix="foray-router-") as root:
        admin = os.path.join(root, "admin-token")
        with open(admin, "w") as f:
            f.write("shared-admin-token-of-the-test-cluster\n")
        os.chmod(admin, 0o600)
        shards = []
        for i in range(2):
            data = os.path.join(root, f"shard{i}")
            os.makedirs(data)
            shards.append(Forayd(data, extra_args=[f"--admin_token_file={admin}"]))
        front = f"127.0.0.1:{free_port()}"
        prefix = os.path.join(root, "nginx")
        os.makedirs(prefix)
        conf = subprocess.run(["bash", os.path.join(REPO, "deploy", "router", "router-config.sh"), front, prefix]
                              + [s.address for s in shards], capture_output=True, text=True, check=True).stdout
        with open(os.path.join(prefix, "nginx.conf"), "w") as f:
            f.write(conf)
        nginx = subprocess.Popen([shutil.which("nginx") or "/usr/sbin/nginx", "-p", prefix, "-c",
                                  os.path.join(prefix, "nginx.conf"), "-g", "daemon off;"],
                                 stdout=subprocess.PIPE, stderr=subprocess.STDOUT)
        try:
            deadline = time.monotonic() + 10
            while time.monotonic() < deadline:
                try:
                    socket.create_connection(("127.0.0.1", int(front.split(":")[1])), timeout=0.2).close()
                    break
                except OSError:
                    assert nginx.poll() is None, nginx.stdout.read().decode()
                    time.sleep(0.05)
            yield front, admin, shards
        finally:
            nginx.send_signal(signal.SIGQUIT)
            try:
                nginx.wait(timeout=10)
            except subprocess.TimeoutExpired:
                nginx.kill()
            for s in shards:
                s.stop()


def holder(shards, robot_id, admin_token):
    """Indices of the shards that know the robot, asked directly (not through the router)."""
    found = []
    for i, s in enumerate(shards):
        with grpc.insecure_channel(s.address) as channel:
            try:
                registry_pb2_grpc.RobotRegistryStub(channel).GetRobot(
                    registry_pb2.GetRobotRequest(robot_id=robot_id), timeout=5,
                    metadata=(("authorization", f"Bearer {admin_token}"),))
                found.append(i)
            except grpc.RpcError as e:
                assert e.code() == grpc.StatusCode.NOT_FOUND, e
    return found


def stored(shard, robot_id):
    db = sqlite3.connect(os.path.join(shard.data_dir, "foray.db"))
    try:
        return [s for (s,) in db.execute("SELECT seq FROM transitions WHERE robot_id = ? ORDER BY seq", (robot_id,))]
    finally:
        db.close()


def test_four_robots_through_one_address_and_a_shard_restart(cluster):
    front, admin_file, shards = cluster
    admin = open(admin_file).read().strip()
    # Four robots; with two shards and random ids all four land on one shard once in eight
    # runs, so robots are added (at most 12 more) until each shard holds at least one.
    robots, placement = [], {}
    while len(robots) < 4 or len(set(placement.values())) < 2:
        assert len(robots) < 16, f"every robot landed on one shard: {placement}"
        identity = RobotSession.register(front, admin, dict(SPEC, name=f"routed-{len(robots)}"))
        where = holder(shards, identity.robot_id, admin)
        assert len(where) == 1, f"{identity.robot_id} is on shards {where}"
        placement[identity.robot_id] = where[0]
        robots.append(identity)
    victim = placement[robots[0].robot_id]

    sessions = [RobotSession(front, r.robot_id, r.token, initial_backoff=0.05, max_backoff=0.4) for r in robots]
    rng = np.random.default_rng(7)
    try:
        for s in sessions:
            s.wait_connected(10)
            plan = s.plan([0.1, 0.0], deadline=0.05, wait=10)
            assert plan.actions.shape == (5, 1)
        killed = threading.Event()

        def restart():
            time.sleep(1.0)
            shards[victim].stop(sig=signal.SIGKILL)
            killed.set()
            time.sleep(1.5)
            shards[victim].start_again()

        restarter = threading.Thread(target=restart)
        restarter.start()
        for step in range(STEPS):  # 20 Hz for 6 s: the shard is down from 1 s to 2.5 s
            for s in sessions:
                x = rng.uniform(-1, 1, size=2)
                s.record(1, step, x, [0.5], x + 0.01, 0.0)
            time.sleep(0.05)
        restarter.join()
        assert killed.is_set()
        for s in sessions:
            s.flush(30)
        stats = [s.stats() for s in sessions]
        for r, st in zip(robots, stats):
            assert st["durable_seq"] == STEPS and st["rejected"] == 0, (r.robot_id, st)
            if placement[r.robot_id] == victim:
                assert st["connects"] >= 2  # it reconnected through the router after the restart
        for s in sessions:  # plans again, through the router, from every shard
            assert s.plan([0.0, 0.1], deadline=0.05, wait=10).actions.shape == (5, 1)
    finally:
        for s in sessions:
            s.close()

    # Each robot's data on exactly one shard: all of it, once, on the shard it was placed on.
    for r in robots:
        home = placement[r.robot_id]
        assert stored(shards[home], r.robot_id) == list(range(1, STEPS + 1))
        assert stored(shards[1 - home], r.robot_id) == []


def test_moving_a_robot_to_another_shard_with_export_and_import(cluster, tmp_path):
    """The README's procedure: export from the old shard, register under the same id on the new
    one, import, and the new shard holds the same transitions."""
    front, admin_file, shards = cluster
    cli = os.environ["FORAY_CLI"]

    def foray(address, *args, token_file=admin_file):
        return subprocess.run([cli, f"--address={address}", f"--token_file={token_file}", *args],
                              capture_output=True, text=True, timeout=60)

    spec = tmp_path / "mover.json"
    spec.write_text(__import__("json").dumps(dict(SPEC, name="mover")))
    old, new = shards
    first = foray(old.address, "register", str(spec), "--robot_id=r-00000000000000aa",
                  f"--token_out={tmp_path / 'old.identity'}")
    assert first.returncode == 0, first.stderr
    session = RobotSession(old.address, "r-00000000000000aa", (tmp_path / "old.identity").read_text().split()[1])
    session.wait_connected(10)
    for step in range(50):
        session.record(1, step, [step * 0.01, 0.0], [0.25], [step * 0.01, 0.01], float(step))
    session.flush(10)
    session.close()

    table = tmp_path / "mover.csv"
    assert foray(old.address, "export", "r-00000000000000aa", f"--out={table}").returncode == 0
    moved = foray(new.address, "register", str(spec), "--robot_id=r-00000000000000aa",
                  f"--token_out={tmp_path / 'new.identity'}")
    assert moved.returncode == 0, moved.stderr
    imported = foray(new.address, "import", "r-00000000000000aa", str(table),
                     token_file=str(tmp_path / "new.identity"))
    assert imported.returncode == 0 and "50 new" in imported.stdout, imported.stderr
    again = tmp_path / "again.csv"
    assert foray(new.address, "export", "r-00000000000000aa", f"--out={again}").returncode == 0
    assert again.read_text() == table.read_text()
    archived = foray(old.address, "archive", "r-00000000000000aa")
    assert archived.returncode == 0 and "its 50 transitions stay" in archived.stdout, archived.stderr
