"""Every review record is covered by the hash of its audit event, both ways.

Regressions: a sign-off's note (or role, fingerprint; a waiver's justification; an answer's
note; a comment's text) edited by hand used to pass ``verify``; a record deleted from the file
(a "returned for rework" sign-off, a second reviewer's acceptance, a waiver, an answer) used to
pass ``verify`` too, and ``check`` showed a sign-off without an event as plain "accepted".
"""

from __future__ import annotations

import copy
import json
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest
from review_helpers import base_project

from stagewise.cli import main
from stagewise.files.project_file import load_project, loads_project, save_project
from stagewise.model.project import Project
from stagewise.review import actions
from stagewise.review.audit import check_records, verify_trail
from stagewise.review.signoff import signoff_states
from stagewise.review.words import SignoffState

DEMO = Path(__file__).resolve().parents[2] / "projects" / "hydrophone.stagewise.json"
T = "2026-11-20T10:00:00Z"


def _demo_document() -> dict[str, Any]:
    return json.loads(DEMO.read_text(encoding="utf-8"))


def _stage(document: dict[str, Any], stage_id: str) -> dict[str, Any]:
    return next(stage for stage in document["stages"] if stage["id"] == stage_id)


def _verify(tmp_path: Path, capsys: pytest.CaptureFixture[str], document: dict[str, Any]) -> tuple[int, str]:
    path = tmp_path / "edited.stagewise.json"
    path.write_text(json.dumps(document, indent=2, ensure_ascii=False), encoding="utf-8")
    status = main(["verify", str(path)])
    return status, capsys.readouterr().out


def test_the_demo_verifies(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # Common practice, no source: a record written through the program is matched by its event.
    status, out = _verify(tmp_path, capsys, _demo_document())
    assert status == 0, out


EDITS: list[tuple[str, Callable[[dict[str, Any]], None], str]] = [
    ("note of a sign-off",
     lambda d: _stage(d, "buffer")["signoffs"][0].update(note="Reviewed, and the protection too."),
     'stage "buffer", sign-off 1 (accepted by Maren Holt): its note differs'),
    ("role of a sign-off",
     lambda d: _stage(d, "buffer")["signoffs"][0].update(role="chief engineer"),
     'stage "buffer", sign-off 1 (accepted by Maren Holt): its role differs'),
    ("verdict of a sign-off",
     lambda d: _stage(d, "sensor")["signoffs"][0].update(verdict="accept"),
     'stage "sensor", sign-off 1 (accepted by Tobias Achebe): its verdict differs'),
    ("fingerprint of a sign-off",
     lambda d: _stage(d, "buffer")["signoffs"][0].update(fingerprint="ab" * 32),
     'stage "buffer", sign-off 1 (accepted by Maren Holt): its fingerprint differs'),
    ("justification of a waiver",
     lambda d: _stage(d, "driver")["checks"][3]["waiver"].update(justification="Fine."),
     'stage "driver", check "c0g": the waiver by Tobias Achebe: its justification differs'),
    ("note of an answer",
     lambda d: _stage(d, "buffer")["checks"][3]["answer"].update(note="Checked."),
     'stage "buffer", check "protect": the answer by Maren Holt: its note differs'),
    ("answer of an answer",
     lambda d: _stage(d, "sensor")["checks"][2]["answer"].update(answer="yes"),
     'stage "sensor", check "c-measured": the answer by Tobias Achebe: its answer differs'),
    ("text of a comment",
     lambda d: _stage(d, "sensor")["comments"][0].update(text="All fine."),
     'stage "sensor", comment 1 by Tobias Achebe has no matching audit event'),
    ("resolved flag of a comment",
     lambda d: _stage(d, "sensor")["comments"][0].update(resolved=True),
     'stage "sensor", comment 1 by Tobias Achebe is marked resolved without an audit event'),
]


@pytest.mark.parametrize(("what", "edit", "named"), EDITS, ids=[edit[0] for edit in EDITS])
def test_any_record_edited_by_hand_breaks_verify_naming_it(
        tmp_path: Path, capsys: pytest.CaptureFixture[str], what: str, edit: Callable[[dict[str, Any]], None],
        named: str) -> None:
    # Common practice, no source: an integrity check covers every field a reviewer decided.
    document = _demo_document()
    edit(document)
    status, out = _verify(tmp_path, capsys, document)
    assert status == 1, what
    assert "audit trail intact" in out  # the events themselves were not touched
    assert named in out


REMOVALS: list[tuple[str, Callable[[dict[str, Any]], None], str]] = [
    ("a returned-for-rework sign-off", lambda d: _stage(d, "sensor")["signoffs"].clear(),
     'stage "sensor": the sign-off by Tobias Achebe recorded by audit event seq 12'),
    ("a second reviewer's acceptance", lambda d: _stage(d, "driver")["signoffs"].clear(),
     'stage "driver": the sign-off by Tobias Achebe recorded by audit event seq 15'),
    ("a waiver", lambda d: _stage(d, "driver")["checks"][3].pop("waiver"),
     'the waiver by Tobias Achebe on check "c0g" recorded by audit event seq 14'),
    ("an answer", lambda d: _stage(d, "sensor")["checks"][2].pop("answer"),
     'the answer by Tobias Achebe on check "c-measured" recorded by audit event seq 13'),
    ("a comment", lambda d: _stage(d, "sensor")["comments"].clear(),
     'the comment by Tobias Achebe recorded by audit event seq 11'),
    ("a resolution", lambda d: _stage(d, "aaf2")["comments"][0].update(resolved=False),
     "the resolution of the comment by Tobias Achebe recorded by audit event seq 10"),
]


@pytest.mark.parametrize(("what", "remove", "named"), REMOVALS, ids=[removal[0] for removal in REMOVALS])
def test_a_record_removed_from_the_file_breaks_verify(
        tmp_path: Path, capsys: pytest.CaptureFixture[str], what: str, remove: Callable[[dict[str, Any]], None],
        named: str) -> None:
    # Common practice, no source: each record and its event must match both ways.
    document = _demo_document()
    remove(document)
    status, out = _verify(tmp_path, capsys, document)
    assert status == 1, what
    assert named in out and "missing from the file" in out


def _reviewed() -> Project:
    project = base_project()
    actions.sign(project, "rc", "Ana Ruiz", "design lead", "rework", note="Raise R1.", time=T)
    actions.waive(project, "rc", "corner", "Ana Ruiz", "quality", "the next stage limits the band", time=T)
    actions.answer(project, "rc", "layout", "no", "Ben Okafor", time=T)
    actions.comment(project, "buf", "Ben Okafor", "Which package?", time=T)
    return project


def test_decisions_replaced_or_withdrawn_through_the_program_still_verify() -> None:
    # Common practice, no source: a superseded decision stays in the trail, not in the record.
    project = _reviewed()
    actions.withdraw_waiver(project, "rc", "corner", "Ana Ruiz", time=T)
    actions.answer(project, "rc", "layout", "yes", "Ben Okafor", note="moved next to J1", time=T)
    actions.resolve(project, "buf", 0, "Ana Ruiz", time=T)
    actions.sign(project, "rc", "Ana Ruiz", "design lead", "accept", time=T)
    assert verify_trail(project.audit).intact
    assert check_records(project).problems == ()


def test_a_stage_removed_and_recorded_as_a_part_change_is_not_a_removed_record() -> None:
    # Common practice, no source: removing a stage is a recorded design change, not tampering.
    project = _reviewed()
    before = copy.deepcopy(project)
    project.stages = [stage for stage in project.stages if stage.id != "rc"]
    actions.record_part_changes(before, project, "Ana Ruiz", time=T)
    assert check_records(project).problems == ()
    unrecorded = copy.deepcopy(before)
    unrecorded.stages = [stage for stage in unrecorded.stages if stage.id != "rc"]
    problems = check_records(unrecorded).problems
    assert problems and all(problem.removed for problem in problems)
    assert "the stage itself is gone" in problems[0].sentence


def test_check_and_states_show_a_signoff_without_its_event_as_unrecorded(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # Common practice, no source: a record nobody recorded is never shown as a verdict.
    document = _demo_document()
    pasted = dict(_stage(document, "gain")["signoffs"][0], name="Someone Else")
    _stage(document, "gain")["signoffs"].append(pasted)
    project = loads_project(json.dumps(document))
    states = signoff_states(project)
    assert states["gain"].state is SignoffState.UNRECORDED
    views = states["gain"].signoffs
    assert views[1].unrecorded and views[1].word == str(SignoffState.UNRECORDED)
    assert not views[0].unrecorded and not views[0].replaced
    assert states["buffer"].state is not SignoffState.UNRECORDED
    path = tmp_path / "pasted.stagewise.json"
    save_project(path, project)
    main(["check", str(path)])
    out = capsys.readouterr().out
    assert f"gain {SignoffState.UNRECORDED}" in out
    assert f"gain {SignoffState.ACCEPTED}" not in out
    assert load_project(path).stage("gain") is not None


def test_check_fails_over_a_record_removed_from_the_file(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # Regression: with the "returned for rework" sign-off deleted, check showed the stage as
    # "not signed" and said nothing else.
    document = _demo_document()
    _stage(document, "sensor")["signoffs"].clear()
    path = tmp_path / "edited.stagewise.json"
    path.write_text(json.dumps(document, indent=2, ensure_ascii=False), encoding="utf-8")
    status = main(["check", str(path)])
    out = capsys.readouterr().out
    assert status == 1
    assert ("review record does not match the audit trail: stage \"sensor\": the sign-off by Tobias Achebe "
            "recorded by audit event seq 12") in out
    status = main(["check", str(path), "--json"])
    document = json.loads(capsys.readouterr().out)
    assert status == 1 and any("missing from the file" in line for line in document["record_problems"])


def test_a_withdrawn_waiver_put_back_by_hand_is_named() -> None:
    # Common practice, no source: a withdrawn decision pasted back is not the decision that stands.
    project = _reviewed()
    waiver = project.stage("rc").checks[0].waiver  # type: ignore[union-attr]
    actions.withdraw_waiver(project, "rc", "corner", "Ana Ruiz", time=T)
    assert check_records(project).problems == ()
    project.stage("rc").checks[0].waiver = waiver  # type: ignore[union-attr]
    problems = check_records(project).problems
    assert len(problems) == 1 and not problems[0].removed
    assert "withdrew or replaced it, and the record was put back outside the program" in problems[0].sentence
