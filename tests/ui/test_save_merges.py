"""Saving never overwrites what was written to the file while the program had it open.

Regression: with the project open in the program, ``stagewise packet`` appended its "review
packet printed" event to the file; saving in the program then wrote its own copy over it, the
event disappeared and ``verify`` still said intact.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest
from PySide6.QtWidgets import QMessageBox

from conftest import make_window
from stagewise.files.lock import inspect_lock
from stagewise.files.project_file import load_project, save_project
from stagewise.model.fingerprint import stage_fingerprint
from stagewise.model.values import Quantity
from stagewise.review.audit import check_records, verify_trail
from stagewise.review.words import SignoffState


def _run_packet(path: Path, output: Path) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "stagewise", "packet", str(path), "-o", str(output),
                           "--by", "Quality Desk"], capture_output=True, text=True, timeout=300,
                          env=dict(os.environ, QT_QPA_PLATFORM="offscreen"), check=False)


def test_packet_from_the_command_line_survives_a_save_in_the_program(window, sample_path: Path,  # type: ignore[no-untyped-def]
                                                                      tmp_path: Path) -> None:
    # Common practice, no source: an append made by another writer is merged, never overwritten.
    window.attach_file(sample_path)  # as at start-up: the program takes the edit lock
    state = inspect_lock(sample_path)
    assert state is not None and not state.stale
    completed = _run_packet(sample_path, tmp_path / "review.pdf")
    assert completed.returncode == 0, completed.stderr
    assert "open for editing by" in completed.stderr and "merges it into its next save" in completed.stderr
    assert [event.what for event in load_project(sample_path).audit] == ["packet"]
    # Edit in the program, then save.
    window.document.set_part_field("rc", "R1", "value", "4k7")
    assert window.save_to(sample_path)
    saved = load_project(sample_path)
    whats = [event.what for event in saved.audit]
    assert "packet" in whats and "part change" in whats
    assert whats.index("packet") < whats.index("part change")
    assert verify_trail(saved.audit).intact
    assert check_records(saved).problems == ()
    assert saved.stage("rc").part("R1").value.raw == "4k7"  # type: ignore[union-attr]
    # What the program shows is what it saved.
    assert [event.hash for event in window.document.project.audit] == [event.hash for event in saved.audit]
    assert not window.document.is_modified


def test_a_conflicting_outside_edit_keeps_both_versions_on_disk(window, sample_path: Path) -> None:  # type: ignore[no-untyped-def]
    # Common practice, no source: where two edits of one value collide, nothing is lost.
    outside = load_project(sample_path)
    outside.stage("rc").part("R1").value = Quantity.of("10k")  # type: ignore[union-attr]
    save_project(sample_path, outside)
    window.document.set_part_field("rc", "R1", "value", "4k7")
    assert window.save_to(sample_path)  # not interactive: ours is saved, theirs kept beside it
    assert load_project(sample_path).stage("rc").part("R1").value.raw == "4k7"  # type: ignore[union-attr]
    copies = list(sample_path.parent.glob("sample.outside-*.stagewise.json"))
    assert len(copies) == 1
    assert load_project(copies[0]).stage("rc").part("R1").value.raw == "10k"  # type: ignore[union-attr]


def test_an_outside_edit_of_another_part_is_merged(window, sample_path: Path) -> None:  # type: ignore[no-untyped-def]
    outside = load_project(sample_path)
    outside.stage("amp").part("R3").value = Quantity.of("15k")  # type: ignore[union-attr]
    save_project(sample_path, outside)
    window.document.set_part_field("rc", "R1", "value", "4k7")
    assert window.save_to(sample_path)
    saved = load_project(sample_path)
    assert saved.stage("rc").part("R1").value.raw == "4k7"  # type: ignore[union-attr]
    assert saved.stage("amp").part("R3").value.raw == "15k"  # type: ignore[union-attr]
    assert window.document.project.stage("amp").part("R3").value.raw == "15k"
    assert not list(sample_path.parent.glob("sample.outside-*"))


def test_the_review_panel_shows_a_pasted_signoff_as_unrecorded(qtbot, sample_path: Path) -> None:  # type: ignore[no-untyped-def]
    # Common practice, no source: a record no audit event holds is never shown as a verdict.
    document = json.loads(sample_path.read_text(encoding="utf-8"))
    amp = next(stage for stage in document["stages"] if stage["id"] == "amp")
    fingerprint = stage_fingerprint(load_project(sample_path).stage("amp"), load_project(sample_path))  # type: ignore[arg-type]
    amp["signoffs"] = [{"name": "Pasted Person", "role": "reviewer", "verdict": "accept", "note": "",
                        "time": "2026-11-20T10:00:00Z", "fingerprint": fingerprint}]
    sample_path.write_text(json.dumps(document, indent=2), encoding="utf-8")
    window = make_window(qtbot, sample_path)
    try:
        window.tree.setFocus()
        window.document.set_current_stage("amp")
        panel = window.review_panel
        assert panel.state.property("signoffState") == str(SignoffState.UNRECORDED)
        assert panel.state.text().startswith("Unrecorded")
        shown = panel.signoffs.item(0).text()
        assert shown.startswith(str(SignoffState.UNRECORDED)) and "no audit event holds this record" in shown
        assert str(SignoffState.ACCEPTED) not in panel.state.text()
    finally:
        window.shutdown()


def test_declining_the_conflict_question_writes_nothing(qtbot, sample_path: Path,  # type: ignore[no-untyped-def]
                                                        monkeypatch: pytest.MonkeyPatch) -> None:
    asked: list[str] = []

    def decline(_parent: object, _title: str, text: str, *_args: object) -> QMessageBox.StandardButton:
        asked.append(text)
        return QMessageBox.StandardButton.Cancel

    monkeypatch.setattr(QMessageBox, "question", decline)
    window = make_window(qtbot, sample_path, interactive=True)
    try:
        outside = load_project(sample_path)
        outside.stage("rc").part("R1").value = Quantity.of("10k")  # type: ignore[union-attr]
        save_project(sample_path, outside)
        on_disk = sample_path.read_bytes()
        window.document.set_part_field("rc", "R1", "value", "4k7")
        assert not window.save_to(sample_path)
        assert asked and ".value" in asked[0] and '"10k"' in asked[0] and '"4k7"' in asked[0]
        assert sample_path.read_bytes() == on_disk
        assert not list(sample_path.parent.glob("sample.outside-*"))
        assert window.document.is_modified  # the edit is still there, unsaved
    finally:
        window.shutdown()


def test_a_conflicting_save_still_keeps_what_was_appended_outside(window, sample_path: Path) -> None:  # type: ignore[no-untyped-def]
    # Common practice, no source: a conflict on one value loses nothing else; the event appended
    # outside stays in the saved trail, the file's version is kept whole beside it, and the user
    # is told where both are.
    from stagewise.review.audit import append_event

    outside = load_project(sample_path)
    outside.stage("rc").part("R1").value = Quantity.of("10k")  # type: ignore[union-attr]
    append_event(outside, "Quality Desk", "packet", {"pdf_sha256": "0" * 64})
    save_project(sample_path, outside)
    window.document.set_part_field("rc", "R1", "value", "4k7")
    assert window.save_to(sample_path)
    saved = load_project(sample_path)
    assert saved.stage("rc").part("R1").value.raw == "4k7"  # type: ignore[union-attr]
    whats = [event.what for event in saved.audit]
    assert whats[0] == "packet" and "part change" in whats
    assert verify_trail(saved.audit).intact
    assert check_records(saved).problems == ()
    copies = list(sample_path.parent.glob("sample.outside-*.stagewise.json"))
    assert len(copies) == 1
    kept = load_project(copies[0])
    assert kept.stage("rc").part("R1").value.raw == "10k"  # type: ignore[union-attr]
    assert [event.what for event in kept.audit] == ["packet"]
    shown = window.statusBar().currentMessage()
    assert sample_path.name in shown and copies[0].name in shown and "your version" in shown
