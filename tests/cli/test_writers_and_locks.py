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


def _killed_program_lock(project: Path) -> None:
    """The lock a killed desktop program leaves: its process is gone on this host."""
    import datetime as dt
    import socket

    from stagewise.files.lock import lock_path

    child = subprocess.Popen([sys.executable, "-c", "pass"])
    child.wait()
    moment = dt.datetime.now(dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ")
    lock_path(project).write_text(json.dumps({"program": "stagewise", "owner": "Gone Away", "host": socket.gethostname(),
                                              "pid": child.pid, "time": moment}), encoding="utf-8")


@pytest.mark.parametrize("command", ["import-cards", "measure", "sign", "merge"])
def test_every_writer_takes_over_the_lock_of_a_killed_program(tmp_path: Path, capsys: pytest.CaptureFixture[str],
                                                              command: str) -> None:
    # Regression: after the program was killed, import-cards refused for good ("process … no
    # longer runs on this host, so it is stale; close it there"). Common practice, no source: a
    # lock whose process is gone on this host is stale and is taken over with a line saying so.
    from stagewise.files.lock import lock_path

    sample = Path(__file__).resolve().parents[1] / "ui" / "sample.stagewise.json"
    project = tmp_path / "p.stagewise.json"
    shutil.copy(sample, project)
    arguments: list[str]
    if command == "import-cards":
        cards = tmp_path / "cards.txt"
        cards.write_text("R1 in out 2k2\nC1 out 0 47n\n", encoding="utf-8")
        arguments = ["import-cards", str(project), str(cards), "--name", "Extra RC", "--in", "in", "--out", "out"]
    elif command == "measure":
        data = tmp_path / "board.csv"
        data.write_text("f_hz,mag_db,phase_deg\n100,0,-1\n1000,-0.5,-9\n", encoding="utf-8")
        arguments = ["measure", str(project), str(data), "--stage", "rc"]
    elif command == "sign":
        arguments = ["sign", str(project), "--stage", "rc", "--verdict", "rework", "--note", "Raise R1."]
    else:  # the project is the merge's output, as a git merge driver writes %A
        arguments = ["merge", str(sample), str(sample), str(sample), "-o", str(project)]
    _killed_program_lock(project)
    assert main([*arguments, "--by", "Mara Lind"]) == 0, capsys.readouterr().err
    err = capsys.readouterr().err
    assert "took over the stale lock" in err and "Gone Away" in err, err
    assert not lock_path(project).exists()
    if command != "merge":
        assert load_project(project).audit[-1].who == "Mara Lind"
