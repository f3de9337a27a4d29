"""The service configuration of deploy/: forayd reads deploy/systemd/forayd.conf (a flagfile)
and serves with it; out-of-range limits are refused by name; the Kubernetes router ConfigMap
keeps the routing directives of deploy/router/router-config.sh, which the router test runs."""

import os
import re
import shutil
import subprocess
import sys
import tempfile

import pytest
import yaml

sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", "server"))
from conftest import Forayd  # noqa: E402

REPO = os.path.abspath(os.path.join(os.path.dirname(__file__), "..", ".."))


def test_forayd_serves_with_the_shipped_configuration_file():
    with tempfile.TemporaryDirectory(prefix="foray-conf-") as data:
        # The file's own listen address and data directory are for a real host; later flags win.
        server = Forayd(data, extra_args=[f"--flagfile={os.path.join(REPO, 'deploy', 'systemd', 'forayd.conf')}",
                                          "--listen=127.0.0.1:0", f"--data_dir={data}", "--http_port=0"])
        try:
            probe = subprocess.run(
                ["/usr/bin/python3", "-m", "foray_client.probe", "--address", server.address, "--wait", "10"],
                capture_output=True, text=True, timeout=30)
            assert probe.returncode == 0 and "SERVING" in probe.stdout, probe.stdout + probe.stderr
        finally:
            assert server.stop() == 0
        assert os.stat(os.path.join(data, "admin-token")).st_mode & 0o077 == 0


def test_out_of_range_limits_are_refused_by_name():
    with tempfile.TemporaryDirectory(prefix="foray-conf-") as data:
        result = subprocess.run([os.environ["FORAYD"], "--listen=127.0.0.1:0", f"--data_dir={data}",
                                 "--plan_threads=-1", "--max_message_mb=0"],
                                capture_output=True, text=True, timeout=30)
        assert result.returncode == 2
        assert "--plan_threads=-1 (0..1024)" in result.stderr and "--max_message_mb=0 (1..1024)" in result.stderr


def test_kubernetes_router_keeps_the_tested_routing_directives():
    docs = list(yaml.safe_load_all(open(os.path.join(REPO, "deploy", "k8s", "foray.yaml"))))
    config = next(d for d in docs if d["kind"] == "ConfigMap")["data"]["nginx.conf"]
    generated = subprocess.run(["bash", os.path.join(REPO, "deploy", "router", "router-config.sh"),
                                "127.0.0.1:1", tempfile.gettempdir() + "/foray-router-check", "127.0.0.1:2"],
                               capture_output=True, text=True, check=True).stdout
    directive = re.compile(r"^\s*(hash|keepalive|client_max_body_size|client_body_timeout|keepalive_requests|"
                           r"keepalive_timeout|grpc_pass|grpc_read_timeout|grpc_send_timeout|grpc_socket_keepalive)\b.*;")
    wanted = {line.strip() for line in generated.splitlines() if directive.match(line)}
    have = {line.strip() for line in config.splitlines() if directive.match(line)}
    assert wanted and wanted == have
    shards = [s for s in docs if s["kind"] == "StatefulSet"][0]
    servers = re.findall(r"server (forayd-\d+):50151 max_fails=0;", config)
    assert len(servers) == shards["spec"]["replicas"]
    assert {d["metadata"]["name"] for d in docs if d["kind"] == "Service"} >= set(servers)
    probes = shards["spec"]["template"]["spec"]["containers"][0]
    assert probes["readinessProbe"]["grpc"]["port"] == 50151 and probes["livenessProbe"]["grpc"]["port"] == 50151


@pytest.mark.skipif(os.environ.get("FORAY_SANITIZED") == "1", reason="a sanitizer build links its runtime")
def test_container_runtime_stage_has_every_shared_library_the_binaries_need():
    """The slim image installs exactly named packages; every shared library forayd and foray load
    (ldd on this build, owners by dpkg -S) must come from one of them or from the base image."""
    text = open(os.path.join(REPO, "deploy", "container", "Containerfile")).read()
    runtime = text[text.index("FROM debian:bookworm-slim"):]
    install = runtime[runtime.index("apt-get install"):runtime.index("rm -rf /var/lib/apt/lists")]
    listed = set(re.findall(r"\b(lib[a-z0-9.+-]+|zlib1g)\b", install))
    base = {"libc6", "libgcc-s1", "libstdc++6"}  # in debian:bookworm-slim
    needed = set()
    for binary in (os.environ["FORAYD"], os.environ["FORAY_CLI"]):
        for line in subprocess.run(["ldd", binary], capture_output=True, text=True, check=True).stdout.splitlines():
            parts = line.split("=>")
            if len(parts) != 2 or not parts[1].strip().startswith("/"):
                continue
            path = os.path.realpath(parts[1].split()[0])
            owner = subprocess.run(["dpkg", "-S", path], capture_output=True, text=True)
            if owner.returncode != 0:  # merged /usr: ask for the /lib spelling too
                owner = subprocess.run(["dpkg", "-S", parts[1].split()[0]], capture_output=True, text=True)
            assert owner.returncode == 0, f"no package owns {path}"
            needed.add(owner.stdout.split(":")[0])
    assert needed - base <= listed, f"missing from the runtime stage: {sorted(needed - base - listed)}"


def test_container_build_stage_configures(tmp_path):
    """The build stage's configure line (no tests, portable) works on what the stage copies."""
    text = open(os.path.join(REPO, "deploy", "container", "Containerfile")).read()
    build = text[:text.index("FROM debian:bookworm-slim")]
    src = tmp_path / "src"
    src.mkdir()
    for name in re.findall(r"^COPY (\S+) ", build, flags=re.M):
        source = os.path.join(REPO, name)
        if os.path.isdir(source):
            shutil.copytree(source, src / name)
        else:
            shutil.copy(source, src / name)
    result = subprocess.run(["cmake", "-S", str(src), "-B", str(tmp_path / "b"), "-G", "Ninja",
                             "-DCMAKE_BUILD_TYPE=Release", "-DFORAY_BUILD_TESTS=OFF"],
                            capture_output=True, text=True, timeout=120)
    assert result.returncode == 0, result.stdout + result.stderr
    assert "-DCMAKE_BUILD_TYPE=Release -DFORAY_BUILD_TESTS=OFF" in build
