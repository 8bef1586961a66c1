"""`stagewise merge`: exit statuses, nothing written on conflict, and a git end-to-end merge."""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from stagewise.cli import main
from stagewise.files.project_file import load_project, save_project
from stagewise.model.values import Quantity
from stagewise.review import actions
from stagewise.review.audit import MERGE_EVENT, check_records, verify_trail

DEMO = Path(__file__).resolve().parents[2] / "projects" / "hydrophone.stagewise.json"


def _copies(tmp_path: Path) -> tuple[Path, Path, Path]:
    base = tmp_path / "base.stagewise.json"
    shutil.copy(DEMO, base)
    ours, theirs = tmp_path / "ours.stagewise.json", tmp_path / "theirs.stagewise.json"
    shutil.copy(base, ours)
    shutil.copy(base, theirs)
    return base, ours, theirs


def _edit(path: Path, action: object) -> None:
    project = load_project(path)
    action(project)  # type: ignore[operator]
    save_project(path, project)


def test_merge_writes_a_verified_file_exit_0(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    base, ours, theirs = _copies(tmp_path)
    _edit(ours, lambda p: actions.sign(p, "aaf2", "Ana", "reviewer", "accept"))
    _edit(theirs, lambda p: actions.sign(p, "adc", "Bo", "reviewer", "accept"))
    out = tmp_path / "out.stagewise.json"
    assert main(["merge", str(base), str(ours), str(theirs), "-o", str(out), "--by", "Cy"]) == 0
    merged = load_project(out)
    assert verify_trail(merged.audit).intact and check_records(merged).problems == ()
    assert merged.audit[-1].what == MERGE_EVENT and merged.audit[-1].who == "Cy"
    assert "Merged into" in capsys.readouterr().out
    assert main(["verify", str(out)]) == 0
    assert "1 merge of two branches each checked" in capsys.readouterr().out


def test_conflict_exit_1_lists_path_and_both_values_and_writes_nothing(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    base, ours, theirs = _copies(tmp_path)

    def value(text: str) -> object:
        def change(project: object) -> None:
            stage = project.stage("buffer")  # type: ignore[attr-defined]
            stage.part("R1").value = Quantity.of(text)
        return change

    _edit(ours, value("3M3"))
    _edit(theirs, value("4M7"))
    before = ours.read_bytes()
    assert main(["merge", str(base), str(ours), str(theirs), "-o", str(ours)]) == 1
    err = capsys.readouterr().err
    assert ".parts[0].value" in err and '"3M3"' in err and '"4M7"' in err
    assert ours.read_bytes() == before


def test_unreadable_input_exit_2(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    base, ours, theirs = _copies(tmp_path)
    theirs.write_text("{not json", encoding="utf-8")
    out = tmp_path / "out.stagewise.json"
    assert main(["merge", str(base), str(ours), str(theirs), "-o", str(out)]) == 2
    assert not out.exists()
    assert "theirs.stagewise.json" in capsys.readouterr().err


@pytest.mark.skipif(shutil.which("git") is None, reason="git is not installed")
def test_git_merge_with_the_configured_driver_gives_a_verified_file(tmp_path: Path) -> None:
    # Reference: git's documented custom merge driver (gitattributes(5), "Defining a custom merge
    # driver": %O ancestor, %A current version written back, %B other branch).
    repo = tmp_path / "repo"
    repo.mkdir()
    env = dict(os.environ, GIT_AUTHOR_NAME="t", GIT_AUTHOR_EMAIL="t@example.invalid", GIT_COMMITTER_NAME="t",
               GIT_COMMITTER_EMAIL="t@example.invalid", GIT_CONFIG_NOSYSTEM="1", HOME=str(tmp_path))

    def git(*args: str) -> str:
        return subprocess.run(["git", *args], cwd=repo, env=env, check=True, capture_output=True, text=True).stdout

    git("init", "-q", "-b", "main")
    driver = f"{sys.executable} -m stagewise merge %O %A %B -o %A"
    git("config", "merge.stagewise.driver", driver)
    (repo / ".gitattributes").write_text("*.stagewise.json merge=stagewise\n", encoding="utf-8")
    project = repo / "chain.stagewise.json"
    shutil.copy(DEMO, project)
    git("add", ".")
    git("commit", "-q", "-m", "demo")
    git("checkout", "-q", "-b", "bo")
    _edit(project, lambda p: actions.sign(p, "adc", "Bo", "reviewer", "accept"))
    git("commit", "-q", "-am", "Bo signs adc")
    git("checkout", "-q", "main")
    _edit(project, lambda p: actions.sign(p, "aaf2", "Ana", "reviewer", "accept"))
    git("commit", "-q", "-am", "Ana signs aaf2")
    git("merge", "-q", "--no-edit", "bo")
    merged = load_project(project)
    assert verify_trail(merged.audit).intact and check_records(merged).problems == ()
    assert [s.name for s in merged.stage("aaf2").signoffs] == ["Ana"]  # type: ignore[union-attr]
    assert [s.name for s in merged.stage("adc").signoffs] == ["Bo"]  # type: ignore[union-attr]
    assert merged.audit[-1].what == MERGE_EVENT
    assert json.loads(git("show", "HEAD:chain.stagewise.json"))["audit"][-1]["what"] == MERGE_EVENT


def test_merge_does_not_write_a_project_someone_has_open(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    from stagewise.files.lock import acquire_lock

    base, ours, theirs = _copies(tmp_path)
    _edit(theirs, lambda p: actions.sign(p, "adc", "Bo", "reviewer", "accept"))
    before = ours.read_bytes()
    with acquire_lock(ours, "Someone Else"):
        assert main(["merge", str(base), str(ours), str(theirs), "-o", str(ours)]) == 2
    assert "open for editing" in capsys.readouterr().err
    assert ours.read_bytes() == before

