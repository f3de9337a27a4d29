"""forayd serves standard gRPC health checking and reflection, and stops on a signal.

References: the gRPC health checking protocol (grpc.health.v1, status SERVING = 1) and the
server reflection protocol (grpc.reflection.v1alpha), as published in gRPC's documentation.
"""

import signal

import grpc

from foray_client import probe

FORAY_SERVICES = {
    "foray.v1.RobotRegistry",
    "foray.v1.RobotSession",
    "foray.v1.Models",
    "foray.v1.Monitoring",
}


def test_health_reports_serving(forayd):
    assert probe.wait_serving(forayd.address, wait_s=10) == "SERVING"


def test_reflection_lists_foray_and_health_services(forayd):
    with grpc.insecure_channel(forayd.address) as channel:
        names = set(probe.list_services(channel))
    assert FORAY_SERVICES <= names, names
    assert "grpc.health.v1.Health" in names


def test_unknown_service_health_is_not_found(forayd):
    with grpc.insecure_channel(forayd.address) as channel:
        try:
            probe.health(channel, service="no.such.Service")
        except grpc.RpcError as error:
            assert error.code() == grpc.StatusCode.NOT_FOUND
        else:
            raise AssertionError("health of an unknown service should be NOT_FOUND")


def test_sigterm_stops_cleanly(forayd):
    assert probe.wait_serving(forayd.address, wait_s=10) == "SERVING"
    assert forayd.stop(signal.SIGTERM) == 0
    assert "stopped" in forayd.output()


def test_sigint_stops_cleanly(forayd):
    assert probe.wait_serving(forayd.address, wait_s=10) == "SERVING"
    assert forayd.stop(signal.SIGINT) == 0
    assert "SIGINT received" in forayd.output()
