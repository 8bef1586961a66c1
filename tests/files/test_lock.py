"""Edit locks: NAME.stagewise.json.lock with owner, host, pid and time; stale-lock detection."""

from __future__ import annotations

import datetime as dt
import json
import os
import socket
import subprocess
import sys
import time
from pathlib import Path

import pytest

from stagewise.files.lock import (
    UNREADABLE_GRACE_S,
    LockError,
    acquire_lock,
    inspect_lock,
    lock_path,
    release_lock,
)


@pytest.fixture
def project(tmp_path: Path) -> Path:
    path = tmp_path / "chain.stagewise.json"
    path.write_text("{}", encoding="utf-8")
    return path


def _write_lock(project: Path, owner: str, host: str, pid: int, age_s: float = 0.0) -> None:
    moment = dt.datetime.now(dt.UTC) - dt.timedelta(seconds=age_s)
    document = {"program": "stagewise", "owner": owner, "host": host, "pid": pid,
                "time": moment.strftime("%Y-%m-%dT%H:%M:%SZ")}
    lock_path(project).write_text(json.dumps(document), encoding="utf-8")


def _dead_pid() -> int:
    # Common practice, no source: a child that has exited and been reaped has no process.
    child = subprocess.Popen([sys.executable, "-c", "pass"])
    child.wait()
    return child.pid


def test_lock_file_name_and_content(project: Path) -> None:
    lock = acquire_lock(project, "Mara Lind")
    path = lock_path(project)
    assert path.name == "chain.stagewise.json.lock"
    document = json.loads(path.read_text(encoding="utf-8"))
    assert document["owner"] == "Mara Lind"
    assert document["host"] == socket.gethostname()
    assert document["pid"] == os.getpid()
    taken = dt.datetime.fromisoformat(document["time"].replace("Z", "+00:00"))
    assert abs((dt.datetime.now(dt.UTC) - taken).total_seconds()) < 5
    state = inspect_lock(project)
    assert state is not None and not state.stale and state.mine
    lock.release()
    assert not path.exists()
    assert inspect_lock(project) is None


def test_no_lock_means_none(project: Path) -> None:
    assert inspect_lock(project) is None


def test_a_live_holder_is_refused_with_who_where_and_since(project: Path) -> None:
    # The parent of this test process runs, on this host.
    _write_lock(project, "Piet Claes", socket.gethostname(), os.getppid())
    before = lock_path(project).read_bytes()
    with pytest.raises(LockError) as caught:
        acquire_lock(project, "Mara Lind")
    message = str(caught.value)
    assert "Piet Claes" in message and socket.gethostname() in message and str(os.getppid()) in message
    assert "since" in message
    assert lock_path(project).read_bytes() == before
    assert caught.value.state is not None and not caught.value.state.stale


def test_a_dead_process_on_this_host_makes_the_lock_stale(project: Path) -> None:
    pid = _dead_pid()
    _write_lock(project, "Piet Claes", socket.gethostname(), pid)
    state = inspect_lock(project)
    assert state is not None and state.stale and f"process {pid} no longer runs" in state.reason
    with acquire_lock(project, "Mara Lind") as lock:
        assert json.loads(lock_path(project).read_text(encoding="utf-8"))["owner"] == "Mara Lind"
        assert lock.info.pid == os.getpid()
    assert not lock_path(project).exists()


def test_stale_lock_is_not_taken_when_asked_not_to(project: Path) -> None:
    _write_lock(project, "Piet Claes", socket.gethostname(), _dead_pid())
    with pytest.raises(LockError, match="stale"):
        acquire_lock(project, "Mara Lind", take_stale=False)


def test_another_host_is_trusted_until_the_age_limit(project: Path) -> None:
    _write_lock(project, "Piet Claes", "bench-pc-7", 4242, age_s=3600)
    state = inspect_lock(project, max_age_s=2 * 3600)
    assert state is not None and not state.stale
    with pytest.raises(LockError, match="bench-pc-7"):
        acquire_lock(project, "Mara Lind", max_age_s=2 * 3600)
    state = inspect_lock(project, max_age_s=1800)
    assert state is not None and state.stale and "limit" in state.reason
    lock = acquire_lock(project, "Mara Lind", max_age_s=1800)
    release_lock(lock)


def test_unreadable_lock_is_left_alone_while_fresh_then_stale(project: Path) -> None:
    path = lock_path(project)
    path.write_text("{not json", encoding="utf-8")
    state = inspect_lock(project)
    assert state is not None and state.info is None and not state.stale
    with pytest.raises(LockError):
        acquire_lock(project, "Mara Lind")
    old = time.time() - 10 * UNREADABLE_GRACE_S
    os.utime(path, (old, old))
    state = inspect_lock(project)
    assert state is not None and state.stale
    acquire_lock(project, "Mara Lind").release()


def test_release_leaves_a_lock_someone_else_took_over(project: Path) -> None:
    lock = acquire_lock(project, "Mara Lind")
    _write_lock(project, "Piet Claes", "bench-pc-7", 4242)
    lock.release()
    assert json.loads(lock_path(project).read_text(encoding="utf-8"))["owner"] == "Piet Claes"
    with pytest.raises(LockError, match="released"):
        lock.refresh()


def test_refresh_refuses_a_lock_rewritten_by_someone_else(project: Path) -> None:
    lock = acquire_lock(project, "Mara Lind")
    _write_lock(project, "Mara Lind", socket.gethostname(), os.getpid(), age_s=7200)
    with pytest.raises(LockError, match="no longer ours"):
        lock.refresh()
    lock.release()


def test_refresh_of_a_held_lock(project: Path) -> None:
    lock = acquire_lock(project, "Mara Lind")
    first = lock.info.time
    time.sleep(1.1)
    lock.refresh()
    assert lock.info.time != first
    assert json.loads(lock_path(project).read_text(encoding="utf-8"))["time"] == lock.info.time
    lock.release()


def test_second_acquire_in_the_same_process_is_refused(project: Path) -> None:
    with acquire_lock(project, "Mara Lind"), pytest.raises(LockError, match="this process"):
        acquire_lock(project, "Mara Lind")


@pytest.mark.skipif(hasattr(os, "geteuid") and os.geteuid() == 0, reason="root writes anywhere")
def test_unwritable_folder_gives_a_lock_error(tmp_path: Path) -> None:
    folder = tmp_path / "ro"
    folder.mkdir()
    project = folder / "p.stagewise.json"
    project.write_text("{}", encoding="utf-8")
    folder.chmod(0o500)
    try:
        with pytest.raises(LockError, match="cannot be written"):
            acquire_lock(project, "Mara Lind")
    finally:
        folder.chmod(0o700)
