"""Builds the foray_client package. The foray.v1 messages and stubs are generated from the
repository's proto/ at build time with Debian's protoc and grpc_python_plugin:

    /usr/bin/python3 -m pip install --no-deps --no-build-isolation ./client/python
"""

import os
import shutil
import subprocess

from setuptools import setup
from setuptools.command.build_py import build_py

HERE = os.path.dirname(os.path.abspath(__file__))
PROTO_ROOT = os.path.join(HERE, "..", "..", "proto")
PROTOS = ["types", "registry", "session", "models", "monitoring"]


class BuildWithStubs(build_py):
    def run(self):
        super().run()
        plugin = shutil.which("grpc_python_plugin") or "/usr/bin/grpc_python_plugin"
        protoc = shutil.which("protoc") or "/usr/bin/protoc"
        out = self.build_lib
        os.makedirs(os.path.join(out, "foray", "v1"), exist_ok=True)
        subprocess.run(
            [protoc, f"--proto_path={PROTO_ROOT}", f"--python_out={out}", f"--grpc_python_out={out}",
             f"--plugin=protoc-gen-grpc_python={plugin}"]
            + [os.path.join(PROTO_ROOT, "foray", "v1", f"{name}.proto") for name in PROTOS],
            check=True)
        for package in ("foray", os.path.join("foray", "v1")):
            open(os.path.join(out, package, "__init__.py"), "a").close()


setup(
    name="foray-client",
    version="0.1.0",
    description="Python client of the Foray planning service (robot sessions, plans, exports)",
    license="MIT",
    packages=["foray_client"],
    python_requires=">=3.9",
    install_requires=["grpcio", "protobuf", "numpy"],
    cmdclass={"build_py": BuildWithStubs},
)
