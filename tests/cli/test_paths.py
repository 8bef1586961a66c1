"""Paths: a symlinked project is written through its link; the packet never overwrites the project."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import pytest

from stagewise.cli import main
from stagewise.files.project_file import load_project

DEMO = Path(__file__).resolve().parents[2] / "projects" / "greenhouse.stagewise.json"


def _one_sentence(err: str) -> str:
    assert err.endswith("\n") and err.count("\n") == 1, f"not one line: {err!r}"
    return err


# Common practice, no source: writing through a symbolic link changes the file it points to
# and leaves the link in place, as editors and version-control checkouts expect.
def test_packet_on_a_symlinked_project_writes_through_the_link(tmp_path: Path,
                                                               capsys: pytest.CaptureFixture[str]) -> None:
    real_folder, link_folder = tmp_path / "archive", tmp_path / "work"
    real_folder.mkdir()
    link_folder.mkdir()
    real = real_folder / "greenhouse.stagewise.json"
    shutil.copyfile(DEMO, real)
    link = link_folder / "greenhouse.stagewise.json"
    link.symlink_to(real)
    events_before = len(load_project(real).audit)
    status = main(["packet", str(link), "-o", str(tmp_path / "review.pdf"), "--by", "Tomas Berg"])
    assert status == 0, capsys.readouterr().err
    assert link.is_symlink() and link.resolve() == real
    assert len(load_project(real).audit) == events_before + 1
    assert load_project(real).audit[-1].what == "packet"
    assert (real_folder / "greenhouse.stagewise.json.bak").is_file()
    assert sorted(path.name for path in link_folder.iterdir()) == ["greenhouse.stagewise.json"]


@pytest.mark.parametrize("companion", ["", ".bak", ".lock"])
def test_packet_refuses_an_output_that_is_the_project_or_its_backup(tmp_path: Path, companion: str,
                                                                    capsys: pytest.CaptureFixture[str]) -> None:
    project = tmp_path / "greenhouse.stagewise.json"
    shutil.copyfile(DEMO, project)
    (tmp_path / "greenhouse.stagewise.json.bak").write_bytes(DEMO.read_bytes())
    before = {path.name: path.read_bytes() for path in tmp_path.iterdir()}
    status = main(["packet", str(project), "-o", str(project) + companion])
    err = _one_sentence(capsys.readouterr().err)
    assert status == 2 and "is the project file" in err
    assert {path.name: path.read_bytes() for path in tmp_path.iterdir()} == before


def test_packet_refuses_the_project_by_another_name(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    project = tmp_path / "chain.pdf"  # a project file that happens to end in .pdf
    shutil.copyfile(DEMO, project)
    alias = tmp_path / "alias.pdf"
    alias.symlink_to(project)
    before = project.read_bytes()
    for output in (project, alias):
        status = main(["packet", str(project), "-o", str(output)])
        assert status == 2 and "is the project file" in _one_sentence(capsys.readouterr().err)
    assert project.read_bytes() == before
    json.loads(before)


@pytest.mark.parametrize("kind", ["device", "fifo"])
def test_a_non_regular_cards_file_is_refused_before_reading_and_without_the_lock(
        tmp_path: Path, kind: str, capsys: pytest.CaptureFixture[str]) -> None:
    # Common practice, no source: /dev/zero gives bytes without end and a FIFO with no writer
    # blocks its reader forever; neither is a file to import.
    import os

    from stagewise.files.lock import lock_path

    project = tmp_path / "greenhouse.stagewise.json"
    shutil.copyfile(DEMO, project)
    if kind == "device":
        cards = Path("/dev/zero")
    else:
        cards = tmp_path / "cards.fifo"
        os.mkfifo(cards)
    before = project.read_bytes()
    status = main(["import-cards", str(project), str(cards), "--name", "From a pipe"])
    err = _one_sentence(capsys.readouterr().err)
    assert status == 2 and "not a regular file" in err
    assert project.read_bytes() == before and not lock_path(project).exists()


def test_a_fifo_as_project_file_is_refused(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    import os

    fifo = tmp_path / "pipe.stagewise.json"
    os.mkfifo(fifo)
    status = main(["check", str(fifo)])
    assert status == 2 and "not a regular file" in _one_sentence(capsys.readouterr().err)


def test_packet_removes_the_temporary_pdf_a_killed_packet_left(tmp_path: Path,
                                                              capsys: pytest.CaptureFixture[str]) -> None:
    import os
    import time

    from stagewise.files.atomic import LEFTOVER_AGE_S

    project = tmp_path / "greenhouse.stagewise.json"
    shutil.copyfile(DEMO, project)
    leftover = tmp_path / ".review.pdf.x8k2m1qa.tmp"
    leftover.write_bytes(b"%PDF-1.4 half written")
    old = time.time() - LEFTOVER_AGE_S - 60
    os.utime(leftover, (old, old))
    status = main(["packet", str(project), "-o", str(tmp_path / "review.pdf"), "--by", "Tomas Berg"])
    assert status == 0, capsys.readouterr().err
    assert not leftover.exists() and (tmp_path / "review.pdf").is_file()
