"""The bad-input table of DEVELOPERS.md ("Bad input"), one test per row: each input is sent to a
real forayd, the code and the message are checked, and nothing is stored."""

import os
import sqlite3
import sys
import tempfile

import grpc
import pytest

sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", "server"))
from conftest import Forayd  # noqa: E402
from test_service import Client, batch_with, spec, transitions  # noqa: E402

from foray.v1 import registry_pb2 as reg  # noqa: E402
from foray.v1 import session_pb2 as ses  # noqa: E402
from foray.v1 import types_pb2 as t  # noqa: E402

CODE = grpc.StatusCode


@pytest.fixture(scope="module")
def world():
    """One server, one robot with transitions 1..10, a second robot, an archived one."""
    with tempfile.TemporaryDirectory(prefix="foray-bad-input-") as data:
        server = Forayd(data)
        try:
            c = Client(server)
            robot = c.register(spec("target", 2, 1))
            other = c.register(spec("neighbour", 2, 1))
            gone = c.register(spec("gone", 2, 1))
            c.registry.ArchiveRobot(reg.ArchiveRobotRequest(robot_id=gone.robot.robot_id), metadata=c.admin)
            c.append(robot, transitions(2, 1, 1, 10))
            yield server, c, robot, other, gone
        finally:
            server.stop()


def stored(server):
    db = sqlite3.connect(os.path.join(server.data_dir, "foray.db"))
    try:
        return (db.execute("SELECT COUNT(*) FROM transitions").fetchone()[0],
                db.execute("SELECT COUNT(*) FROM robots").fetchone()[0])
    finally:
        db.close()


def refused(call, code, fragment):
    with pytest.raises(grpc.RpcError) as info:
        call()
    assert info.value.code() == code, info.value.details()
    assert fragment in info.value.details(), info.value.details()


# (row id, batch, code, message fragment)
TRANSITION_ROWS = [
    ("wrong-dimensions", lambda: batch_with(state=[0.1, 0.2, 0.3]), CODE.INVALID_ARGUMENT,
     "transitions[1] (seq 12).state has 3 values"),
    ("nan", lambda: batch_with(next_state=[0.1, float("nan")]), CODE.INVALID_ARGUMENT, "next_state[1] is nan"),
    ("inf", lambda: batch_with(reward=float("inf")), CODE.INVALID_ARGUMENT, "reward is inf"),
    ("action-out-of-bounds", lambda: batch_with(action=[1.5]), CODE.INVALID_ARGUMENT,
     "action[0] is 1.5, outside the limits [-1, 1]"),
    ("empty", lambda: [], CODE.INVALID_ARGUMENT, "transitions is empty"),
    ("too-many", lambda: transitions(2, 1, 11, 10001), CODE.INVALID_ARGUMENT,
     "transitions has 10001 entries, at most 10000"),
    ("seq-zero", lambda: transitions(2, 1, 0, 2), CODE.INVALID_ARGUMENT, "transitions[0].seq is 0"),
    ("rewind-within-a-request", lambda: batch_with(seq=11), CODE.INVALID_ARGUMENT,
     "transitions[1].seq is 11 after 11"),
    ("huge-message", lambda: transitions(200, 1, 11, 9000), CODE.RESOURCE_EXHAUSTED, "larger than max"),
]


@pytest.mark.parametrize("row", TRANSITION_ROWS, ids=[r[0] for r in TRANSITION_ROWS])
def test_bad_transitions(world, row):
    server, c, robot, _, _ = world
    _, make, code, fragment = row
    before = stored(server)
    refused(lambda: c.append(robot, make()), code, fragment)
    assert stored(server) == before


def test_resent_and_rewound_seqs_are_duplicates_not_errors(world):
    server, c, robot, _, _ = world
    before = stored(server)
    ack = c.append(robot, transitions(2, 1, 3, 5))  # seq 3..7 again: a resend after a lost ack
    assert (ack.accepted, ack.duplicates) == (0, 5) and ack.durable_seq >= 10
    assert stored(server) == before


def test_a_sequence_gap_is_accepted(world):
    # Seqs must increase, not be contiguous: a client that dropped transitions locally (its
    # buffer limit) still streams what it has. Documented in the bad-input table.
    server, c, robot, _, _ = world
    count, robots = stored(server)
    gap = transitions(2, 1, 1001, 1)
    assert c.append(robot, gap).durable_seq == 1001
    assert stored(server) == (count + 1, robots)


AUTH_ROWS = [
    ("no-token", [], CODE.UNAUTHENTICATED, "credentials"),
    ("wrong-token", [("authorization", "Bearer not-a-token")], CODE.UNAUTHENTICATED, "not known"),
]


@pytest.mark.parametrize("row", AUTH_ROWS, ids=[r[0] for r in AUTH_ROWS])
def test_bad_credentials(world, row):
    server, c, robot, _, _ = world
    _, metadata, code, fragment = row
    before = stored(server)
    refused(lambda: c.session.AppendTransitions(
        ses.AppendTransitionsRequest(robot_id=robot.robot.robot_id, transitions=transitions(2, 1, 2000, 2)),
        metadata=metadata), code, fragment)
    assert stored(server) == before


def test_another_robots_token(world):
    server, c, robot, other, _ = world
    before = stored(server)
    refused(lambda: c.append(robot, transitions(2, 1, 2000, 2), token=other.token), CODE.PERMISSION_DENIED,
            "another robot")
    assert stored(server) == before


def test_an_archived_robots_token(world):
    # Tokens do not expire; archiving a robot revokes its token.
    server, c, _, _, gone = world
    before = stored(server)
    refused(lambda: c.append(gone, transitions(2, 1, 1, 2)), CODE.PERMISSION_DENIED, "archived")
    assert stored(server) == before


def test_an_unknown_robot(world):
    server, c, robot, _, _ = world
    before = stored(server)
    refused(lambda: c.registry.GetRobot(reg.GetRobotRequest(robot_id="r-00000000"), metadata=c.admin),
            CODE.NOT_FOUND, "not registered")
    # A robot's token names its own robot only: another id is refused, not looked up.
    refused(lambda: c.session.AppendTransitions(
        ses.AppendTransitionsRequest(robot_id="r-00000000", transitions=transitions(2, 1, 1, 1)),
        metadata=[("authorization", f"Bearer {robot.token}")]), CODE.PERMISSION_DENIED, "another robot")
    assert stored(server) == before


def test_the_admin_token_cannot_write_a_robots_data(world):
    server, c, robot, _, _ = world
    before = stored(server)
    refused(lambda: c.session.AppendTransitions(
        ses.AppendTransitionsRequest(robot_id=robot.robot.robot_id, transitions=transitions(2, 1, 2000, 1)),
        metadata=c.admin), CODE.PERMISSION_DENIED, "robot's own token, not the admin token")
    assert stored(server) == before


def spec_with(**change):
    s = spec("bad", 2, 1)
    for key, value in change.items():
        target = s
        *path, last = key.split("__")
        for part in path:
            target = getattr(target, part)
        if isinstance(value, list):
            del getattr(target, last)[:]
            getattr(target, last).extend(value)
        else:
            setattr(target, last, value)
    return s


SPEC_ROWS = [
    ("name-characters", lambda: spec_with(name="no spaces"), "spec.name \"no spaces\" has the character ' '"),
    ("name-too-long", lambda: spec_with(name="n" * 65), "spec.name"),
    ("no-state", lambda: spec_with(state=[]), "spec.state"),
    ("inverted-limits", lambda: spec_with(action_limits=[t.ActionLimit(min=2, max=1)]),
     "spec.action_limits[0] has min 2 and max 1"),
    ("zero-period", lambda: spec_with(control_period_s=0), "spec.control_period_s is 0"),
    ("oversized-ensemble", lambda: spec_with(model__ensemble_size=33), "ensemble_size is 33"),
    ("oversized-layer", lambda: spec_with(model__hidden_widths=[4096]), "4096"),
    ("too-many-layers", lambda: spec_with(model__hidden_widths=[8] * 9), "hidden_widths"),
    ("elites-above-population", lambda: spec_with(planner__elites=1000), "spec.planner: elites is 1000"),
    ("absurd-horizon", lambda: spec_with(planner__horizon=501), "horizon is 501"),
    ("absurd-population", lambda: spec_with(planner__population=200000), "population is 200000"),
    ("keep-fraction", lambda: spec_with(planner__keep_fraction=2.0), "keep_fraction"),
    ("population-decay", lambda: spec_with(planner__population_decay=0.5), "population_decay"),
    ("holdout-fraction", lambda: spec_with(training__holdout_fraction=0.9), "holdout_fraction"),
]


@pytest.mark.parametrize("row", SPEC_ROWS, ids=[r[0] for r in SPEC_ROWS])
def test_bad_specs(world, row):
    server, c, _, _, _ = world
    _, make, fragment = row
    before = stored(server)
    refused(lambda: c.register(make()), CODE.INVALID_ARGUMENT, fragment)
    assert stored(server) == before


PLAN_ROWS = [
    ("state-dimensions", dict(state=[0.0] * 3), "request.state has 3 values"),
    ("state-nan", dict(state=[0.0, float("nan")]), "request.state[1] is nan"),
    ("previous-action-out-of-bounds", dict(state=[0.0, 0.0], previous_action=[3.0]),
     "request.previous_action[0] is 3, outside the limits"),
    ("deadline-too-long", dict(state=[0.0, 0.0], deadline_ms=90000), "request.deadline_ms is 90000"),
    ("deadline-too-short", dict(state=[0.0, 0.0], deadline_ms=0.5), "request.deadline_ms is 0.5"),
    ("planner-override", dict(state=[0.0, 0.0], planner=t.PlannerSettings(elites=500)), "elites is 500"),
]


@pytest.mark.parametrize("row", PLAN_ROWS, ids=[r[0] for r in PLAN_ROWS])
def test_bad_plan_requests(world, row):
    _, c, robot, _, _ = world
    _, fields, fragment = row
    refused(lambda: c.session.PlanActions(
        ses.PlanActionsRequest(robot_id=robot.robot.robot_id, request=t.PlanRequest(**fields)),
        metadata=[("authorization", f"Bearer {robot.token}")]), CODE.INVALID_ARGUMENT, fragment)
