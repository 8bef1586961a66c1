"""Recovery copies and edit locks as a user meets them: whose copy is offered, when it is written."""

from __future__ import annotations

import os
from pathlib import Path

from PySide6.QtWidgets import QMessageBox

from conftest import make_window


def test_a_second_user_is_not_offered_the_holders_live_recovery_copy(qtbot, sample_path: Path,  # type: ignore[no-untyped-def]
                                                                      monkeypatch) -> None:
    from stagewise.files.lock import LockInfo, lock_path
    from stagewise.review.audit import now_utc

    # Someone else has the project open and their window keeps a recovery copy of unsaved edits.
    holder = LockInfo(owner="m.haddad", host="bench-pc-3", pid=1, time=now_utc())
    lock_path(sample_path).write_text(holder.to_json(), encoding="utf-8")
    recovery = sample_path.with_name(sample_path.name + ".recovery")
    recovery.write_text(sample_path.read_text(encoding="utf-8"), encoding="utf-8")
    os.utime(sample_path, (1_000_000_000, 1_000_000_000))  # the copy is newer than the file
    questions: list[str] = []

    def ask(_parent: object, title: str, *_args: object, **_kwargs: object) -> QMessageBox.StandardButton:
        questions.append(title)
        return QMessageBox.StandardButton.Discard  # what a hurried user would press

    monkeypatch.setattr(QMessageBox, "question", ask)
    monkeypatch.setattr(QMessageBox, "exec", lambda _box: QMessageBox.StandardButton.Open)  # "Open read-only"
    window = make_window(qtbot, sample_path, interactive=True)
    try:
        window.attach_file(sample_path)
        assert window.document.read_only
        assert window.open_path(sample_path)
        assert window.document.read_only
    finally:
        window.shutdown()
    assert questions == []  # never asked about another user's copy
    assert recovery.is_file()  # and it is still there for its owner


def test_the_first_edit_after_opening_and_after_saving_is_covered_at_once(qtbot, sample_path: Path) -> None:  # type: ignore[no-untyped-def]
    from stagewise.files.project_file import loads_project

    window = make_window(qtbot, sample_path)
    recovery = sample_path.with_name(sample_path.name + ".recovery")
    try:
        window.attach_file(sample_path)
        assert not recovery.exists()
        window.document.set_current_stage("rc")
        window.parts_table.edit_cell("R1", "value", "3k9")
        # Written on the next turn of the event loop, long before the 2 s edit timer or the minute.
        qtbot.waitUntil(recovery.is_file, timeout=500)
        assert loads_project(recovery.read_text(encoding="utf-8")).stage("rc").part("R1").value.raw == "3k9"  # type: ignore[union-attr]
        assert window.save()
        assert not recovery.exists()  # saved: nothing to recover
        window.parts_table.edit_cell("R1", "value", "4k7")
        qtbot.waitUntil(recovery.is_file, timeout=500)
        assert loads_project(recovery.read_text(encoding="utf-8")).stage("rc").part("R1").value.raw == "4k7"  # type: ignore[union-attr]
    finally:
        window.shutdown()
