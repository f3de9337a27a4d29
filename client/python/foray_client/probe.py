"""Health and reflection probe for a Foray server, using only grpcio.

The standard gRPC health (grpc.health.v1) and reflection (grpc.reflection.v1alpha) messages
are small, so they are encoded and decoded here directly on the protobuf wire format; no
generated stubs are needed.

    /usr/bin/python3 -m foray_client.probe --address 127.0.0.1:50151 --wait 30
"""

import argparse
import sys
import time

import grpc

HEALTH_CHECK = "/grpc.health.v1.Health/Check"
REFLECTION_INFO = "/grpc.reflection.v1alpha.ServerReflection/ServerReflectionInfo"
SERVING_STATUS = {0: "UNKNOWN", 1: "SERVING", 2: "NOT_SERVING", 3: "SERVICE_UNKNOWN"}


def _varint(value):
    out = bytearray()
    while True:
        byte = value & 0x7F
        value >>= 7
        if value:
            out.append(byte | 0x80)
        else:
            out.append(byte)
            return bytes(out)


def _fields(data):
    """Yields (field number, wire type, value) of a protobuf message."""
    pos = 0
    while pos < len(data):
        key, pos = _read_varint(data, pos)
        number, wire = key >> 3, key & 7
        if wire == 0:
            value, pos = _read_varint(data, pos)
        elif wire == 2:
            length, pos = _read_varint(data, pos)
            value, pos = data[pos:pos + length], pos + length
        elif wire == 1:
            value, pos = data[pos:pos + 8], pos + 8
        elif wire == 5:
            value, pos = data[pos:pos + 4], pos + 4
        else:
            raise ValueError(f"unsupported wire type {wire}")
        yield number, wire, value


def _read_varint(data, pos):
    result, shift = 0, 0
    while True:
        byte = data[pos]
        pos += 1
        result |= (byte & 0x7F) << shift
        if not byte & 0x80:
            return result, pos
        shift += 7


def health(channel, service="", timeout=5.0):
    """Returns the serving status name of `service` ('' is the whole server)."""
    encoded = service.encode()
    request = (b"\x0a" + _varint(len(encoded)) + encoded) if encoded else b""
    call = channel.unary_unary(HEALTH_CHECK)
    reply = call(request, timeout=timeout)
    status = 0
    for number, _, value in _fields(reply):
        if number == 1:
            status = value
    return SERVING_STATUS.get(status, str(status))


def list_services(channel, timeout=5.0):
    """Returns the fully qualified service names the server's reflection lists."""
    request = b"\x3a\x00"  # ServerReflectionRequest.list_services = ""
    call = channel.stream_stream(REFLECTION_INFO)
    names = []
    for reply in call(iter([request]), timeout=timeout):
        for number, _, value in _fields(reply):
            if number == 6:  # list_services_response
                for inner_number, _, service in _fields(value):
                    if inner_number == 1:
                        for name_number, _, name in _fields(service):
                            if name_number == 1:
                                names.append(name.decode())
    return sorted(names)


def wait_serving(address, wait_s):
    """Polls health until SERVING or `wait_s` seconds pass; returns the last status."""
    deadline = time.monotonic() + wait_s
    status = "UNREACHABLE"
    with grpc.insecure_channel(address) as channel:
        while True:
            try:
                status = health(channel, timeout=2.0)
            except grpc.RpcError as error:
                status = f"UNREACHABLE ({error.code().name})"
            if status == "SERVING" or time.monotonic() >= deadline:
                return status
            time.sleep(0.2)


def main(argv=None):
    parser = argparse.ArgumentParser(description="Check a Foray server's health and services.")
    parser.add_argument("--address", default="127.0.0.1:50151", help="host:port of forayd")
    parser.add_argument("--wait", type=float, default=0.0,
                        help="seconds to keep trying until the server reports SERVING")
    parser.add_argument("--services", action="store_true",
                        help="also list the services reflection reports")
    args = parser.parse_args(argv)
    status = wait_serving(args.address, args.wait)
    print(f"{args.address}: {status}")
    if status != "SERVING":
        return 1
    if args.services:
        with grpc.insecure_channel(args.address) as channel:
            for name in list_services(channel):
                print(name)
    return 0


if __name__ == "__main__":
    sys.exit(main())
