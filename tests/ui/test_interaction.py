"""Interaction as a user meets it: what the views say while the slower results compute, and the
parts table keeping the cell the user is typing in."""

from __future__ import annotations

import threading
from typing import Any

import pytest
from PySide6.QtCore import Qt

import stagewise.ui.worker as worker_module


@pytest.fixture
def held_slow_phase(monkeypatch: pytest.MonkeyPatch) -> threading.Event:
    """Hold every slow phase (noise, spread, check states) until the test releases it."""
    release = threading.Event()
    compute = worker_module.compute_outcome

    def held(*args: Any, **kwargs: Any) -> Any:
        if args[3] == 2:
            release.wait(60)
        return compute(*args, **kwargs)

    monkeypatch.setattr(worker_module, "compute_outcome", held)
    return release


def test_views_say_truly_what_they_show_while_the_slower_results_compute(window, qtbot,  # type: ignore[no-untyped-def]
                                                                         held_slow_phase: threading.Event) -> None:
    window.document.set_current_stage("amp")
    noise_before = window.noise_view.traces.items if hasattr(window.noise_view, "traces") else None
    assert noise_before is not None
    states_before = {check.id: window.review_panel.check_state(check.id)
                     for check in window.document.project.stage("amp").checks}
    counts_before = window.tree._stage_items["amp"].text(3)
    window.parts_table.edit_cell("R3", "value", "15k")
    worker = window.worker
    qtbot.waitUntil(lambda: worker.latest is not None and worker.latest.generation == worker._generation, timeout=30000)
    try:
        assert worker.latest.phase == 1  # the slow phase is held
        # The response view shows the new traces and says so; it makes no claim of old results.
        assert window.response_view.header.text() == "Up to date."
        # The noise view keeps its traces and says they are from before the edit.
        noise_items = [item for item in window.noise_view.traces.items.values() if item.isVisible()]
        assert noise_items and all(len(item.getData()[0]) > 0 for item in noise_items)
        assert window.noise_view.header.text().endswith("from before the last edit until they arrive: noise.")
        # Check states and the tree's counts stay readable (the previous ones, said to be previous).
        assert all(window.review_panel.check_state(check_id) == state for check_id, state in states_before.items())
        assert "…" not in states_before.values()
        assert "previous" in window.review_panel.totals.text()
        assert window.tree._stage_items["amp"].text(3).split(" · ")[1:] == counts_before.split(" · ")[1:]
    finally:
        held_slow_phase.set()
    assert window.wait_until_idle(60, formula=False)
    assert window.noise_view.header.text() == "Up to date."
    assert "previous" not in window.review_panel.totals.text()


def test_a_comment_blanks_nothing(window, qtbot, held_slow_phase: threading.Event) -> None:  # type: ignore[no-untyped-def]
    window.document.set_current_stage("amp")
    states_before = {check.id: window.review_panel.check_state(check.id)
                     for check in window.document.project.stage("amp").checks}
    window.review_panel.comment("Ines Okafor", "Looks tidy.")
    worker = window.worker
    qtbot.waitUntil(lambda: worker.latest is not None and worker.latest.generation == worker._generation, timeout=30000)
    try:
        noise_items = [item for item in window.noise_view.traces.items.values() if item.isVisible()]
        assert noise_items and all(len(item.getData()[0]) > 0 for item in noise_items)
        assert all(window.review_panel.check_state(check_id) == state for check_id, state in states_before.items())
        assert window.response_view.header.text() == "Up to date."
    finally:
        held_slow_phase.set()
    assert window.wait_until_idle(60, formula=False)


def test_a_parts_table_edit_keeps_the_current_cell_and_focus(window, qtbot, qtlog) -> None:  # type: ignore[no-untyped-def]
    window.document.set_current_stage("rc")
    table = window.parts_table.table
    row = next(r for r in range(table.rowCount()) if table.item(r, 0).text() == "R1")
    window.activateWindow()
    table.setFocus()
    table.setCurrentCell(row, 3)
    from PySide6.QtWidgets import QApplication

    qtbot.keyClick(table, Qt.Key.Key_6)  # typing opens the editor on the current cell
    editor = QApplication.focusWidget()
    assert editor is not None and editor is not table
    qtbot.keyClicks(editor, "k8")  # the following keys go where the focus is: the editor
    qtbot.keyClick(editor, Qt.Key.Key_Return)
    qtbot.waitUntil(lambda: table.state() != table.State.EditingState, timeout=5000)
    assert window.document.project.stage("rc").part("R1").value.raw == "6k8"
    assert (table.currentRow(), table.currentColumn()) == (row, 3)
    assert table.item(row, 3).text() == "6k8"
    assert table.hasFocus()
    # The user goes on with the keyboard: the next row's cell, no click needed.
    qtbot.keyClick(table, Qt.Key.Key_Down)
    assert table.currentRow() == row + 1 and table.currentColumn() == 3
    assert not [record for record in qtlog.records if "commitData" in record.message]
