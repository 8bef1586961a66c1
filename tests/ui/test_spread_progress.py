"""The Monte Carlo's progress in the status bar, and its Cancel button, as a user meets them."""

from __future__ import annotations

import json
import threading
import time
from pathlib import Path
from typing import Any

import pytest
from PySide6.QtCore import Qt

import stagewise.engine.spread as spread
from conftest import SAMPLE, make_window
from stagewise.ui.analyses import SPREAD_CANCELLED

CHUNK_DELAY_S = 0.02


@pytest.fixture
def slow_spread(monkeypatch: pytest.MonkeyPatch) -> threading.Event:
    """While set, every chunk of a Monte Carlo that reports progress takes CHUNK_DELAY_S more and
    holds one sample: a deliberately long spread (a few seconds) on a small project."""
    slowing = threading.Event()
    slowing.set()
    original = spread._in_chunks

    def slowed_chunks(count: int, chunk: int, solve_rows: Any, matrices_per_row: int = 1,
                      meter: Any = None) -> None:
        if meter is None or not slowing.is_set():
            original(count, chunk, solve_rows, matrices_per_row, meter)
            return

        def slowed(start: int, stop: int) -> None:
            time.sleep(CHUNK_DELAY_S)
            solve_rows(start, stop)

        original(count, 1, slowed, matrices_per_row, meter)

    monkeypatch.setattr(spread, "_in_chunks", slowed_chunks)
    return slowing


@pytest.fixture
def many_samples(tmp_path: Path) -> Path:
    document = json.loads(SAMPLE.read_text(encoding="utf-8"))
    document["settings"]["mc_samples"] = 400
    target = tmp_path / "many-samples.stagewise.json"
    target.write_text(json.dumps(document, indent=2) + "\n", encoding="utf-8")
    return target


def test_progress_shows_advances_and_cancel_stops_the_spread(qtbot, many_samples: Path,  # type: ignore[no-untyped-def]
                                                             slow_spread: threading.Event) -> None:
    slow_spread.clear()  # the first analysis at full speed
    window = make_window(qtbot, many_samples)
    try:
        progress = window.spread_progress
        assert not progress.isVisible()  # nothing runs: no bar
        assert window.spread_view.lines["nominal"].getData()[0] is not None
        slow_spread.set()
        window.document.set_current_stage("rc")
        window.parts_table.edit_cell("R1", "value", "4k7")
        # Common practice, no source: long work shows its progress, which moves forward.
        qtbot.waitUntil(progress.isVisible, timeout=20000)
        first = progress.bar.value()
        qtbot.waitUntil(lambda: progress.bar.value() > first, timeout=10000)
        assert progress.bar.value() < progress.bar.maximum()
        assert progress.cancel_button.isEnabled() and progress.cancel_button.text() == "Cancel"
        clicked = time.monotonic()
        qtbot.mouseClick(progress.cancel_button, Qt.MouseButton.LeftButton)
        qtbot.waitUntil(lambda: not progress.isVisible(), timeout=5000)
        assert time.monotonic() - clicked < 2.0  # stopped at the next chunks, not at the end
        assert window.wait_until_idle(30, formula=False)
        # The spread view says it was cancelled and draws none of the samples done.
        assert f"Spread: {SPREAD_CANCELLED}" in window.spread_view.header.text()
        assert all(item.getData()[0] is None or len(item.getData()[0]) == 0
                   for item in window.spread_view.lines.values())
        # Every other result of the edit is there: the response of the edited stage.
        assert "Up to date." == window.response_view.header.text()
        # A later edit starts afresh and runs the spread to its end.
        slow_spread.clear()
        window.parts_table.edit_cell("R1", "value", "3k9")
        assert window.wait_until_idle(60, formula=False)
        assert SPREAD_CANCELLED not in window.spread_view.header.text()
        assert len(window.spread_view.lines["nominal"].getData()[0]) > 0
        assert not progress.isVisible()
    finally:
        window.shutdown()
