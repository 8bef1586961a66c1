"""Locks between users and after crashes: stale takeover said aloud, permissions, odd lock files.

Each test reproduces a way a lock once blocked a user for good or let two people edit one project.
"""

from __future__ import annotations

import datetime as dt
import json
import os
import socket
import stat
import subprocess
import sys
import time
from pathlib import Path

import pytest

from stagewise.cli import main
from stagewise.files.lock import DEFAULT_MAX_AGE_S, MAX_CLOCK_AHEAD_S, LockError, acquire_lock, inspect_lock, lock_path

# A one-stage project of our own choosing, and cards that add a second stage.
DOCUMENT = {
    "format": "stagewise-project", "version": 1, "title": "Lock test",
    "stages": [{"id": "div", "name": "Divider", "ports": {"in": "in", "out": "out"},
                "parts": [{"ref": "R1", "type": "R", "nodes": ["in", "out"], "value": "10k"},
                          {"ref": "R2", "type": "R", "nodes": ["out", "0"], "value": "22k"}]}],
}  # fmt: skip
CARDS = "R1 in out 4k7\nC1 out 0 10n\n"


@pytest.fixture
def project(tmp_path: Path) -> Path:
    path = tmp_path / "chain.stagewise.json"
    path.write_text(json.dumps(DOCUMENT, indent=2) + "\n", encoding="utf-8")
    return path


def _write_lock(project: Path, host: str, pid: int, moment: dt.datetime) -> None:
    document = {"program": "stagewise", "owner": "Ines Varga", "host": host, "pid": pid,
                "time": moment.strftime("%Y-%m-%dT%H:%M:%SZ")}
    lock_path(project).write_text(json.dumps(document), encoding="utf-8")


def _dead_pid() -> int:
    # Common practice, no source: a child that has exited and been reaped has no process.
    child = subprocess.Popen([sys.executable, "-c", "pass"])
    child.wait()
    return child.pid


def _age(path: Path, seconds: float) -> None:
    moment = time.time() - seconds
    os.utime(path, (moment, moment), follow_symlinks=False)


# Common practice, no source: a lock whose process is gone protects no one; the command takes it
# over and says so, instead of refusing for good.
def test_a_lock_left_by_a_killed_program_is_taken_over_with_a_line(project: Path, tmp_path: Path,
                                                                    capsys: pytest.CaptureFixture[str]) -> None:
    pid = _dead_pid()
    _write_lock(project, socket.gethostname(), pid, dt.datetime.now(dt.UTC))
    cards = tmp_path / "rc.cards"
    cards.write_text(CARDS, encoding="utf-8")
    status = main(["import-cards", str(project), str(cards), "--name", "RC", "--by", "Tomas Berg"])
    captured = capsys.readouterr()
    assert status == 0, captured.err
    notes = [line for line in captured.err.splitlines() if line]
    assert len(notes) == 1 and notes[0].startswith("stagewise: note: took over the stale lock")
    assert "Ines Varga" in notes[0] and f"process {pid} no longer runs" in notes[0]
    assert not lock_path(project).exists()


def test_a_live_lock_still_refuses_the_command(project: Path, tmp_path: Path,
                                                capsys: pytest.CaptureFixture[str]) -> None:
    _write_lock(project, socket.gethostname(), os.getppid(), dt.datetime.now(dt.UTC))
    before = project.read_bytes()
    cards = tmp_path / "rc.cards"
    cards.write_text(CARDS, encoding="utf-8")
    status = main(["import-cards", str(project), str(cards), "--name", "RC"])
    err = capsys.readouterr().err
    assert status == 2 and err.count("\n") == 1 and "Ines Varga" in err
    assert project.read_bytes() == before


@pytest.mark.parametrize("mode", [0o644, 0o664, 0o640])
def test_lock_file_gets_the_project_files_permissions(project: Path, mode: int) -> None:
    # Common practice, no source: whoever may read the project must be able to read who edits it.
    project.chmod(mode)
    with acquire_lock(project, "Tomas Berg") as lock:
        assert stat.S_IMODE(lock.path.stat().st_mode) == mode
        lock.refresh()
        assert stat.S_IMODE(lock.path.stat().st_mode) == mode


def _unreadable(monkeypatch: pytest.MonkeyPatch, path: Path) -> None:
    """Make ``path`` unreadable to this process (root reads everything, so refuse in Python too)."""
    path.chmod(0)
    original = Path.read_bytes

    def refuse(self: Path) -> bytes:
        if self == path:
            raise PermissionError(13, "Permission denied", str(self))
        return original(self)

    monkeypatch.setattr(Path, "read_bytes", refuse)


def test_a_lock_that_cannot_be_read_is_held_not_stale(project: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    _write_lock(project, "bench-pc-7", 4242, dt.datetime.now(dt.UTC))
    _age(lock_path(project), 3600)  # far past the grace for a lock being written
    _unreadable(monkeypatch, lock_path(project))
    state = inspect_lock(project)
    assert state is not None and not state.stale and "cannot be read" in state.reason
    with pytest.raises(LockError, match="cannot be read"):
        acquire_lock(project, "Tomas Berg")
    assert lock_path(project).exists()
    # Past the documented age limit, its file's age makes it stale like any other lock.
    _age(lock_path(project), DEFAULT_MAX_AGE_S + 3600)
    state = inspect_lock(project)
    assert state is not None and state.stale


def test_a_lock_that_is_a_folder_is_refused_in_one_sentence(project: Path) -> None:
    lock_path(project).mkdir()
    with pytest.raises(LockError) as caught:
        acquire_lock(project, "Tomas Berg")
    message = str(caught.value)
    assert "is a folder, not a lock file" in message and "\n" not in message
    assert lock_path(project).is_dir()


def test_a_lock_that_links_to_a_file_is_refused_and_left(project: Path, tmp_path: Path) -> None:
    target = tmp_path / "elsewhere.txt"
    target.write_text("not a lock", encoding="utf-8")
    lock_path(project).symlink_to(target)
    with pytest.raises(LockError, match="symbolic link"):
        acquire_lock(project, "Tomas Berg")
    assert lock_path(project).is_symlink() and target.read_text(encoding="utf-8") == "not a lock"


def test_a_dangling_link_as_lock_is_stale_and_taken_over(project: Path, tmp_path: Path) -> None:
    lock_path(project).symlink_to(tmp_path / "gone")
    with acquire_lock(project, "Tomas Berg") as lock:
        assert lock.took_over is not None and lock.note is not None and "does not exist" in lock.note
        assert not lock.path.is_symlink()
        assert not (tmp_path / "gone").exists()


def test_a_far_future_lock_on_another_host_goes_stale_by_its_file_age(project: Path) -> None:
    _write_lock(project, "bench-pc-7", 4242, dt.datetime(2999, 1, 1, tzinfo=dt.UTC))
    state = inspect_lock(project)
    assert state is not None and not state.stale  # its file was just written: held
    _age(lock_path(project), DEFAULT_MAX_AGE_S + 60)
    state = inspect_lock(project)
    assert state is not None and state.stale and "h old" in state.reason
    # A time a little ahead (clocks differ by seconds to minutes) is believed as written.
    _write_lock(project, "bench-pc-7", 4242, dt.datetime.now(dt.UTC) + dt.timedelta(minutes=5))
    _age(lock_path(project), DEFAULT_MAX_AGE_S + 60)
    state = inspect_lock(project)
    assert state is not None and not state.stale


def test_a_lock_whose_time_and_file_both_lie_far_ahead_is_stale(project: Path) -> None:
    _write_lock(project, "bench-pc-7", 4242, dt.datetime(2999, 1, 1, tzinfo=dt.UTC))
    _age(lock_path(project), -10 * MAX_CLOCK_AHEAD_S)
    state = inspect_lock(project)
    assert state is not None and state.stale and "ahead of this host's clock" in state.reason
    with acquire_lock(project, "Tomas Berg") as lock:
        assert lock.note is not None and "ahead" in lock.note


def test_leftover_temporaries_of_a_killed_write_are_cleaned(project: Path, tmp_path: Path) -> None:
    from stagewise.files.atomic import LEFTOVER_AGE_S
    from stagewise.files.project_file import load_project, save_project

    old_project_temporary = tmp_path / ".chain.stagewise.json.k3j9x0aa.tmp"
    old_lock_temporary = tmp_path / ".chain.stagewise.json.lock.q81mzz0b.tmp"
    fresh = tmp_path / ".chain.stagewise.json.a1b2c3d4.tmp"  # a save running right now
    foreign = tmp_path / ".chain.stagewise.json.notes.tmp"  # not a name we write
    for path in (old_project_temporary, old_lock_temporary, fresh, foreign):
        path.write_text("partial", encoding="utf-8")
    for path in (old_project_temporary, old_lock_temporary, foreign):
        _age(path, LEFTOVER_AGE_S + 60)
    acquire_lock(project, "Tomas Berg").release()
    assert not old_lock_temporary.exists()
    save_project(project, load_project(project))
    assert not old_project_temporary.exists()
    assert fresh.exists() and foreign.exists()


def test_a_project_reached_by_a_link_is_locked_beside_the_real_file(tmp_path: Path, project: Path) -> None:
    folder = tmp_path / "links"
    folder.mkdir()
    link = folder / "chain.stagewise.json"
    link.symlink_to(project)
    with acquire_lock(link, "Tomas Berg") as lock:
        assert lock.path == lock_path(project) and lock.path.parent == project.parent
        with pytest.raises(LockError):  # the same project by its other name: one lock
            acquire_lock(project, "Ines Varga")
    assert not (folder / "chain.stagewise.json.lock").exists()
