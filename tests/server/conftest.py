"""Starts a real forayd on a loopback port for a test and stops it afterwards."""

import os
import re
import signal
import subprocess
import tempfile
import time

import pytest


class Forayd:
    def __init__(self, data_dir, extra_args=()):
        self.data_dir = data_dir
        self.extra_args = list(extra_args)
        # The baseline pass of tests/run.sh runs every service test with the model's kernels
        # capped at one SIMD target (SCALAR: nothing beyond the x86-64 baseline).
        if os.environ.get("FORAY_TEST_SIMD_TARGET"):
            self.extra_args.append(f"--simd_target={os.environ['FORAY_TEST_SIMD_TARGET']}")
        self.log_path = os.path.join(data_dir, "forayd.log")
        self._start()

    def _start(self, port=0):
        self.log = open(self.log_path, "w+")
        self.process = subprocess.Popen(
            [os.environ["FORAYD"], f"--listen=127.0.0.1:{port}", f"--data_dir={self.data_dir}"]
            + self.extra_args,
            stdout=self.log, stderr=subprocess.STDOUT)
        self.port = self._wait_for_port(timeout_s=20)
        self.address = f"127.0.0.1:{self.port}"

    def restart(self):
        """Stops the server with SIGTERM and starts it again on the same data directory."""
        code = self.stop()
        self._start()
        return code

    def start_again(self):
        """Starts a stopped server again on the same data directory and the same port."""
        self._start(port=self.port)

    @property
    def admin_token(self):
        with open(os.path.join(self.data_dir, "admin-token")) as f:
            return f.read().strip()

    def _wait_for_port(self, timeout_s):
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            with open(self.log_path) as f:
                match = re.search(r"\(port (\d+)\)", f.read())
            if match:
                return int(match.group(1))
            if self.process.poll() is not None:
                break
            time.sleep(0.05)
        with open(self.log_path) as f:
            raise RuntimeError(f"forayd did not start:\n{f.read()}")

    def stop(self, sig=signal.SIGTERM, timeout_s=15):
        if self.process.poll() is None:
            self.process.send_signal(sig)
            try:
                self.process.wait(timeout=timeout_s)
            except subprocess.TimeoutExpired:
                self.process.kill()
                self.process.wait()
        self.log.close()
        report = self.output()
        if "Sanitizer" in report or "runtime error:" in report:
            # A sanitizer build's report: shown with the failing test's captured output.
            print(f"forayd log ({self.log_path}):\n{report}")
        return self.process.returncode

    def output(self):
        with open(self.log_path) as f:
            return f.read()


@pytest.fixture
def forayd():
    with tempfile.TemporaryDirectory(prefix="foray-test-") as data_dir:
        server = Forayd(data_dir)
        try:
            yield server
        finally:
            server.stop()


def tls_forayd(tmp_path, alt_names="IP:127.0.0.1"):
    """A TLS-only forayd with a self-signed certificate for 127.0.0.1 (and `alt_names`) made by
    openssl at test time; returns (server, certificate path)."""
    cert, key = tmp_path / "cert.pem", tmp_path / "key.pem"
    subprocess.run(["openssl", "req", "-x509", "-newkey", "rsa:2048", "-nodes", "-days", "1",
                    "-subj", "/CN=127.0.0.1", "-addext", f"subjectAltName={alt_names}",
                    "-keyout", str(key), "-out", str(cert)], check=True, capture_output=True)
    data = tmp_path / "data"
    data.mkdir()
    return Forayd(str(data), [f"--tls_cert={cert}", f"--tls_key={key}"]), cert
