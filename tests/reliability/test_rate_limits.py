"""Per-robot rate limits (forayd --robot_plans_per_s, --robot_transitions_per_s): a robot that asks
too much is refused with RESOURCE_EXHAUSTED naming the limit, nothing of a refused batch is
stored, other robots are not affected, and a client library that streams faster than its limit
still gets every transition stored exactly once (it resends what was refused)."""

import os
import sqlite3
import sys
import tempfile
import time

import grpc
import numpy as np
import pytest

sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", "server"))
from conftest import Forayd  # noqa: E402
from test_service import Client, spec, transitions  # noqa: E402

from foray_client import RobotSession  # noqa: E402

CODE = grpc.StatusCode


@pytest.fixture(scope="module")
def limited():
    with tempfile.TemporaryDirectory(prefix="foray-limits-") as data:
        server = Forayd(data, extra_args=["--robot_plans_per_s=5", "--robot_transitions_per_s=1000"])
        try:
            yield server
        finally:
            server.stop()


def stored(server, robot_id):
    db = sqlite3.connect(os.path.join(server.data_dir, "foray.db"))
    try:
        return db.execute("SELECT COUNT(*), COUNT(DISTINCT seq), COALESCE(MAX(seq), 0) FROM transitions "
                          "WHERE robot_id = ?", (robot_id,)).fetchone()
    finally:
        db.close()


def test_plans_beyond_the_limit_are_refused_per_robot(limited):
    c = Client(limited)
    busy, calm = c.register(spec("busy", 2, 1)), c.register(spec("calm", 2, 1))
    outcomes = []
    started = time.monotonic()
    for _ in range(20):  # 20 in a row against 5/s with a burst of 10
        try:
            c.plan(busy, [0.0, 0.0], deadline_ms=20)
            outcomes.append("ok")
        except grpc.RpcError as e:
            assert e.code() == CODE.RESOURCE_EXHAUSTED and "--robot_plans_per_s" in e.details(), e.details()
            outcomes.append("refused")
    elapsed = time.monotonic() - started
    # Token bucket (server/sched/rate_limit.h): the robot's first plan finds a full bucket, so the
    # burst of 10 passes; after it, one plan per moment the bucket is back out of debt: at most
    # rate x elapsed more, plus one for the part of a token refilled when the burst ran out.
    admitted = outcomes.count("ok")
    most = min(20, 10 + int(5 * elapsed) + 1)
    assert 10 <= admitted <= most, (admitted, most, elapsed)
    assert outcomes.count("refused") == 20 - admitted
    assert c.plan(calm, [0.0, 0.0], deadline_ms=20).steps  # its own bucket
    time.sleep(1.0)
    assert c.plan(busy, [0.0, 0.0], deadline_ms=20).steps  # refilled


def test_a_batch_beyond_the_limit_is_refused_whole(limited):
    c = Client(limited)
    robot = c.register(spec("batcher", 2, 1, min_transitions=10 ** 6))
    rid = robot.robot.robot_id
    assert c.append(robot, transitions(2, 1, 1, 3000)).durable_seq == 3000  # a full bucket lets it pass
    with pytest.raises(grpc.RpcError) as refused:
        c.append(robot, transitions(2, 1, 3001, 10))  # the bucket is in debt
    assert refused.value.code() == CODE.RESOURCE_EXHAUSTED
    assert "--robot_transitions_per_s" in refused.value.details() and "nothing of this batch" in refused.value.details()
    assert stored(limited, rid) == (3000, 3000, 3000)
    time.sleep(1.5)  # the debt of 1,000 is repaid
    assert c.append(robot, transitions(2, 1, 3001, 10)).durable_seq == 3010


def test_a_client_streaming_faster_than_its_limit_loses_nothing(limited):
    identity = RobotSession.register(limited.address, limited.admin_token,
                                     {"name": "streamer", "control_period_s": 0.01, "state": [{"label": "x"}],
                                      "action": [{"label": "f", "min": -1, "max": 1}],
                                      "training": {"min_transitions": 1000000}})
    with RobotSession(limited.address, identity.robot_id, identity.token, initial_backoff=0.05,
                      max_backoff=0.4) as session:
        session.wait_connected(10)
        x = np.linspace(-1, 1, 4000)
        for i in range(4000):  # 4,000 at once: twice the burst, four seconds' worth
            session.record(1, i, [x[i]], [0.5], [x[i] + 0.01], 0.0)
        session.flush(60)
        stats = session.stats()
        assert stats["durable_seq"] == 4000 and stats["rejected"] == 0
        # Whether the server refused a group on the way (the session then ends and the client
        # comes back: connects >= 2) depends on how the transitions arrive: a group that finds
        # tokens in the bucket passes whole, into debt (the test above), and under load the
        # client's messages can reach the server as a few large groups. Either way nothing is lost
        # (above and below).
    assert stored(limited, identity.robot_id) == (4000, 4000, 4000)
