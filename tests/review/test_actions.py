"""The action API: each decision is stored, recorded in the audit trail, and checked first."""

from __future__ import annotations

import copy

import pytest
from review_helpers import base_project

from stagewise.model.fingerprint import stage_fingerprint
from stagewise.model.values import Quantity
from stagewise.review import actions
from stagewise.review.actions import ReviewError
from stagewise.review.audit import verify_trail
from stagewise.review.signoff import signoff_state, signoff_states
from stagewise.review.words import SignoffState

T = "2026-11-03T10:00:00Z"


def test_sign_binds_the_current_fingerprint_and_records_an_event() -> None:
    project = base_project()
    stage = project.stage("rc")
    assert stage is not None
    signoff = actions.sign(project, "rc", "Ana Ruiz", "analog lead", "accept", "looks right", time=T)
    assert signoff.fingerprint == stage_fingerprint(stage, project)
    assert stage.signoffs == [signoff]
    event = project.audit[-1]
    assert (event.what, event.who, event.time) == ("signoff", "Ana Ruiz", T)
    assert event.detail["fingerprint"] == signoff.fingerprint and event.detail["stage"] == "rc"
    assert signoff_state(project, "rc").state is SignoffState.ACCEPTED
    assert signoff_state(project, "buf").state is SignoffState.NONE


def test_a_part_change_makes_the_signoff_stale_and_signing_again_clears_it() -> None:
    project = base_project()
    actions.sign(project, "rc", "Ana Ruiz", "analog lead", "accept", time=T)
    actions.sign(project, "buf", "Ana Ruiz", "analog lead", "accept", time=T)
    saved = copy.deepcopy(project)
    stage = project.stage("rc")
    assert stage is not None
    stage.parts[0].value = Quantity.of("3k6")
    event = actions.record_part_changes(saved, project, "Ben Okafor", time=T)
    assert event is not None and event.what == "part change"
    assert event.detail["changes"] == [{"stage": "rc", "subject": "part R1", "kind": "changed", "field": "value",
                                        "old": "3k3", "new": "3k6"}]
    assert [item["stage"] for item in event.detail["stale_signoffs"]] == ["rc"]
    states = signoff_states(project)
    assert states["rc"].state is SignoffState.OUT_OF_DATE and states["rc"].out_of_date_count == 1
    assert states["buf"].state is SignoffState.ACCEPTED
    actions.sign(project, "rc", "Ana Ruiz", "analog lead", "accept", time=T)
    again = signoff_state(project, "rc")
    assert again.state is SignoffState.ACCEPTED
    assert [view.replaced for view in again.signoffs] == [True, False]
    assert verify_trail(project.audit).intact


def test_changes_verdict_wins_over_an_approval() -> None:
    project = base_project()
    actions.sign(project, "rc", "Ana Ruiz", "analog lead", "accept", time=T)
    actions.sign(project, "rc", "Ben Okafor", "quality", "rework", "add the tolerance of C1 to the BOM", time=T)
    assert signoff_state(project, "rc").state is SignoffState.REWORK


def test_record_part_changes_ignores_prose_and_no_change() -> None:
    project = base_project()
    saved = copy.deepcopy(project)
    assert actions.record_part_changes(saved, project, "Ana") is None
    project.stages[0].name = "Renamed"
    project.stages[0].notes = "new notes"
    assert actions.record_part_changes(saved, project, "Ana") is None
    assert project.audit == []


@pytest.mark.parametrize(("call", "message"), [
    (lambda p: actions.sign(p, "nope", "Ana", "lead", "accept"), "no stage"),
    (lambda p: actions.sign(p, "rc", " ", "lead", "accept"), "name"),
    (lambda p: actions.sign(p, "rc", "Ana", "lead", "maybe"), "verdict"),
    (lambda p: actions.sign(p, "rc", "Ana", "lead", "rework", "  "), "what must change"),
    (lambda p: actions.sign(p, "rc", "Ana", "lead", "accept", time="noon"), "ISO 8601"),
    (lambda p: actions.waive(p, "rc", "corner", "Ana", "quality", ""), "justification"),
    (lambda p: actions.waive(p, "rc", "corner", "Ana", "quality", "   \n"), "justification"),
    (lambda p: actions.waive(p, "rc", "nope", "Ana", "quality", "fine"), "no check"),
    (lambda p: actions.withdraw_waiver(p, "rc", "corner", "Ana"), "not waived"),
    (lambda p: actions.answer(p, "rc", "corner", "yes", "Ana"), "numeric"),
    (lambda p: actions.answer(p, "rc", "layout", "maybe", "Ana"), "not an answer"),
    (lambda p: actions.comment(p, "rc", "Ana", ""), "text"),
    (lambda p: actions.comment(p, "rc", "Ana", "hello", check_id="nope"), "no check"),
    (lambda p: actions.resolve(p, "rc", 0, "Ana"), "no comment 1"),
    (lambda p: actions.record_packet(p, "abc", "Ana"), "SHA-256"),
])
def test_refused_actions_change_nothing(call, message: str) -> None:  # type: ignore[no-untyped-def]
    project = base_project()
    before = copy.deepcopy(project)
    with pytest.raises(ValueError, match=message):
        call(project)
    assert project == before


def test_waive_answer_comment_resolve_packet_are_all_recorded() -> None:
    project = base_project()
    waiver = actions.waive(project, "rc", "corner", "Ben Okafor", "quality", "the next stage sets the band", time=T)
    assert project.stages[0].checks[0].waiver is waiver and waiver.time == T
    actions.waive(project, "rc", "corner", "Ben Okafor", "quality", "reworded reason", time=T)
    assert project.audit[-1].detail["replaces"] == "the next stage sets the band"
    actions.withdraw_waiver(project, "rc", "corner", "Ben Okafor", time=T)
    assert project.stages[0].checks[0].waiver is None
    reply = actions.answer(project, "rc", "layout", "no", "Ana Ruiz", "it sits 4 cm away", time=T)
    assert project.stages[0].checks[2].answer is reply and reply.answer == "no"
    note = actions.comment(project, "rc", "Ana Ruiz", "why not 2k2?", check_id="corner", time=T)
    assert note.check == "corner" and not note.resolved
    actions.resolve(project, "rc", 0, "Ben Okafor", time=T)
    assert project.stages[0].comments[0].resolved
    with pytest.raises(ReviewError, match="already resolved"):
        actions.resolve(project, "rc", 0, "Ben Okafor")
    actions.record_packet(project, "a" * 64, "Ana Ruiz", file_sha256="b" * 64, time=T)
    assert [event.what for event in project.audit] == [
        "waiver", "waiver", "waiver withdrawn", "answer", "comment", "comment resolved", "packet"]
    assert [event.seq for event in project.audit] == list(range(1, 8))
    assert verify_trail(project.audit).intact


def test_undoing_the_edit_a_fresh_signoff_was_given_to_brings_back_the_older_matching_one() -> None:
    # Common practice, no source: a sign-off holds for the design it was given to; when the design
    # returns to that state, the sign-off holds again.
    project = base_project()
    actions.sign(project, "rc", "Ana Ruiz", "analog lead", "accept", time=T)
    stage = project.stage("rc")
    assert stage is not None
    part = stage.part("R1")
    assert part is not None
    original = part.value
    part.value = Quantity.of("2k2")  # an edit
    actions.sign(project, "rc", "Ana Ruiz", "analog lead", "rework", "the new value is too high", time=T)
    state = signoff_state(project, "rc")
    assert state.state is SignoffState.REWORK and [view.replaced for view in state.signoffs] == [True, False]
    part.value = original  # the edit undone
    state = signoff_state(project, "rc")
    assert state.state is SignoffState.ACCEPTED
    assert [(view.out_of_date, view.replaced) for view in state.signoffs] == [(False, False), (True, True)]
