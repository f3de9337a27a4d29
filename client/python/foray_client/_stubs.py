"""The generated foray.v1 modules (messages and gRPC stubs).

An installed package carries them (setup.py generates them from proto/ when it builds). From
the source tree they are the ones CMake generates under build/python; this module finds them
there when they are not importable yet.
"""

import os
import sys


def _import():
    try:
        from foray.v1 import (models_pb2, models_pb2_grpc, monitoring_pb2, monitoring_pb2_grpc,
                              registry_pb2, registry_pb2_grpc, session_pb2, session_pb2_grpc,
                              types_pb2)
    except ImportError:
        repo = os.path.dirname(os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__)))))
        candidate = os.path.join(repo, "build", "python")
        if not os.path.isdir(os.path.join(candidate, "foray", "v1")):
            raise ImportError(
                "foray_client needs the generated foray.v1 modules: install the package "
                "(/usr/bin/python3 -m pip install --no-deps --no-build-isolation ./client/python) or "
                "build the project (cmake --build build) and use it from the source tree") from None
        sys.path.append(candidate)
        from foray.v1 import (models_pb2, models_pb2_grpc, monitoring_pb2, monitoring_pb2_grpc,
                              registry_pb2, registry_pb2_grpc, session_pb2, session_pb2_grpc,
                              types_pb2)
    return (models_pb2, models_pb2_grpc, monitoring_pb2, monitoring_pb2_grpc, registry_pb2,
            registry_pb2_grpc, session_pb2, session_pb2_grpc, types_pb2)


(models_pb2, models_pb2_grpc, monitoring_pb2, monitoring_pb2_grpc, registry_pb2, registry_pb2_grpc,
 session_pb2, session_pb2_grpc, types_pb2) = _import()
