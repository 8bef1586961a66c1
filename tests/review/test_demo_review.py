"""The hydrophone demo's review history is consistent: the trail verifies and the story holds."""

from __future__ import annotations

import json
from pathlib import Path

from stagewise.files.project_file import load_project, save_project
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
    # The buffer was approved before its bias resistor changed: that acceptance is out of date.
    assert states["buffer"].state is SignoffState.OUT_OF_DATE
    assert any(event.what == "part change" and event.detail["stale_signoffs"] for event in project.audit)
    assert SignoffState.ACCEPTED in {state.state for state in states.values()}
    waived = [check for stage in project.stages for check in stage.checks if check.waiver is not None]
    assert len(waived) == 1 and waived[0].waiver is not None and waived[0].waiver.justification.strip()
    comments = [comment for stage in project.stages for comment in stage.comments]
    assert {comment.resolved for comment in comments} == {True, False}


def test_older_verdict_words_are_read_as_ours_and_the_trail_still_verifies(tmp_path: Path) -> None:
    """A file written by an earlier release holds "approve" and "changes" in its sign-offs and in
    the audit events that recorded them (the demo's events still do). Loading reads the records
    as today's verdicts; the events are never rewritten, so the chain verifies before and after
    a save and every sign-off still finds its event.

    # Common practice, no source: a migration never alters a hashed record.
    """
    raw = json.loads(DEMO.read_text(encoding="utf-8"))
    older = {"accept": "approve", "rework": "changes"}
    event_words = {event["detail"]["verdict"] for event in raw["audit"] if event["what"] == "signoff"}
    assert event_words == {"approve", "changes"}, "the demo's events must still hold the older words"
    for stage in raw["stages"]:
        for signoff in stage.get("signoffs", []):
            signoff["verdict"] = older[signoff["verdict"]]
    old_file = tmp_path / "older.stagewise.json"
    old_file.write_text(json.dumps(raw, indent=2, ensure_ascii=False) + "\n", encoding="utf-8")
    project = load_project(old_file)
    verdicts = [signoff.verdict for stage in project.stages for signoff in stage.signoffs]
    assert set(verdicts) == {"accept", "rework"}
    assert signoff_states(project)["sensor"].state is SignoffState.REWORK
    assert verify_trail(project.audit).intact and unrecorded_decisions(project) == []
    save_project(old_file, project)
    saved = json.loads(old_file.read_text(encoding="utf-8"))
    assert [signoff["verdict"] for stage in saved["stages"] for signoff in stage.get("signoffs", [])] == verdicts
    assert saved["audit"] == raw["audit"]  # every event as it was recorded
    again = load_project(old_file)
    assert verify_trail(again.audit).intact
    assert unrecorded_decisions(again) == []
    # A sign-off whose verdict differs from its event's is still caught, across the vocabularies.
    first = again.stage("sensor").signoffs[0]  # type: ignore[union-attr]
    first.verdict = "accept"
    assert any("sign-off 1 (accepted by" in problem for problem in unrecorded_decisions(again))
