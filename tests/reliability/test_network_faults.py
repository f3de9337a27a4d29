"""Network faults against a real forayd: a client that sends without reading its replies is held
back by flow control (the server reads no further than a bounded inbox, so its memory stays
bounded), and a client that drops its stream mid-way and comes back with a stale sequence number
loses nothing and stores nothing twice."""

import os
import queue
import sqlite3
import sys
import tempfile
import threading
import time

import grpc

sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", "server"))
from conftest import Forayd, forayd  # noqa: F401,E402  (the fixture)
from test_service import Client, spec, transitions  # noqa: E402

from foray.v1 import monitoring_pb2 as mon  # noqa: E402
from foray.v1 import monitoring_pb2_grpc as mon_grpc  # noqa: E402
from foray.v1 import session_pb2 as ses  # noqa: E402
from foray.v1 import session_pb2_grpc  # noqa: E402
from foray.v1 import types_pb2 as t  # noqa: E402


def rss_mb(pid):
    with open(f"/proc/{pid}/status") as f:
        for line in f:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) / 1024.0
    return 0.0


def test_a_client_that_does_not_read_is_held_back_and_memory_stays_bounded(forayd):  # noqa: F811
    c = Client(forayd)
    # A 100-D robot with a model: each plan reply carries predicted means and deviations (about
    # 32 KB), so unread replies fill the client's receive window within a few hundred plans and
    # the server's writes block.
    wide = spec("wide", 100, 1, min_transitions=100, every_n=10 ** 6, max_epochs=2)
    wide.planner.population, wide.planner.elites, wide.planner.iterations = 20, 4, 1
    wide.planner.horizon = 20
    robot = c.register(wide)
    auth = [("authorization", f"Bearer {robot.token}")]
    c.append(robot, transitions(100, 1, 1, 200))
    c.wait_model(robot.robot.robot_id, 1)
    total = 100_000
    sent = [0]
    row = t.Transition(episode=1, state=[0.1] * 100, action=[0.2], next_state=[0.1] * 100)

    def requests():
        yield ses.SessionClientMessage(hello=ses.Hello(robot_id=robot.robot.robot_id))
        for seq in range(201, total + 201):
            if seq % 10 == 0:
                sent[0] += 1
                yield ses.SessionClientMessage(plan_request=t.PlanRequest(request_id=seq, state=[0.0] * 100,
                                                                          deadline_ms=50))
            row.seq = seq
            sent[0] += 1
            yield ses.SessionClientMessage(transition=row)

    before = rss_mb(forayd.process.pid)
    stub = session_pb2_grpc.RobotSessionStub(c.channel)
    call = stub.Connect(requests(), metadata=auth)  # the replies are never read
    # Wait until the client's sending stalls (flow control), bounded at 60 s.
    last, stable_since, deadline = -1, time.monotonic(), time.monotonic() + 60
    while time.monotonic() < deadline:
        time.sleep(0.5)
        if sent[0] != last:
            last, stable_since = sent[0], time.monotonic()
        elif time.monotonic() - stable_since > 3:
            break
    grown = rss_mb(forayd.process.pid) - before
    stalled_at = sent[0]
    call.cancel()
    print(f"\nsender stalled after {stalled_at} of {total + total // 10} messages; server grew {grown:.0f} MB")
    # Without a bound the server reads all 110,000 messages (about 170 MB) while its writes are
    # blocked; it stops at its inbox of 20,000 messages plus transport buffers. (Its memory also
    # holds the robot's dataset, so the growth is checked loosely.)
    assert stalled_at < 0.6 * total
    if os.environ.get("FORAY_SANITIZED") != "1":  # AddressSanitizer's own memory would dominate
        assert grown < 200
    # The server still serves (once it has stored what the client sent before leaving; it skips
    # the plans nobody will read), and what it took in is stored once.
    deadline = time.monotonic() + 30
    while True:
        try:
            assert c.plan(robot, [0.0] * 100, deadline_ms=100).steps
            break
        except grpc.RpcError as e:
            assert e.code() == grpc.StatusCode.RESOURCE_EXHAUSTED and time.monotonic() < deadline, e
            time.sleep(0.2)
    db = sqlite3.connect(os.path.join(forayd.data_dir, "foray.db"))
    try:
        count, distinct = db.execute("SELECT COUNT(*), COUNT(DISTINCT seq) FROM transitions").fetchone()
    finally:
        db.close()
    assert count == distinct and count <= 200 + stalled_at


def test_a_stream_left_unread_is_ended_after_the_write_timeout():
    """A client that stays connected but never reads leaves the server's write blocked (flow
    control), holding a handler thread; with --stalled_write_timeout_s the server cancels that
    stream, names it in its log, and keeps serving. Shown with an export of 12,000 transitions
    of a 100-D robot (about 20 MB, far beyond the client's receive window); sessions and progress
    watches go through the same watch (server/api/write_watch.h)."""
    with tempfile.TemporaryDirectory(prefix="foray-test-") as data_dir:
        server = Forayd(data_dir, ["--stalled_write_timeout_s=2"])
        try:
            c = Client(server)
            robot = c.register(spec("unread", 100, 1, min_transitions=10 ** 6))
            for first in range(1, 12_001, 2000):
                c.append(robot, transitions(100, 1, first, 2000))
            auth = [("authorization", f"Bearer {robot.token}")]
            stub = mon_grpc.MonitoringStub(c.channel)
            started = time.monotonic()
            call = stub.ExportTransitions(mon.ExportTransitionsRequest(robot_id=robot.robot.robot_id),
                                          metadata=auth)  # never read
            # The server names the stream it ended in its log (bounded wait).
            deadline = started + 60
            while "ended the export" not in server.output() and time.monotonic() < deadline:
                time.sleep(0.1)
            took = time.monotonic() - started
            log = server.output()
            assert 'ended the export of robot "unread"' in log and "--stalled_write_timeout_s" in log, log
            print(f"\nunread export ended by the server after {took:.1f} s")
            assert 2.0 <= took < 30
            # What reached the client's buffers before is still there, then the cancellation.
            received = 0
            try:
                for b in call:
                    received += len(b.transitions)
                raise AssertionError("the export completed; the server's write never stalled")
            except grpc.RpcError as e:
                assert e.code() == grpc.StatusCode.CANCELLED, e
            assert received < 12_000
            # The server still serves the robot, and an export that is read goes through.
            rows = [t for b in stub.ExportTransitions(
                mon.ExportTransitionsRequest(robot_id=robot.robot.robot_id, from_seq=11_001),
                metadata=auth) for t in b.transitions]
            assert [r.seq for r in rows] == list(range(11_001, 12_001))
        finally:
            server.stop()


def test_a_dropped_stream_resumes_with_a_stale_seq_and_loses_nothing(forayd):  # noqa: F811
    c = Client(forayd)
    robot = c.register(spec("dropper", 2, 1, min_transitions=10 ** 6))
    auth = [("authorization", f"Bearer {robot.token}")]
    stub = session_pb2_grpc.RobotSessionStub(c.channel)
    batch = transitions(2, 1, 1, 5000)

    def first():
        yield ses.SessionClientMessage(hello=ses.Hello(robot_id=robot.robot.robot_id))
        for tr in batch:
            yield ses.SessionClientMessage(transition=tr)
        time.sleep(30)  # keeps the stream open until it is cancelled

    call = stub.Connect(first(), metadata=auth)
    welcome = next(call)
    assert welcome.welcome.last_seq == 0
    time.sleep(0.2)
    call.cancel()  # gone mid-stream, acks unread

    # Back with a stale sequence number: the welcome says what is durable; the client resends
    # everything from seq 1 anyway (it lost its state), and the server counts duplicates.
    replies = queue.Queue()

    def again():
        yield ses.SessionClientMessage(hello=ses.Hello(robot_id=robot.robot.robot_id, last_acked_seq=0))
        for tr in batch:
            yield ses.SessionClientMessage(transition=tr)
        while True:  # hold the stream until the test has its acks
            try:
                if replies.get(timeout=30) == "done":
                    return
            except queue.Empty:
                return

    call = stub.Connect(again(), metadata=auth)
    durable_before = next(call).welcome.last_seq
    accepted = duplicates = durable = 0
    for message in call:
        if message.HasField("ack"):
            accepted += message.ack.accepted
            duplicates += message.ack.duplicates
            durable = message.ack.durable_seq
            if durable == 5000 and accepted + duplicates == 5000:
                replies.put("done")
                break
        assert not message.HasField("error"), message.error.message
    call.cancel()
    # The first stream's handler may still store what it had read when the welcome was sent, so
    # the duplicates are at least what the welcome reported.
    assert durable == 5000 and accepted + duplicates == 5000 and duplicates >= durable_before
    db = sqlite3.connect(os.path.join(forayd.data_dir, "foray.db"))
    try:
        count, distinct, top = db.execute("SELECT COUNT(*), COUNT(DISTINCT seq), MAX(seq) FROM transitions").fetchone()
    finally:
        db.close()
    assert (count, distinct, top) == (5000, 5000, 5000)
