"""The HTTP side of forayd: /metrics parsed as the Prometheus text format by
prometheus_client.parser (Debian's python3-prometheus-client), its counters checked against the
SQLite store, the JSON API, and the viewer token."""

import json
import os
import socket
import sqlite3
import tempfile
import urllib.error
import urllib.request

from prometheus_client.parser import text_string_to_metric_families

from conftest import Forayd
from test_service import Client, spec, transitions


def free_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def get(url, token=None):
    request = urllib.request.Request(url)
    if token:
        request.add_header("Authorization", f"Bearer {token}")
    with urllib.request.urlopen(request, timeout=10) as response:
        return response.status, response.headers.get("Content-Type"), response.read().decode()


def test_metrics_and_json_match_the_store():
    with tempfile.TemporaryDirectory(prefix="foray-web-") as data_dir:
        viewer = os.path.join(data_dir, "viewer-token")
        with open(viewer, "w") as f:
            f.write("viewer-secret\n")
        port = free_port()
        server = Forayd(data_dir, [f"--http_port={port}", f"--viewer_token_file={viewer}"])
        try:
            c = Client(server)
            robot = c.register(spec("measured", 2, 1, min_transitions=40, every_n=100000))
            c.append(robot, transitions(2, 1, 1, 100, episode_len=50))
            c.wait_model(robot.robot.robot_id, 1)
            c.plan(robot, [0.0, 0.0])
            base = f"http://127.0.0.1:{port}"

            try:
                get(base + "/metrics")
                raise AssertionError("/metrics without the viewer token should be refused")
            except urllib.error.HTTPError as e:
                assert e.code == 401

            status, content_type, text = get(base + "/metrics", token="viewer-secret")
            assert status == 200 and content_type.startswith("text/plain; version=0.0.4")
            samples = {}
            for family in text_string_to_metric_families(text):
                for s in family.samples:
                    if s.labels.get("robot_id") == robot.robot.robot_id:
                        samples[(s.name, s.labels.get("quantile"))] = s.value
            db = sqlite3.connect(os.path.join(data_dir, "foray.db"))
            stored = db.execute("SELECT COUNT(*) FROM transitions WHERE robot_id = ?",
                                (robot.robot.robot_id,)).fetchone()[0]
            checkpoints = db.execute("SELECT MAX(model_version) FROM checkpoints WHERE robot_id = ?",
                                     (robot.robot.robot_id,)).fetchone()[0]
            db.close()
            # The parser drops the _total suffix from a counter's family name, not its samples.
            assert samples[("foray_robot_transitions_total", None)] == stored == 100
            assert samples[("foray_robot_episodes_total", None)] == 2
            assert samples[("foray_robot_model_version", None)] == checkpoints
            assert samples[("foray_robot_plans_total", None)] == 1
            assert samples[("foray_robot_plan_latency_milliseconds", "0.5")] > 0
            assert 0 < samples[("foray_robot_coverage_ratio", None)] <= 1
            by_kind = {(s.name, s.labels["kind"]): s.value for f in text_string_to_metric_families(text)
                       for s in f.samples if "kind" in s.labels and s.labels["robot_id"] == robot.robot.robot_id}
            # Both episodes explored and ended on a terminal transition (the test data's flag).
            assert by_kind[("foray_robot_episodes_by_kind_total", "exploration")] == 2
            assert by_kind[("foray_robot_episodes_by_kind_total", "evaluation")] == 0
            assert by_kind[("foray_robot_episode_terminals_total", "exploration")] == 2
            families = {f.name: f for f in text_string_to_metric_families(text)}
            assert families["foray_planner_waiting_plans"].samples[0].value == 0  # queue depth
            assert families["foray_planner_cores"].samples[0].value >= 1

            status, content_type, body = get(base + "/api/robots?token=viewer-secret")
            robots = json.loads(body)["robots"]
            assert content_type == "application/json" and len(robots) == 1
            assert robots[0]["transitions"] == 100 and robots[0]["episodes"] == 2
            assert robots[0]["exploration"]["episodes"] == 2 and robots[0]["evaluation"]["episodes"] == 0
            assert robots[0]["last_episode"]["terminal"] is True
            assert sum(robots[0]["coverage"]["counts"]) == 100
            # What the dashboard's axes name: the spec's labels and units, the grid's ranges.
            assert robots[0]["state"] == [{"label": "x0", "unit": "m"}, {"label": "x1", "unit": "m"}]
            assert robots[0]["action"] == [{"label": "u0", "unit": "N"}]
            coverage = robots[0]["coverage"]
            assert coverage["indices"] == [0, 1] and len(coverage["lower"]) == 2
            assert all(lo < hi for lo, hi in zip(coverage["lower"], coverage["upper"]))
            assert robots[0]["success_return"] == 0 and robots[0]["control_period_s"] == 0.05

            status, _, body = get(f"{base}/api/robots/{robot.robot.robot_id}/history",
                                  token="viewer-secret")
            history = json.loads(body)
            assert [e["episode"] for e in history["episodes"]] == [1, 2]
            assert [e["steps"] for e in history["episodes"]] == [50, 50]
            assert [e["evaluation"] for e in history["episodes"]] == [False, False]
            assert [t["model_version"] for t in history["trainings"]] == [1]
            # Each episode's final state is its last transition's next_state.
            sent = transitions(2, 1, 1, 100, episode_len=50)
            for e in history["episodes"]:
                assert e["final_state"] == list(sent[e["episode"] * 50 - 1].next_state)
                assert e["ended_at"] > 1.7e9 and e["terminal"] is True
            training = history["trainings"][0]
            assert training["transitions"] == 100 and training["training_seconds"] > 0
            assert 0 <= training["within_1sigma"] <= training["within_2sigma"] <= 1
            assert training["finished_at"] > 1.7e9

            # The viewer token also reads progress over gRPC, and nothing else.
            from foray.v1 import monitoring_pb2 as mon, monitoring_pb2_grpc, session_pb2 as ses
            import grpc
            viewer_md = [("authorization", "Bearer viewer-secret")]
            progress = monitoring_pb2_grpc.MonitoringStub(c.channel).GetProgress(
                mon.GetProgressRequest(), metadata=viewer_md)
            assert [p.robot_id for p in progress.robots] == [robot.robot.robot_id]
            try:
                c.session.AppendTransitions(ses.AppendTransitionsRequest(
                    robot_id=robot.robot.robot_id, transitions=transitions(2, 1, 101, 1)),
                    metadata=viewer_md)
                raise AssertionError("the viewer token must not write transitions")
            except grpc.RpcError as e:
                assert e.code() == grpc.StatusCode.UNAUTHENTICATED

            status, content_type, page = get(base + "/?token=viewer-secret")
            assert content_type.startswith("text/html") and "Foray · learning progress" in page
            assert "not a safety system" in page
        finally:
            assert server.stop() == 0
