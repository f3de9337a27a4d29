"""Liveness of robot sessions, for both clients (the C++ library through crash_client, the
Python package in this process).

1. A stream that is open but acknowledges nothing: a stand-in server of this test says welcome
   and then never acknowledges on the first stream. Each client must notice within its
   ack_timeout, count a stall, re-open the stream and resend, so that everything becomes
   durable on the next stream.
2. forayd killed with SIGKILL 100 times (30 on sanitizer builds) at random moments, some of them while the clients
   reconnect and resend, while one robot per client records as fast as its client takes
   transitions (bounded by max_unacknowledged). After the last restart every recorded
   transition is acknowledged within LIVENESS_S, and the store holds seq 1..recorded of each
   robot exactly once: nothing acknowledged lost, nothing stored twice.
"""

import concurrent.futures
import json
import os
import random
import signal
import sqlite3
import subprocess
import sys
import threading
import time

import grpc
import pytest

sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", "server"))
from conftest import forayd  # noqa: F401,E402  (the fixture)

from foray.v1 import (registry_pb2, registry_pb2_grpc, session_pb2, session_pb2_grpc,  # noqa: E402
                      types_pb2)
from foray_client import RobotSession  # noqa: E402

# Sanitizer builds start forayd several times slower: fewer kills keep that run bounded.
KILLS = 30 if os.environ.get("FORAY_SANITIZED") == "1" else 100
# Seconds after the last restart within which every recorded transition must be acknowledged.
# A backlog is at most 20,000 transitions a robot (max_unacknowledged); the Python client drains
# about 2,000-5,000 a second here, the C++ one over 30,000 (measured on this 2-core machine).
LIVENESS_S = 60.0
STATE_DIM = 14


def _spec(name):
    spec = types_pb2.RobotSpec(name=name, control_period_s=0.01)
    for k in range(STATE_DIM):
        spec.state.add(label=f"x{k}")
    spec.action.add(label="u")
    spec.action_limits.add(min=-1, max=1)
    spec.model.ensemble_size = 2
    spec.model.hidden_widths.append(16)
    spec.training.min_transitions = 500
    spec.training.every_n_transitions = 5000
    spec.training.max_epochs = 2
    return spec


class _SilentFirstStream(session_pb2_grpc.RobotSessionServicer, registry_pb2_grpc.RobotRegistryServicer):
    """Registers any robot; its first session stream says welcome and never acknowledges, the
    later ones acknowledge every transition at once."""

    def __init__(self):
        self.lock = threading.Lock()
        self.streams = 0
        self.durable = {}        # robot id -> highest seq acknowledged
        self.first_resent = []   # per later stream: the first seq it carried
        self.spec = {}

    def RegisterRobot(self, request, context):
        self.spec[request.robot_id] = request.spec
        self.durable[request.robot_id] = 0
        return registry_pb2.RegisterRobotResponse(
            robot=registry_pb2.Robot(robot_id=request.robot_id, spec=request.spec), token="t-" + request.robot_id)

    def Connect(self, request_iterator, context):
        hello = next(request_iterator).hello
        with self.lock:
            self.streams += 1
            silent = self.streams == 1
            last = self.durable.get(hello.robot_id, 0)
        yield session_pb2.SessionServerMessage(welcome=session_pb2.Welcome(
            last_seq=last, spec=self.spec.get(hello.robot_id, _spec("x"))))
        first = True
        for message in request_iterator:
            if silent or not message.HasField("transition"):
                continue
            seq = message.transition.seq
            with self.lock:
                if first:
                    self.first_resent.append(seq)
                    first = False
                self.durable[hello.robot_id] = max(self.durable[hello.robot_id], seq)
                durable = self.durable[hello.robot_id]
            yield session_pb2.SessionServerMessage(ack=session_pb2.Ack(durable_seq=durable, accepted=1))


@pytest.fixture
def silent_server():
    servicer = _SilentFirstStream()
    server = grpc.server(concurrent.futures.ThreadPoolExecutor(max_workers=8))
    session_pb2_grpc.add_RobotSessionServicer_to_server(servicer, server)
    registry_pb2_grpc.add_RobotRegistryServicer_to_server(servicer, server)
    port = server.add_insecure_port("127.0.0.1:0")
    server.start()
    try:
        yield f"127.0.0.1:{port}", servicer
    finally:
        server.stop(grace=0)


def test_python_session_reopens_a_stream_that_acknowledges_nothing(silent_server):
    address, servicer = silent_server
    identity = RobotSession.register(address, "admin", _spec("silent-py"))
    with RobotSession(address, identity.robot_id, identity.token, ack_timeout=1.0) as session:
        session.wait_connected(10)
        for step in range(50):
            session.record(1, step, [0.0] * STATE_DIM, [0.1], [0.0] * STATE_DIM, 0.0)
        time.sleep(0.5)
        stats = session.stats()
        assert stats["unacknowledged"] == 50 and stats["stalls"] == 0 and stats["healthy"]
        assert 0.3 < stats["ack_wait_s"] < 1.0
        session.flush(10)  # needs the stall to be noticed and the stream re-opened
        stats = session.stats()
    assert stats["stalls"] == 1 and stats["connects"] == 2 and stats["durable_seq"] == 50
    assert servicer.streams == 2 and servicer.first_resent == [1]  # everything resent


def test_cpp_session_reopens_a_stream_that_acknowledges_nothing(silent_server, tmp_path):
    address, servicer = silent_server
    admin = tmp_path / "admin-token"
    admin.write_text("admin\n")
    client = subprocess.Popen(
        [os.environ["CRASH_CLIENT"], f"--address={address}", f"--admin_token_file={admin}", "--robots=1",
         "--max_unacked=2000", "--ack_timeout_s=1", "--flush_timeout_s=10"],
        stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        deadline = time.monotonic() + 30
        for line in client.stdout:
            row = json.loads(line)
            if row["stalls"] >= 1 and row["durable_seq"] > 0 or time.monotonic() > deadline:
                break
        out, err = client.communicate(timeout=30)  # closes stdin: the client stops and flushes
    finally:
        if client.poll() is None:
            client.kill()
    assert client.returncode == 0, err
    final = json.loads(out.strip().splitlines()[-1])
    assert final["final"] and final["flushed"] and final["unacknowledged"] == 0
    assert final["stalls"] == 1 and final["connects"] == 2
    assert "no acknowledgement for" in err and "re-opened the session" in err
    assert servicer.first_resent == [1]


def test_every_transition_is_acknowledged_after_100_kills_with_both_clients(forayd):  # noqa: F811
    admin = os.path.join(forayd.data_dir, "admin-token")
    cpp = subprocess.Popen(
        [os.environ["CRASH_CLIENT"], f"--address={forayd.address}", f"--admin_token_file={admin}", "--robots=1",
         "--max_unacked=20000", f"--flush_timeout_s={LIVENESS_S}"],
        stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    cpp_final, cpp_latest = {}, {}

    def read_cpp():
        for line in cpp.stdout:
            row = json.loads(line)
            (cpp_final if row.get("final") else cpp_latest).update(row)

    reader = threading.Thread(target=read_cpp)
    reader.start()
    identity = RobotSession.register(forayd.address, forayd.admin_token, _spec("liveness-py"))
    py = RobotSession(forayd.address, identity.robot_id, identity.token, initial_backoff=0.02, max_backoff=0.2,
                      max_unacknowledged=20000)
    stop = threading.Event()
    py_recorded = [0]

    def feed():
        state = [0.0] * STATE_DIM
        while not stop.is_set():
            n = py_recorded[0]
            state[0] = n * 1e-3
            try:
                py.record(1 + n // 200, n % 200, state, [0.1], state, 0.0)
                py_recorded[0] = n + 1
            except Exception:  # RESOURCE_EXHAUSTED: max_unacknowledged wait already
                time.sleep(0.005)

    feeder = threading.Thread(target=feed)
    feeder.start()
    rng = random.Random(20261203)
    soon_after_restart = 0
    try:
        time.sleep(1.0)
        for kill in range(KILLS):
            # Every third kill lands within 0.15 s of the last restart: while the clients
            # reconnect, say hello and resend their backlog.
            if kill % 3 == 2:
                time.sleep(rng.uniform(0.0, 0.15))
                soon_after_restart += 1
            else:
                time.sleep(rng.uniform(0.05, 0.6))
            forayd.stop(sig=signal.SIGKILL)
            assert forayd.process.returncode == -signal.SIGKILL
            time.sleep(rng.uniform(0.0, 0.3))
            forayd.start_again()
        last_restart = time.monotonic()
        stop.set()
        feeder.join()
        cpp.stdin.close()  # the C++ robot stops recording and flushes
        py.flush(LIVENESS_S)
        py_done = time.monotonic() - last_restart
        cpp.wait(timeout=LIVENESS_S + 30)
        cpp_done = time.monotonic() - last_restart
        py_stats = py.stats()
    finally:
        stop.set()
        py.close()
        if cpp.poll() is None:
            cpp.kill()
        reader.join(timeout=10)
    assert cpp.returncode == 0, cpp.stderr.read()
    assert cpp_final["flushed"] and cpp_final["unacknowledged"] == 0 and cpp_final["rejected"] == 0
    assert cpp_done < LIVENESS_S + 5  # the C++ flush itself is bounded by LIVENESS_S
    assert py_stats["unacknowledged"] == 0 and py_stats["rejected"] == 0
    assert py_stats["durable_seq"] == py_recorded[0]

    forayd.stop()
    db = sqlite3.connect(os.path.join(forayd.data_dir, "foray.db"))
    try:
        assert db.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        for robot_id, recorded in ((cpp_final["robot_id"], cpp_final["recorded"]),
                                   (identity.robot_id, py_recorded[0])):
            count, distinct, low, high = db.execute(
                "SELECT COUNT(*), COUNT(DISTINCT seq), MIN(seq), MAX(seq) FROM transitions WHERE robot_id = ?",
                (robot_id,)).fetchone()
            # Exactly seq 1..recorded: nothing lost, nothing doubled, nothing never sent.
            assert (count, distinct, low, high) == (recorded, recorded, 1, recorded), robot_id
    finally:
        db.close()
    print(f"\nliveness: {KILLS} kills ({soon_after_restart} within 0.15 s of a restart); recorded "
          f"C++ {cpp_final['recorded']} (connects {cpp_final['connects']}, stalls {cpp_final['stalls']}), "
          f"Python {py_recorded[0]} (connects {py_stats['connects']}, stalls {py_stats['stalls']}); "
          f"all acknowledged {py_done:.1f} s (Python) and {cpp_done:.1f} s (C++) after the last restart")
