"""Irrecoverable states and evaluation episodes through the service, end to end over loopback:
the termination head learns from the terminal flag and reports through Predict and the training
report; plans carry survival; evaluation plans are reward only, are refused before a model, and
their episodes are counted apart; bad objective settings are refused by name with nothing
stored. The Python client is the one a lab's robot would use."""

import math
import os
import sqlite3
import sys
import time

import grpc
import pytest

sys.path.insert(0, os.path.dirname(__file__))
from test_service import CODE, Client, expect_error, spec  # noqa: E402

from foray.v1 import models_pb2 as mod  # noqa: E402
from foray.v1 import models_pb2_grpc  # noqa: E402
from foray.v1 import monitoring_pb2, monitoring_pb2_grpc  # noqa: E402
from foray.v1 import types_pb2 as t  # noqa: E402
from foray_client import ForayError, RobotSession  # noqa: E402

EDGE = 1.0


def cliff(first_seq, episodes, steps=40):
    """A 1-D walker of our own, x' = x + 0.1 u, v' = u, that starts in [0, 0.8] and falls
    (terminal) once x passes EDGE; reward 1 while 0.5 <= x' <= 0.8. Actions sweep [-1, 1]
    with a drift toward the edge, so some episodes fall."""
    out, seq = [], first_seq
    for e in range(episodes):
        x = 0.1 + 0.7 * ((e * 0.37) % 1.0)
        for k in range(steps):
            u = min(1.0, math.sin(0.7 * seq) * 0.8 + 0.2)
            nx = x + 0.1 * u
            fell = nx > EDGE
            out.append(t.Transition(seq=seq, episode=e + 1, step=k, state=[x, u], action=[u],
                                    next_state=[nx, u], reward=1.0 if 0.5 <= nx <= 0.8 else 0.0,
                                    terminal=fell))
            seq += 1
            x = nx
            if fell:
                break
    return out


def stored_count(server, robot_id):
    db = sqlite3.connect(os.path.join(server.data_dir, "foray.db"))
    try:
        return db.execute("SELECT COUNT(*) FROM transitions WHERE robot_id = ?", (robot_id,)).fetchone()[0]
    finally:
        db.close()


def progress(c, robot_id):
    stub = monitoring_pb2_grpc.MonitoringStub(c.channel)
    return stub.GetProgress(monitoring_pb2.GetProgressRequest(robot_id=robot_id), metadata=c.admin).robots[0]


def test_head_learns_terminals_and_plans_report_survival(forayd):
    c = Client(forayd)
    robot = c.register(spec("walker", 2, 1, min_transitions=300, every_n=100000, max_epochs=30))
    rid, auth = robot.robot.robot_id, [("authorization", f"Bearer {robot.token}")]
    batch = cliff(1, 40)
    terminals = sum(tr.terminal for tr in batch)
    assert terminals >= 5 and len(batch) <= 10000
    c.append(robot, batch)  # one batch: the first round trains on all of it
    c.wait_model(rid, 1)
    report = progress(c, rid).last_training
    assert report.transitions == len(batch)
    assert report.terminal_transitions == terminals
    # w_pos = non-terminal / terminal training rows, capped at 10 (trainer.h)
    assert 1.0 < report.terminal_weight <= 10.0
    assert report.holdout_termination_bce > 0

    models = models_pb2_grpc.ModelsStub(c.channel)
    rows = [mod.PredictRequest.Row(state=[0.98, 0.9], action=[1.0]),   # steps over the edge
            mod.PredictRequest.Row(state=[0.2, 0.0], action=[0.0])]    # far inside
    predicted = models.Predict(mod.PredictRequest(robot_id=rid, rows=rows), metadata=auth)
    over, inside = (sum(r.termination_probability) / len(r.termination_probability) for r in predicted.rows)
    assert len(predicted.rows[0].termination_probability) == 5
    assert over > 0.5 > 0.05 > inside, (over, inside)

    plan = c.plan(robot, [0.3, 0.0], deadline_ms=500)
    survival = [s.survival for s in plan.steps]
    assert len(survival) == 10 and all(0.0 <= s <= 1.0 for s in survival)
    assert all(a >= b - 1e-6 for a, b in zip(survival, survival[1:]))  # never rises
    assert not plan.evaluation


def test_evaluation_episodes_are_reward_only_and_counted_apart(forayd):
    c = Client(forayd)
    robot = c.register(spec("evaluator", 2, 1, min_transitions=100, every_n=100000))
    rid = robot.robot.robot_id
    with RobotSession(forayd.address, rid, robot.token) as session:
        session.wait_connected(10)
        # Before any model: refused, named, and nothing planned or stored.
        with pytest.raises(ForayError) as refused:
            session.plan([0.3, 0.0], evaluate=True, episode=1, wait=10)
        assert refused.value.code == grpc.StatusCode.FAILED_PRECONDITION
        assert "evaluate" in refused.value.message and "no model yet" in refused.value.message
        assert stored_count(forayd, rid) == 0

        batch = cliff(1, 10)
        for tr in batch:
            session.record(tr.episode, tr.step, tr.state, tr.action, tr.next_state, tr.reward, tr.terminal)
        session.flush(30)
        c.wait_model(rid, 1)
        explored = progress(c, rid).exploration.episodes
        assert explored == 10 and progress(c, rid).evaluation.episodes == 0

        # An evaluation episode (episode 11): its plans have no information term.
        plan = session.plan([0.3, 0.0], evaluate=True, episode=11, wait=10)
        assert plan.evaluation and not plan.from_prior
        explore_plan = session.plan([0.3, 0.0], wait=10, objective={"information_weight": 1.0})
        assert not explore_plan.evaluation
        # The evaluation objective ignores the information weight: its objective is the
        # discounted expected reward alone (discount 1 here).
        assert plan.objective == pytest.approx(plan.expected_return, rel=1e-4, abs=1e-4)
        assert explore_plan.objective > explore_plan.expected_return
        # An evaluation plan may look farther than the robot's horizon (10 steps in this spec):
        # the request's planner override; a bad one is refused by name and plans nothing.
        longer = session.plan([0.3, 0.0], evaluate=True, episode=11, wait=10, planner={"horizon": 12})
        assert longer.actions.shape == (12, 1) and plan.actions.shape == (10, 1)
        with pytest.raises(ForayError) as refused:
            session.plan([0.3, 0.0], evaluate=True, episode=11, wait=10, planner={"horizon": 501})
        assert refused.value.code == grpc.StatusCode.INVALID_ARGUMENT
        assert "horizon" in refused.value.message and "501" in refused.value.message
        with pytest.raises(ValueError, match="planner\\['horizon'\\] is 0"):
            session.plan([0.3, 0.0], planner={"horizon": 0})
        seq = batch[-1].seq
        for k in range(5):
            session.record(11, k, [0.6, 0.0], [0.0], [0.6, 0.0], 1.0)
        session.record(12, 0, [0.6, 0.0], [0.0], [0.6, 0.0], 0.0)  # closes episode 11
        session.flush(30)
    deadline = time.monotonic() + 10
    while progress(c, rid).evaluation.episodes < 1 and time.monotonic() < deadline:
        time.sleep(0.1)
    p = progress(c, rid)
    assert p.evaluation.episodes == 1 and p.evaluation.successes == 1
    assert p.evaluation.last_return == 5.0 and p.evaluation.recent_success_rate == 1.0
    assert p.exploration.episodes == explored
    assert stored_count(forayd, rid) == seq + 6

    # Kept across a restart: the evaluation episode is still counted as one.
    forayd.restart()
    c = Client(forayd)
    p = progress(c, rid)
    assert p.evaluation.episodes == 1 and p.exploration.episodes == explored


def test_plans_add_the_value_of_where_they_end(forayd):
    # The objective's value_weight: a plan also earns the value of the states its rollouts end
    # in, the robot's own discounted returns after them regressed on the state (core/plan/value.h).
    c = Client(forayd)
    walker = spec("valued", 2, 1, min_transitions=100, every_n=100000)
    walker.objective.value_weight = 1.0
    walker.objective.terminal_value = -5.0
    robot = c.register(walker)
    rid = robot.robot.robot_id
    with RobotSession(forayd.address, rid, robot.token) as session:
        session.wait_connected(10)
        for tr in cliff(1, 12):
            session.record(tr.episode, tr.step, tr.state, tr.action, tr.next_state, tr.reward, tr.terminal)
        session.flush(30)
        c.wait_model(rid, 1)
        # Reward followed the states short of the zone, so they have value; an evaluation plan
        # (reward only, discount 1, weight 1) scores J = expected return + value beyond + the
        # terminal value times the probability of ending within the horizon (rollout.h).
        plan = session.plan([0.3, 0.0], evaluate=True, episode=13, wait=10)
        assert plan.value_beyond > 0.1, plan.value_beyond
        ended = 1.0 - plan.survival[-1]
        assert plan.objective == pytest.approx(plan.expected_return + plan.value_beyond - 5.0 * ended,
                                               rel=1e-4, abs=1e-4)
        # Weight 0 for one request: the horizon alone.
        flat = session.plan([0.3, 0.0], evaluate=True, episode=13, wait=10, objective={"value_weight": 0.0})
        assert flat.value_beyond == 0.0
        assert flat.objective == pytest.approx(flat.expected_return - 5.0 * (1.0 - flat.survival[-1]),
                                               rel=1e-4, abs=1e-4)
    # After a restart the value is fitted again to the stored transitions.
    forayd.restart()
    c = Client(forayd)
    again = c.plan(robot, [0.3, 0.0], deadline_ms=500)
    assert again.value_beyond > 0.1, again.value_beyond

    bad = spec("badly-valued", 2, 1)
    bad.objective.value_discount = 1.0
    expect_error(CODE.INVALID_ARGUMENT, "value_discount is 1", c.register, bad)
    bad = spec("badly-valued", 2, 1)
    bad.objective.value_weight = math.nan
    expect_error(CODE.INVALID_ARGUMENT, "value_weight is nan", c.register, bad)
    bad = spec("badly-valued", 2, 1)
    bad.objective.value_estimate = 7
    expect_error(CODE.INVALID_ARGUMENT, "objective.value_estimate is 7", c.register, bad)

    # The best continuation seen: never below 0 (a loss nearby does not count against a state).
    best = spec("best-valued", 2, 1, min_transitions=100, every_n=100000)
    best.objective.value_weight = 1.0
    best.objective.terminal_value = -5.0
    best.objective.value_estimate = t.VALUE_ESTIMATE_BEST
    robot = c.register(best)
    c.append(robot, cliff(1, 12))
    c.wait_model(robot.robot.robot_id, 1)
    near_edge = c.plan(robot, [0.85, 0.0], deadline_ms=500, evaluate=True)
    assert near_edge.value_beyond >= 0.0
    start = c.plan(robot, [0.3, 0.0], deadline_ms=500, evaluate=True)
    assert start.value_beyond > 0.1, start.value_beyond


def test_plans_can_take_rewards_from_where_the_robot_received_them(forayd):
    # The objective's reward_estimate NEARBY: a plan's expected reward is the rewards received
    # on arriving near each predicted state (a kernel regression refitted with every model),
    # not the model's reward output.
    c = Client(forayd)
    walker = spec("rewarded-nearby", 2, 1, min_transitions=100, every_n=100000)
    walker.objective.reward_estimate = t.REWARD_ESTIMATE_NEARBY
    robot = c.register(walker)
    rid = robot.robot.robot_id
    c.append(robot, cliff(1, 12))
    c.wait_model(rid, 1)
    # Just short of the zone [0.5, 0.8]: plans that walk in see the rewards received there.
    nearby = c.plan(robot, [0.45, 0.5], deadline_ms=500, evaluate=True)
    assert nearby.expected_return > 1.0, nearby.expected_return
    # Far past the edge no transition ever arrived: nothing nearby was rewarded.
    away = c.plan(robot, [5.0, 0.0], deadline_ms=500, evaluate=True)
    assert abs(away.expected_return) < 0.05, away.expected_return
    # A plan's override can ask for the model's reward instead: a different estimate.
    model = c.plan(robot, [0.45, 0.5], deadline_ms=500, evaluate=True,
                   objective=t.ObjectiveSettings(reward_estimate=t.REWARD_ESTIMATE_MODEL))
    assert model.expected_return != pytest.approx(nearby.expected_return, rel=1e-3)
    # After a restart the nearby reward is fitted again to the stored transitions.
    forayd.restart()
    c = Client(forayd)
    again = c.plan(robot, [0.45, 0.5], deadline_ms=500, evaluate=True)
    assert again.expected_return > 1.0, again.expected_return

    bad = spec("badly-rewarded", 2, 1)
    bad.objective.reward_estimate = 7
    expect_error(CODE.INVALID_ARGUMENT, "objective.reward_estimate is 7", c.register, bad)


def test_bad_termination_settings_are_refused_by_name(forayd):
    c = Client(forayd)
    bad = spec("badly", 2, 1)
    bad.objective.terminal_value = math.inf
    expect_error(CODE.INVALID_ARGUMENT, "terminal_value is inf", c.register, bad)
    bad = spec("badly", 2, 1)
    bad.objective.known_termination.indices.extend([0, 5])
    bad.objective.known_termination.lower.extend([0.0, 0.0])
    bad.objective.known_termination.upper.extend([1.0, 1.0])
    expect_error(CODE.INVALID_ARGUMENT, "known_termination.indices[1] is 5, the state has 2 values",
                 c.register, bad)
    bad = spec("badly", 2, 1)
    bad.objective.known_termination.indices.extend([0])
    bad.objective.known_termination.lower.extend([0.0, 1.0])
    bad.objective.known_termination.upper.extend([1.0])
    expect_error(CODE.INVALID_ARGUMENT, "known_termination has 1 indices, 2 lower and 1 upper", c.register, bad)
    listed = c.registry.ListRobots(__import__("foray.v1.registry_pb2", fromlist=["x"]).ListRobotsRequest(),
                                   metadata=c.admin)
    assert len(listed.robots) == 0  # nothing registered

    robot = c.register(spec("fine", 2, 1))
    objective = t.ObjectiveSettings(terminal_value=float("nan"))
    expect_error(CODE.INVALID_ARGUMENT, "request.objective: terminal_value is nan", c.plan, robot, [0.0, 0.0],
                 objective=objective)
    objective = t.ObjectiveSettings(known_termination=t.KnownTermination(indices=[2], lower=[0], upper=[1]))
    expect_error(CODE.INVALID_ARGUMENT, "known_termination.indices[0] is 2", c.plan, robot, [0.0, 0.0],
                 objective=objective)
    with pytest.raises(ValueError, match="unknown keys"):
        from foray_client.session import _objective
        _objective({"terminal_weight": 1.0})
