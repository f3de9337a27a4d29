"""RobotSession: the Python client of a robot PC, with numpy arrays in and out.

Same semantics as the C++ library (client/cpp/session.h): one session stream to forayd kept
open by a background thread; every recorded transition is buffered until the server
acknowledges it as durable and is resent after a reconnect (exponential backoff); plans are
requested with deadlines; act() returns the safe action when no valid plan comes in time.
Liveness: while transitions wait, the server must acknowledge progress within `ack_timeout`
seconds of the stream's welcome or of its previous acknowledgement; if it does not, the session
logs a warning, counts a stall in stats(), and re-opens the stream (which resends what waits).
stats()["healthy"] is the figure a robot's code can check.
Thread-safe: call it from the control loop while the library's thread does the I/O.

    from foray_client import RobotSession
    with RobotSession("127.0.0.1:50151", robot_id, token, safe_action="last") as session:
        session.wait_connected(10)
        decision = session.act(state, last_action, deadline=0.03, wait=0.045)
        ...apply decision.action, measure next_state...
        session.record(episode, step, state, decision.action, next_state, reward)

Foray is not a safety system: the safe action is a convenience for the control loop, not a
substitute for emergency stops and safety-rated limits on the robot.
"""

import collections
import dataclasses
import logging
import math
import os
import secrets
import threading
import time

import grpc
import numpy as np

from ._stubs import (models_pb2, models_pb2_grpc, monitoring_pb2, monitoring_pb2_grpc, registry_pb2,
                     registry_pb2_grpc, session_pb2, session_pb2_grpc, types_pb2)
from .spec import spec_from_dict

CLIENT_NAME = "foray-python/0.1"
# Metadata key carrying the robot's id on every call of a robot, so that a router in front of
# several servers (deploy/router) sends all of a robot's calls to the server holding its data.
ROBOT_HEADER = "foray-robot"


_CODES = {c.value[0]: c for c in grpc.StatusCode}
_LOG = logging.getLogger("foray_client")


class ForayError(Exception):
    """A request the server refused or could not serve; `code` is a grpc.StatusCode."""

    def __init__(self, code, message):
        code = _CODES.get(code, grpc.StatusCode.UNKNOWN) if isinstance(code, int) else code
        super().__init__(f"{message} ({code.name})")
        self.code = code
        self.message = message


@dataclasses.dataclass
class Identity:
    robot_id: str
    token: str


@dataclasses.dataclass
class Plan:
    """A planned action sequence; arrays have one row per step of the horizon."""
    actions: np.ndarray            # (H, action_dim)
    state_mean: np.ndarray         # (H, state_dim), empty rows when from_prior
    state_std: np.ndarray          # (H, state_dim)
    expected_reward: np.ndarray    # (H,)
    information_gain: np.ndarray   # (H,) nats
    survival: np.ndarray           # (H,) probability the episode has not ended by each step
    objective: float
    expected_return: float
    total_information_gain: float
    model_version: int
    from_prior: bool
    iterations: int
    compute_ms: float
    valid_until: float             # Unix seconds; do not execute after this
    evaluation: bool = False       # planned for evaluation (reward only)
    value_beyond: float = 0.0      # value of the predicted end states (objective's value_weight)

    @staticmethod
    def from_message(p):
        h = len(p.steps)
        sd = len(p.steps[0].predicted_state_mean) if h else 0
        ad = len(p.steps[0].action) if h else 0
        return Plan(
            actions=np.array([list(s.action) for s in p.steps], dtype=np.float64).reshape(h, ad),
            state_mean=np.array([list(s.predicted_state_mean) for s in p.steps], dtype=np.float64).reshape(h, sd),
            state_std=np.array([list(s.predicted_state_std) for s in p.steps], dtype=np.float64).reshape(h, sd),
            expected_reward=np.array([s.expected_reward for s in p.steps], dtype=np.float64),
            information_gain=np.array([s.information_gain for s in p.steps], dtype=np.float64),
            survival=np.array([s.survival if not p.from_prior else 1.0 for s in p.steps], dtype=np.float64),
            objective=p.objective, expected_return=p.expected_return,
            total_information_gain=p.information_gain, model_version=p.model_version,
            from_prior=p.from_prior, iterations=p.iterations, compute_ms=p.compute_ms,
            valid_until=p.valid_until.seconds + p.valid_until.nanos * 1e-9 if p.HasField("valid_until") else math.inf,
            evaluation=p.evaluation, value_beyond=p.value_beyond)


@dataclasses.dataclass
class Decision:
    action: np.ndarray        # (action_dim,)
    planned: bool             # False: the safe action
    why: str = ""             # why no plan was used, when not planned
    plan: Plan = None


def _vector(name, values, expected=None):
    v = np.asarray(values, dtype=np.float64).reshape(-1)
    if expected and v.size != expected:
        raise ValueError(f"{name} has {v.size} values, the robot's spec has {expected}")
    if not np.all(np.isfinite(v)):
        bad = int(np.flatnonzero(~np.isfinite(v))[0])
        raise ValueError(f"{name}[{bad}] is {v[bad]}; values must be finite")
    return v


def _override(name, given, message, keys, valid, requirement, convert):
    """A per-plan override `message` from a message of that type, a dict of `keys` (any subset)
    whose values pass `valid` (else ValueError naming the key, the value and `requirement`),
    each passed through `convert`, or None."""
    if given is None or isinstance(given, message):
        return given
    unknown = sorted(set(given) - set(keys))
    if unknown:
        raise ValueError(f"{name} has unknown keys {unknown}; use {list(keys)}")
    for key, value in given.items():
        if not valid(value):
            raise ValueError(f"{name}[{key!r}] is {value!r}; it must be {requirement}")
    return message(**{k: convert(v) for k, v in given.items()})


_OBJECTIVE_KEYS = ("reward_weight", "information_weight", "discount", "terminal_value", "observation_noise",
                   "value_weight")


def _objective(objective):
    """ObjectiveSettings from a message, a dict of reward_weight, information_weight, discount,
    terminal_value, observation_noise, value_weight (any subset), or None."""
    return _override("objective", objective, types_pb2.ObjectiveSettings, _OBJECTIVE_KEYS,
                     lambda v: isinstance(v, (int, float)) and math.isfinite(v), "a finite number", float)


_PLANNER_KEYS = ("horizon", "population", "elites", "iterations", "particles")


def _planner(planner):
    """PlannerSettings from a message, a dict of horizon, population, elites, iterations,
    particles (any subset, positive integers), or None."""
    return _override("planner", planner, types_pb2.PlannerSettings, _PLANNER_KEYS,
                     lambda v: isinstance(v, int) and not isinstance(v, bool) and v >= 1,
                     "a positive integer", int)


def _channel(address, credentials, initial_backoff, max_backoff):
    options = [("grpc.initial_reconnect_backoff_ms", max(1, int(initial_backoff * 1000))),
               ("grpc.max_reconnect_backoff_ms", max(1, int(max_backoff * 1000))),
               # A ping every 20 s finds a dead server within 30 s; forayd accepts pings that often.
               ("grpc.keepalive_time_ms", 20000), ("grpc.keepalive_timeout_ms", 10000),
               ("grpc.keepalive_permit_without_calls", 1)]
    if credentials is None:
        return grpc.insecure_channel(address, options=options)
    return grpc.secure_channel(address, credentials, options=options)


class RobotSession:
    """A robot's session with forayd. See the module documentation."""

    def __init__(self, address, robot_id, token, *, credentials=None, safe_action="last",
                 initial_backoff=0.1, max_backoff=5.0, max_unacknowledged=1_000_000, write_batch=512,
                 ack_timeout=15.0):
        if not address:
            raise ValueError("address is empty; give host:port")
        if not robot_id or not token:
            raise ValueError("robot_id and token are required (from registration)")
        if not 0 < initial_backoff <= max_backoff:
            raise ValueError(f"backoff: initial {initial_backoff} s, max {max_backoff} s; need 0 < initial <= max")
        if not (isinstance(ack_timeout, (int, float)) and math.isfinite(ack_timeout) and ack_timeout > 0):
            raise ValueError(f"ack_timeout is {ack_timeout!r}; give seconds > 0")
        if isinstance(safe_action, str):
            if safe_action not in ("last", "zeros"):
                raise ValueError(f"safe_action is {safe_action!r}; use 'last', 'zeros' or an array")
            self._safe = safe_action
        else:
            self._safe = _vector("safe_action", safe_action)
        self.address = address
        self.robot_id = robot_id
        self._metadata = (("authorization", f"Bearer {token}"), (ROBOT_HEADER, robot_id))
        self._initial_backoff = initial_backoff
        self._max_backoff = max_backoff
        self._max_unacked = max_unacknowledged
        self._write_batch = write_batch
        self._ack_timeout = float(ack_timeout)
        self._channel = _channel(address, credentials, initial_backoff, max_backoff)
        self._stub = session_pb2_grpc.RobotSessionStub(self._channel)
        self._monitoring = monitoring_pb2_grpc.MonitoringStub(self._channel)
        self._models = models_pb2_grpc.ModelsStub(self._channel)
        self._cv = threading.Condition()
        # Everything below is guarded by _cv.
        self._stopping = False
        self._connected = False
        self._call = None
        self._unacked = collections.deque()  # session_pb2-ready Transition messages, seq order
        self._sent = 0
        self._plan_requests = collections.deque()
        self._waiters = {}                   # request id -> [done, plan message or ForayError]
        self._next_request_id = 1
        self._next_seq = 0                   # 0 until the first welcome
        self._durable_seq = 0
        self._state_dim = 0
        self._action_dim = 0
        self._connects = 0
        self._rejected = 0
        self._safe_actions = 0
        self._last_error = ""
        self._generation = 0  # one per stream; a request generator ends when it changes
        # Liveness: since when (time.monotonic()) the server owes this client progress: the
        # stream's welcome, the last acknowledgement that advanced durable_seq, or the record()
        # that found nothing waiting, whichever is latest.
        self._waiting_since = time.monotonic()
        self._stalls = 0
        self._thread = threading.Thread(target=self._io_loop, name="foray-session", daemon=True)
        self._thread.start()
        self._watch = threading.Thread(target=self._watch_loop, name="foray-session-watch", daemon=True)
        self._watch.start()

    # --- registration -------------------------------------------------------------------------

    @staticmethod
    def register(address, admin_token, spec, credentials=None, timeout=10.0):
        """Registers a robot (admin token); `spec` is a RobotSpec or a dict in the spec-file format.
        The robot's id is chosen here (random) and sent in the foray-robot header too, so that a
        router places the robot by it."""
        if isinstance(spec, dict):
            spec = spec_from_dict(spec)
        robot_id = "r-" + secrets.token_hex(8)
        with _channel(address, credentials, 0.1, 5.0) as channel:
            stub = registry_pb2_grpc.RobotRegistryStub(channel)
            try:
                r = stub.RegisterRobot(registry_pb2.RegisterRobotRequest(spec=spec, robot_id=robot_id),
                                       timeout=timeout, metadata=(("authorization", f"Bearer {admin_token}"),
                                                                  (ROBOT_HEADER, robot_id)))
            except grpc.RpcError as e:
                raise ForayError(e.code(), e.details()) from None
        return Identity(r.robot.robot_id, r.token)

    @staticmethod
    def load_or_register(path, address, admin_token_file, spec, credentials=None):
        """The identity kept in `path` ("ROBOT_ID TOKEN"), or a new registration saved there (0600)."""
        if os.path.exists(path):
            with open(path) as f:
                robot_id, token = f.read().split()[:2]
            return Identity(robot_id, token)
        with open(admin_token_file) as f:
            admin = f.readline().strip()
        identity = RobotSession.register(address, admin, spec, credentials)
        fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
        with os.fdopen(fd, "w") as f:
            f.write(f"{identity.robot_id} {identity.token}\n")
        return identity

    # --- the control loop's side ---------------------------------------------------------------

    def wait_connected(self, timeout):
        with self._cv:
            if not self._cv.wait_for(lambda: self._connected or self._stopping, timeout) or not self._connected:
                raise ForayError(grpc.StatusCode.UNAVAILABLE,
                                 f"no session with forayd at {self.address} after {timeout} s"
                                 + (f": {self._last_error}" if self._last_error else ""))

    def record(self, episode, step, state, action, next_state, reward, terminal=False):
        """Buffers one transition and returns at once; the background thread sends it.

        terminal=True only when this step ended the episode in an irrecoverable state (the
        object was lost, the robot left its workspace or fell): the model learns to predict
        and avoid it. An episode cut by a time limit is not terminal: leave terminal False and
        record the next episode under a new episode id."""
        with self._cv:
            s = _vector("state", state, self._state_dim)
            a = _vector("action", action, self._action_dim)
            n = _vector("next_state", next_state, self._state_dim or s.size)
            if not math.isfinite(reward):
                raise ValueError(f"reward is {reward}; it must be finite")
            if len(self._unacked) >= self._max_unacked:
                raise ForayError(grpc.StatusCode.RESOURCE_EXHAUSTED,
                                 f"{len(self._unacked)} transitions wait for an acknowledgement; "
                                 f"is forayd at {self.address} reachable?")
            t = types_pb2.Transition(seq=self._next_seq, episode=int(episode), step=int(step),
                                     state=s.tolist(), action=a.tolist(), next_state=n.tolist(),
                                     reward=float(reward), terminal=bool(terminal))
            if self._next_seq:
                self._next_seq += 1
            if not self._unacked:
                self._waiting_since = time.monotonic()
            self._unacked.append(t)
            self._cv.notify_all()

    def record_many(self, episode, states, actions, next_states, rewards, first_step=0, last_is_terminal=False):
        """Buffers rows of (n, state_dim), (n, action_dim), (n, state_dim) arrays and (n,) rewards."""
        states, actions, next_states = (np.atleast_2d(np.asarray(x, dtype=np.float64))
                                        for x in (states, actions, next_states))
        rewards = np.asarray(rewards, dtype=np.float64).reshape(-1)
        n = states.shape[0]
        if not (actions.shape[0] == next_states.shape[0] == rewards.size == n):
            raise ValueError(f"rows: states {n}, actions {actions.shape[0]}, next_states "
                             f"{next_states.shape[0]}, rewards {rewards.size}; they must match")
        for i in range(n):
            self.record(episode, first_step + i, states[i], actions[i], next_states[i], rewards[i],
                        terminal=last_is_terminal and i == n - 1)

    def flush(self, timeout):
        """Waits until every recorded transition is durable on the server."""
        with self._cv:
            done = self._cv.wait_for(lambda: self._stopping or (self._next_seq and not self._unacked), timeout)
            if not done or self._unacked or not self._next_seq:
                raise ForayError(grpc.StatusCode.DEADLINE_EXCEEDED,
                                 f"{len(self._unacked)} transitions not acknowledged after {timeout} s "
                                 f"({'connected' if self._connected else 'not connected'})"
                                 + (f"; last error: {self._last_error}" if self._last_error else ""))

    def plan(self, state, previous_action=None, deadline=0.1, wait=1.0, *, evaluate=False, episode=0,
             objective=None, planner=None):
        """A Plan from `state`; the server plans for at most `deadline` s (from its arrival), this waits at most `wait` s.

        evaluate=True plans reward only (no information term) on the current model and records
        the episode (`episode`, or else the episode of the next recorded transition) as an
        evaluation episode; the server refuses it (FAILED_PRECONDITION) before the first model.
        objective overrides the robot's objective for this plan only: a dict with any of
        reward_weight, information_weight, discount, terminal_value, or an ObjectiveSettings.
        planner overrides the robot's planner settings for this plan only: a dict with any of
        horizon, population, elites, iterations, particles, or a PlannerSettings (for example
        a longer horizon for evaluation plans, which need no information term)."""
        settings = _objective(objective)
        planner_settings = _planner(planner)
        with self._cv:
            s = _vector("state", state, self._state_dim)
            prev = [] if previous_action is None else _vector("previous_action", previous_action,
                                                              self._action_dim).tolist()
            if not self._connected:
                raise ForayError(grpc.StatusCode.UNAVAILABLE, f"not connected to forayd at {self.address}"
                                 + (f" ({self._last_error})" if self._last_error else ""))
            rid = self._next_request_id
            self._next_request_id += 1
            request = types_pb2.PlanRequest(
                request_id=rid, state=s.tolist(), previous_action=prev, deadline_ms=max(1.0, deadline * 1000),
                evaluate=bool(evaluate), episode=int(episode))
            if settings is not None:
                request.objective.CopyFrom(settings)
            if planner_settings is not None:
                request.planner.CopyFrom(planner_settings)
            self._plan_requests.append(request)
            waiter = self._waiters[rid] = [False, None]
            self._cv.notify_all()
            self._cv.wait_for(lambda: waiter[0] or self._stopping, wait)
            del self._waiters[rid]
            if not waiter[0]:
                raise ForayError(grpc.StatusCode.DEADLINE_EXCEEDED, f"no plan within {wait} s")
            if isinstance(waiter[1], ForayError):
                raise waiter[1]
            return Plan.from_message(waiter[1])

    def act(self, state, previous_action, deadline, wait, *, evaluate=False, episode=0, objective=None,
            planner=None):
        """The watchdog: the first action of a plan that comes within `wait` s and is still valid,
        else the safe action. evaluate, episode, objective and planner as for plan()."""
        previous = _vector("previous_action", previous_action)
        try:
            plan = self.plan(state, previous, deadline, wait, evaluate=evaluate, episode=episode,
                             objective=objective, planner=planner)
            if plan.actions.shape[0] == 0 or plan.actions.shape[1] != previous.size:
                why = f"the plan's first step has {plan.actions.shape[1] if plan.actions.size else 0} actions"
            elif plan.valid_until < time.time():
                why = "the plan arrived after its valid_until"
            else:
                return Decision(plan.actions[0].copy(), True, "", plan)
        except ForayError as e:
            why = e.message
        with self._cv:
            self._safe_actions += 1
        if isinstance(self._safe, np.ndarray):
            action = self._safe.copy()
        elif self._safe == "zeros":
            action = np.zeros_like(previous)
        else:
            action = previous.copy()
        return Decision(action, False, why)

    def stats(self):
        """The session's figures. ack_wait_s: seconds the server has owed this client progress
        (0 when nothing waits or while disconnected); healthy: connected and ack_wait_s within
        ack_timeout; stalls: how often the stream was re-opened for lack of acknowledgements."""
        with self._cv:
            wait = self._ack_wait()
            return {"connected": self._connected, "durable_seq": self._durable_seq, "next_seq": self._next_seq,
                    "unacknowledged": len(self._unacked), "connects": self._connects,
                    "rejected": self._rejected, "safe_actions": self._safe_actions,
                    "last_error": self._last_error, "ack_wait_s": wait, "stalls": self._stalls,
                    "healthy": self._connected and wait <= self._ack_timeout}

    def _ack_wait(self):
        if not self._connected or not self._unacked:
            return 0.0
        return max(0.0, time.monotonic() - self._waiting_since)

    # --- unary helpers -------------------------------------------------------------------------

    def export_transitions(self, from_seq=0, to_seq=0, timeout=60.0):
        """The robot's stored transitions as numpy arrays: seq, episode, step (n,), state (n, sd),
        action (n, ad), next_state (n, sd), reward (n,), terminal (n,) bool."""
        rows = []
        try:
            for batch in self._monitoring.ExportTransitions(
                    monitoring_pb2.ExportTransitionsRequest(robot_id=self.robot_id, from_seq=from_seq, to_seq=to_seq),
                    metadata=self._metadata, timeout=timeout):
                rows.extend(batch.transitions)
        except grpc.RpcError as e:
            raise ForayError(e.code(), e.details()) from None
        n = len(rows)
        return {
            "seq": np.array([t.seq for t in rows], dtype=np.uint64),
            "episode": np.array([t.episode for t in rows], dtype=np.uint64),
            "step": np.array([t.step for t in rows], dtype=np.uint32),
            "state": np.array([list(t.state) for t in rows], dtype=np.float64).reshape(n, -1),
            "action": np.array([list(t.action) for t in rows], dtype=np.float64).reshape(n, -1),
            "next_state": np.array([list(t.next_state) for t in rows], dtype=np.float64).reshape(n, -1),
            "reward": np.array([t.reward for t in rows], dtype=np.float64),
            "terminal": np.array([t.terminal for t in rows], dtype=bool),
        }

    def train_now(self, wait=True, timeout=600.0):
        """Trains now; returns the TrainingReport message (None when wait is False)."""
        try:
            r = self._models.TrainNow(models_pb2.TrainNowRequest(robot_id=self.robot_id, wait=wait),
                                      metadata=self._metadata, timeout=timeout)
        except grpc.RpcError as e:
            raise ForayError(e.code(), e.details()) from None
        return r.report if r.HasField("report") else None

    # --- lifetime ------------------------------------------------------------------------------

    def close(self):
        """Ends the session. Unacknowledged transitions are dropped: flush() first to keep them."""
        with self._cv:
            self._stopping = True
            if self._call is not None:
                self._call.cancel()
            self._cv.notify_all()
        self._thread.join()
        self._watch.join()
        self._channel.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    # --- the background thread -----------------------------------------------------------------

    def _requests(self, generation):
        """The client half of one stream: hello, then plan requests and transitions as they come."""
        with self._cv:
            hello = session_pb2.Hello(robot_id=self.robot_id, last_acked_seq=self._durable_seq, client=CLIENT_NAME)
        yield session_pb2.SessionClientMessage(hello=hello)
        while True:
            with self._cv:
                self._cv.wait_for(lambda: self._stopping or self._generation != generation or (
                    self._connected and (self._plan_requests or self._sent < len(self._unacked))))
                if self._stopping or self._generation != generation:
                    return
                out = [session_pb2.SessionClientMessage(plan_request=r) for r in self._plan_requests]
                self._plan_requests.clear()
                while self._sent < len(self._unacked) and len(out) < self._write_batch:
                    out.append(session_pb2.SessionClientMessage(transition=self._unacked[self._sent]))
                    self._sent += 1
            yield from out

    def _io_loop(self):
        backoff = self._initial_backoff
        while True:
            try:
                backoff = self._one_stream(backoff)
            except Exception as e:  # noqa: BLE001 - the I/O thread must outlive any one stream
                _LOG.exception("foray session of robot %s: the I/O thread caught an error; reconnecting",
                               self.robot_id)
                with self._cv:
                    self._call, self._connected = None, False
                    self._generation += 1
                    self._last_error = f"client I/O error: {e!r}"
                    self._cv.notify_all()
                    if self._cv.wait_for(lambda: self._stopping, backoff):
                        return
            if backoff is None:
                return

    def _watch_loop(self):
        """Re-opens a stream that is connected but acknowledges nothing for ack_timeout seconds."""
        poll = min(1.0, self._ack_timeout / 4)
        with self._cv:
            while not self._cv.wait_for(lambda: self._stopping, poll):
                wait = self._ack_wait()
                if wait <= self._ack_timeout or self._call is None:
                    continue
                self._stalls += 1
                self._last_error = (f"no acknowledgement for {wait:.1f} s with {len(self._unacked)} transitions "
                                    f"waiting (ack_timeout {self._ack_timeout:g} s): re-opened the session")
                _LOG.warning("foray session of robot %s: %s", self.robot_id, self._last_error)
                self._connected = False
                self._call.cancel()
                self._cv.notify_all()

    def _one_stream(self, backoff):
        """One stream from connect to its end; returns the next backoff, None to stop."""
        with self._cv:
            if self._stopping:
                return None
            self._generation += 1
            generation = self._generation
            self._sent = 0
            connects_before = self._connects
        call = self._stub.Connect(self._requests(generation), metadata=self._metadata, wait_for_ready=True)
        with self._cv:
            self._call = call
            if self._stopping:
                call.cancel()
        error = ""
        try:
            for message in call:
                with self._cv:
                    self._on_message(message)
                    self._cv.notify_all()
        except grpc.RpcError as e:
            if e.code() != grpc.StatusCode.CANCELLED:
                error = f"session stream: {e.details()}"
        with self._cv:
            self._call = None
            self._connected = False
            self._generation += 1  # ends this stream's request generator
            self._plan_requests.clear()
            for waiter in self._waiters.values():
                if not waiter[0]:
                    waiter[0], waiter[1] = True, ForayError(grpc.StatusCode.UNAVAILABLE,
                                                            "the session stream to forayd closed")
            if error:
                self._last_error = error
            self._cv.notify_all()
            if self._connects > connects_before:
                backoff = self._initial_backoff
            if self._cv.wait_for(lambda: self._stopping, backoff):
                return None
        return min(backoff * 2, self._max_backoff)

    def _on_message(self, m):
        kind = m.WhichOneof("message")
        if kind == "welcome":
            w = m.welcome
            if len(w.spec.state):
                self._state_dim, self._action_dim = len(w.spec.state), len(w.spec.action)
            if self._next_seq == 0:
                self._next_seq = w.last_seq + 1
                for t in self._unacked:
                    t.seq = self._next_seq
                    self._next_seq += 1
            elif w.last_seq >= self._next_seq:
                self._last_error = (f"the server holds seq {w.last_seq}, beyond this client's last seq "
                                    f"{self._next_seq - 1}: does another client write as robot {self.robot_id}?")
            self._durable_seq = max(self._durable_seq, w.last_seq)
            while self._unacked and self._unacked[0].seq <= self._durable_seq:
                self._unacked.popleft()
            self._sent = 0
            self._waiting_since = time.monotonic()
            self._connected = True
            self._connects += 1
            self._last_error = ""
        elif kind == "ack":
            if m.ack.durable_seq > self._durable_seq:
                self._waiting_since = time.monotonic()
            self._durable_seq = max(self._durable_seq, m.ack.durable_seq)
            popped = 0
            while self._unacked and self._unacked[0].seq <= self._durable_seq:
                self._unacked.popleft()
                popped += 1
            self._sent = max(0, self._sent - popped)
        elif kind == "plan":
            waiter = self._waiters.get(m.plan.request_id)
            if waiter is not None:
                waiter[0], waiter[1] = True, m.plan
        elif kind == "error":
            e = m.error
            self._last_error = f"forayd: {e.message} (code {e.code})"
            if e.request_id:
                waiter = self._waiters.get(e.request_id)
                if waiter is not None:
                    waiter[0], waiter[1] = True, ForayError(e.code, e.message)
            elif e.code == 3 and e.seq:  # INVALID_ARGUMENT: the transition itself is wrong; drop it
                for i, t in enumerate(self._unacked):
                    if t.seq == e.seq:
                        del self._unacked[i]
                        if i < self._sent:
                            self._sent -= 1
                        self._rejected += 1
                        break
            elif self._call is not None:
                self._call.cancel()  # the server could not store a group: reconnect and resend
