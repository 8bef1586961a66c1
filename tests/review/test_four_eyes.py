"""Who signs: the four-eyes rule (settings.four_eyes) and `stagewise sign --by`."""

from __future__ import annotations

import copy
import json
from pathlib import Path

import pytest
from review_helpers import base_document, project_from

from stagewise.cli import main
from stagewise.files.codec import dumps
from stagewise.files.lock import acquire_lock
from stagewise.files.project_file import load_project, loads_project, save_project
from stagewise.model.project import Project
from stagewise.model.values import Quantity
from stagewise.review import actions
from stagewise.review.audit import check_records, verify_trail
from stagewise.review.signoff import last_changed_by, signoff_states
from stagewise.review.words import FOUR_EYES_WORD, SignoffState

T = "2026-11-21T10:00:00Z"


def _changed_by_ana(four_eyes: bool = True) -> Project:
    document = base_document()
    document["settings"]["four_eyes"] = four_eyes
    project = project_from(document)
    before = copy.deepcopy(project)
    project.stage("rc").parts[0].value = Quantity.of("3k9")  # type: ignore[union-attr]
    actions.record_part_changes(before, project, "Ana Ruiz", time=T)
    return project


def test_the_setting_loads_and_saves() -> None:
    project = _changed_by_ana()
    assert project.settings.four_eyes
    assert '"four_eyes": true' in dumps(project)
    assert loads_project(dumps(project)).settings.four_eyes
    assert "four_eyes" not in dumps(_changed_by_ana(four_eyes=False))  # absent means off


def test_who_last_changed_a_stage_cannot_accept_it() -> None:
    # Common practice, no source: the four-eyes principle, a change is approved by someone else.
    project = _changed_by_ana()
    assert last_changed_by(project) == {"rc": "Ana Ruiz"}
    with pytest.raises(actions.ReviewError, match="four-eyes"):
        actions.sign(project, "rc", "ana ruiz", "designer", "accept", time=T)
    assert project.stage("rc").signoffs == []  # type: ignore[union-attr]
    actions.sign(project, "rc", "Ana Ruiz", "designer", "rework", note="Needs a second look.", time=T)
    actions.sign(project, "rc", "Ben Okafor", "reviewer", "accept", time=T)
    actions.sign(project, "buf", "Ana Ruiz", "designer", "accept", time=T)  # a stage she did not change
    assert signoff_states(project)["buf"].state is SignoffState.ACCEPTED


def test_an_acceptance_that_breaks_the_rule_does_not_count_and_check_reports_it(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    project = _changed_by_ana(four_eyes=False)
    actions.sign(project, "rc", "Ana Ruiz", "designer", "accept", time=T)  # allowed while the rule is off
    project.settings.four_eyes = True  # the team turns the rule on later
    states = signoff_states(project)
    assert states["rc"].state is SignoffState.NONE
    assert [view.signoff.name for view in states["rc"].four_eyes_breaches] == ["Ana Ruiz"]
    assert states["rc"].signoffs[0].word == FOUR_EYES_WORD
    path = tmp_path / "p.stagewise.json"
    save_project(path, project)
    status = main(["check", str(path)])
    out = capsys.readouterr().out
    assert status == 1
    assert f"four-eyes rule broken: stage rc {FOUR_EYES_WORD} (Ana Ruiz" in out


def test_sign_from_the_command_line(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = tmp_path / "p.stagewise.json"
    save_project(path, _changed_by_ana())
    assert main(["sign", str(path), "--stage", "rc", "--verdict", "accept", "--by", "Ben Okafor",
                 "--role", "reviewer", "--note", "corner checked"]) == 0
    project = load_project(path)
    signoff = project.stage("rc").signoffs[-1]  # type: ignore[union-attr]
    assert (signoff.name, signoff.role, signoff.note) == ("Ben Okafor", "reviewer", "corner checked")
    assert verify_trail(project.audit).intact and check_records(project).problems == ()
    before = path.read_bytes()
    assert main(["sign", str(path), "--stage", "rc", "--verdict", "accept", "--by", "Ana Ruiz"]) == 2
    assert "four-eyes" in capsys.readouterr().err
    assert main(["sign", str(path), "--stage", "nope", "--verdict", "accept", "--by", "Ben Okafor"]) == 2
    assert path.read_bytes() == before
    with acquire_lock(path, "Someone Else"):
        assert main(["sign", str(path), "--stage", "buf", "--verdict", "accept", "--by", "Ben Okafor"]) == 2
    assert "open for editing" in capsys.readouterr().err
    assert path.read_bytes() == before
    assert json.loads(before)["settings"]["four_eyes"] is True
