"""The hydrophone demo's review history is consistent: the trail verifies and the story holds."""

from __future__ import annotations

from pathlib import Path

from stagewise.files.project_file import load_project
from stagewise.review.audit import unrecorded_decisions, verify_trail
from stagewise.review.signoff import signoff_states
from stagewise.review.words import SignoffState

DEMO = Path(__file__).resolve().parents[2] / "projects" / "hydrophone.stagewise.json"


def test_hydrophone_history_verifies_and_tells_its_story() -> None:
    project = load_project(DEMO)
    assert verify_trail(project.audit).intact
    assert unrecorded_decisions(project) == []
    reviewers = {event.who for event in project.audit}
    assert len(reviewers) == 2
    states = signoff_states(project)
    # The buffer was approved before its bias resistor changed: that approval is stale.
    assert states["buffer"].state is SignoffState.STALE
    assert any(event.what == "part change" and event.detail["stale_signoffs"] for event in project.audit)
    assert SignoffState.APPROVED in {state.state for state in states.values()}
    waived = [check for stage in project.stages for check in stage.checks if check.waiver is not None]
    assert len(waived) == 1 and waived[0].waiver is not None and waived[0].waiver.justification.strip()
    comments = [comment for stage in project.stages for comment in stage.comments]
    assert {comment.resolved for comment in comments} == {True, False}
