"""Every writer honours the edit lock: `stagewise packet` takes over a stale lock, saying so."""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from stagewise.cli import main
from stagewise.files.project_file import load_project

DEMO = Path(__file__).resolve().parents[2] / "projects" / "hydrophone.stagewise.json"


def test_packet_takes_over_a_stale_lock_saying_so_and_releases_it(tmp_path: Path,
                                                                  capsys: pytest.CaptureFixture[str]) -> None:
    # Common practice, no source: a child that has exited and been reaped has no process, so a
    # lock naming it on this host is stale.
    import datetime as dt
    import socket

    from stagewise.files.lock import lock_path

    project = tmp_path / "p.stagewise.json"
    shutil.copy(DEMO, project)
    child = subprocess.Popen([sys.executable, "-c", "pass"])
    child.wait()
    moment = dt.datetime.now(dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ")
    lock_path(project).write_text(json.dumps({"program": "stagewise", "owner": "Gone Away", "host": socket.gethostname(),
                                              "pid": child.pid, "time": moment}), encoding="utf-8")
    assert main(["packet", str(project), "-o", str(tmp_path / "p.pdf"), "--by", "Quality Desk"]) == 0
    err = capsys.readouterr().err
    assert "took over the stale lock" in err and "Gone Away" in err
    assert not lock_path(project).exists()
    assert [event.what for event in load_project(project).audit][-1] == "packet"


def test_packet_waits_for_a_command_that_holds_the_lock_for_a_moment(tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                                                     capsys: pytest.CaptureFixture[str]) -> None:
    # Common practice, no source: a writer that holds a lock briefly is waited for, not raced.
    import threading

    import stagewise.report.packet as packet_module
    from stagewise.files.lock import acquire_lock, lock_path

    project = tmp_path / "p.stagewise.json"
    shutil.copy(DEMO, project)
    other_writer = acquire_lock(project, "Another Command")
    real_build = packet_module.build_packet

    def build_then_let_go(*args: object, **kwargs: object) -> object:
        result = real_build(*args, **kwargs)  # type: ignore[arg-type]
        threading.Timer(0.3, other_writer.release).start()  # the other command finishes its write
        return result

    monkeypatch.setattr(packet_module, "build_packet", build_then_let_go)
    assert main(["packet", str(project), "-o", str(tmp_path / "p.pdf"), "--by", "Quality Desk"]) == 0
    err = capsys.readouterr().err
    assert "merges it into its next save" not in err
    assert not lock_path(project).exists()
    assert load_project(project).audit[-1].what == "packet"
