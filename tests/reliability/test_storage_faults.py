"""Storage faults against a real forayd: a full disk (the --max_db_mb limit, which fails SQLite
writes exactly as a full disk does), a corrupt or truncated database file, and a checkpoint that
does not decode. The server says what is wrong, acknowledges nothing it could not store, and
keeps serving what it can."""

import os
import signal
import sqlite3
import subprocess
import sys
import tempfile

import grpc
import pytest

sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", "server"))
from conftest import Forayd, forayd  # noqa: F401,E402
from test_service import Client, spec, transitions  # noqa: E402

from foray.v1 import models_pb2, models_pb2_grpc  # noqa: E402

CODE = grpc.StatusCode


def count(data_dir):
    db = sqlite3.connect(os.path.join(data_dir, "foray.db"))
    try:
        return db.execute("SELECT COUNT(*), COALESCE(MAX(seq), 0) FROM transitions").fetchone()
    finally:
        db.close()


def test_a_full_disk_refuses_what_it_cannot_store_and_keeps_serving():
    with tempfile.TemporaryDirectory(prefix="foray-full-") as data:
        server = Forayd(data, extra_args=["--max_db_mb=1"])
        try:
            c = Client(server)
            robot = c.register(spec("filler", 8, 2, min_transitions=10 ** 6))
            durable, refused, seq = 0, None, 1
            while seq < 200_000:  # bounded: 1 MiB holds a few thousand of these
                try:
                    durable = c.append(robot, transitions(8, 2, seq, 500)).durable_seq
                    seq += 500
                except grpc.RpcError as e:
                    refused = e
                    break
            assert refused is not None, "the size limit was never reached"
            assert refused.code() == CODE.RESOURCE_EXHAUSTED
            assert "no space left" in refused.details() and "nothing of this write was stored" in refused.details()
            # Exactly what was acknowledged is stored; nothing of the refused batch.
            assert count(data) == (durable, durable)
            # Reads and plans go on; a later write is refused the same way, not half-done.
            assert c.get(robot.robot.robot_id).last_seq == durable
            assert c.plan(robot, [0.0] * 8).steps
            with pytest.raises(grpc.RpcError) as again:
                c.append(robot, transitions(8, 2, durable + 1, 500))
            assert again.value.code() == CODE.RESOURCE_EXHAUSTED
            assert count(data) == (durable, durable)
        finally:
            server.stop()


@pytest.mark.parametrize("damage", ["garbage", "truncated"])
def test_a_damaged_database_is_reported_by_name(damage):
    with tempfile.TemporaryDirectory(prefix="foray-damaged-") as data:
        path = os.path.join(data, "foray.db")
        if damage == "garbage":
            with open(path, "wb") as f:
                f.write(b"these bytes are not a database " * 100)
        else:
            server = Forayd(data)
            c = Client(server)
            robot = c.register(spec("victim", 2, 1))
            c.append(robot, transitions(2, 1, 1, 2000))
            server.stop()
            size = os.path.getsize(path)
            with open(path, "r+b") as f:
                f.truncate(size // 3)
        result = subprocess.run([os.environ["FORAYD"], "--listen=127.0.0.1:0", f"--data_dir={data}"],
                                capture_output=True, text=True, timeout=60)
        assert result.returncode == 2, result.stderr
        assert "store:" in result.stderr and ("not a database" in result.stderr or "malformed" in result.stderr), \
            result.stderr


def test_an_unreadable_checkpoint_is_skipped_and_the_server_serves_the_one_before(forayd):  # noqa: F811
    c = Client(forayd)
    robot = c.register(spec("damaged-model", 2, 1, min_transitions=40, every_n=100000))
    rid = robot.robot.robot_id
    auth = [("authorization", f"Bearer {robot.token}")]
    models = models_pb2_grpc.ModelsStub(c.channel)
    c.append(robot, transitions(2, 1, 1, 100))
    c.wait_model(rid, 1)
    models.TrainNow(models_pb2.TrainNowRequest(robot_id=rid, wait=True), metadata=auth)
    assert c.get(rid).model_version == 2
    forayd.stop()
    db = sqlite3.connect(os.path.join(forayd.data_dir, "foray.db"))
    with db:
        db.execute("UPDATE checkpoints SET model = x'0badf00d' WHERE robot_id = ? AND model_version = 2", (rid,))
    db.close()

    forayd.start_again()
    assert "checkpoint of model version 2 is unreadable" in forayd.output()
    assert c.get(rid).model_version == 1  # the one before it serves
    assert c.plan(robot, [0.1, 0.2]).model_version == 1
    # Training goes on above every stored version, readable or not.
    report = models.TrainNow(models_pb2.TrainNowRequest(robot_id=rid, wait=True), metadata=auth).report
    assert report.model_version == 3 and c.get(rid).model_version == 3


def test_a_read_only_data_directory_is_reported_by_name(tmp_path):
    """A data directory on a read-only mount (a read-only bind mount of a real one: as root,
    file permissions alone would not stop a write)."""
    data, view = tmp_path / "data", tmp_path / "view"
    data.mkdir()
    view.mkdir()
    server = Forayd(str(data))
    c = Client(server)
    c.append(c.register(spec("kept", 2, 1)), transitions(2, 1, 1, 20))
    server.stop()
    if subprocess.run(["mount", "--bind", str(data), str(view)], capture_output=True).returncode != 0:
        pytest.skip("no permission to bind-mount here")
    try:
        if subprocess.run(["mount", "-o", "remount,ro,bind", str(view)], capture_output=True).returncode != 0:
            pytest.skip("no permission to remount read-only here")
        result = subprocess.run([os.environ["FORAYD"], "--listen=127.0.0.1:0", f"--data_dir={view}"],
                                capture_output=True, text=True, timeout=60)
        assert result.returncode == 2
        assert f'the data directory "{view}" is not writable (Read-only file system)' in result.stderr, result.stderr
    finally:
        subprocess.run(["umount", str(view)], capture_output=True)
    assert count(str(data)) == (20, 20)  # the data is untouched


def test_a_disk_that_turns_read_only_while_serving(tmp_path):
    """The file system under a running server turns read-only, as ext4 does after a disk error
    (errors=remount-ro; triggered here through ext4's trigger_fs_error on a loop-mounted image):
    writes are refused with a clear error and acknowledge nothing, reads and plans go on, and the
    server still stops cleanly."""
    image, mnt = tmp_path / "disk.img", tmp_path / "mnt"
    mnt.mkdir()
    with open(image, "wb") as f:
        f.truncate(64 * 1024 * 1024)
    if subprocess.run(["mkfs.ext4", "-q", "-F", str(image)], capture_output=True).returncode != 0:
        pytest.skip("mkfs.ext4 is not available here")
    if subprocess.run(["mount", "-o", "loop,errors=remount-ro", str(image), str(mnt)],
                      capture_output=True).returncode != 0:
        pytest.skip("no permission to loop-mount here")
    server = None
    try:
        device = os.path.basename(subprocess.run(["findmnt", "-n", "-o", "SOURCE", str(mnt)],
                                                 capture_output=True, text=True).stdout.strip())
        trigger = f"/sys/fs/ext4/{device}/trigger_fs_error"
        if not os.path.exists(trigger):
            pytest.skip("ext4's trigger_fs_error is not available here")
        data = mnt / "foray-data"
        data.mkdir()
        server = Forayd(str(data))
        c = Client(server)
        robot = c.register(spec("keeper", 2, 1, min_transitions=10 ** 6))
        assert c.append(robot, transitions(2, 1, 1, 20)).durable_seq == 20
        with open(trigger, "w") as f:
            f.write("foray storage-fault test\n")
        options = subprocess.run(["findmnt", "-n", "-o", "OPTIONS", str(mnt)], capture_output=True,
                                 text=True).stdout
        assert "emergency_ro" in options or options.startswith("ro"), options
        with pytest.raises(grpc.RpcError) as refused:
            c.append(robot, transitions(2, 1, 21, 20))
        print(f"\nwrite after the disk turned read-only: {refused.value.code()} {refused.value.details()}")
        assert "nothing of this write was stored" in refused.value.details(), refused.value.details()
        assert "read-only" in refused.value.details().lower() or "readonly" in refused.value.details().lower()
        # Reads and plans go on; nothing beyond what was acknowledged.
        assert c.get(robot.robot.robot_id).last_seq == 20
        assert c.plan(robot, [0.0, 0.0]).steps
        code = server.stop()
        server = None
        assert code == 0, code
        assert count(str(data)) == (20, 20)
    finally:
        if server is not None:
            server.stop()
        subprocess.run(["umount", str(mnt)], capture_output=True)
