"""The Monte Carlo's progress in the status bar, and its Cancel button, as a user meets them."""

from __future__ import annotations

import json
import shutil
import threading
import time
from pathlib import Path
from typing import Any

import pytest
from PySide6.QtCore import Qt

import stagewise.engine.spread as spread
import stagewise.ui.worker as worker_module
from conftest import SAMPLE, make_window
from stagewise.review.words import SPREAD_CANCELLED, SPREAD_FOLLOWS

CHUNK_DELAY_S = 0.02
ROOT = Path(__file__).resolve().parents[2]


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


def with_yield_check(tmp_path: Path, samples: int) -> Path:
    """The sample project with a yield check on the amplifier stage and ``samples`` samples."""
    document = json.loads(SAMPLE.read_text(encoding="utf-8"))
    document["settings"]["mc_samples"] = samples
    amp = next(stage for stage in document["stages"] if stage["id"] == "amp")
    amp["checks"].append({"id": "yield", "text": "Most builds meet every check", "metric": "yield_pct",
                          "where": "chain", "min": 90})
    target = tmp_path / "with-yield.stagewise.json"
    target.write_text(json.dumps(document, indent=2) + "\n", encoding="utf-8")
    return target


@pytest.fixture
def many_samples(tmp_path: Path) -> Path:
    return with_yield_check(tmp_path, 400)


def check_row(window: Any, check_id: str) -> tuple[str, str, str]:  # state, value, detail as shown
    table = window.review_panel.checks
    for row in range(table.rowCount()):
        if table.item(row, 0).text() == check_id:
            return table.item(row, 1).text(), table.item(row, 2).text(), table.item(row, 4).text()
    raise AssertionError(f"no row for check {check_id}")


def test_progress_shows_advances_and_cancel_stops_the_spread(qtbot, many_samples: Path,  # type: ignore[no-untyped-def]
                                                             slow_spread: threading.Event) -> None:
    slow_spread.clear()  # the first analysis at full speed
    window = make_window(qtbot, many_samples)
    try:
        progress = window.spread_progress
        assert not progress.isVisible()  # nothing runs: no bar
        assert window.spread_view.lines["nominal"].getData()[0] is not None
        slow_spread.set()
        window.document.set_current_stage("amp")
        window.parts_table.edit_cell("R3", "value", "15k")
        # Common practice, no source: long work shows its progress, which moves forward.
        qtbot.waitUntil(progress.isVisible, timeout=20000)
        first = progress.bar.value()
        qtbot.waitUntil(lambda: progress.bar.value() > first, timeout=10000)
        assert progress.bar.value() < progress.bar.maximum()
        assert progress.cancel_button.isEnabled() and progress.cancel_button.text() == "Cancel"
        clicked = time.monotonic()
        qtbot.mouseClick(progress.cancel_button, Qt.MouseButton.LeftButton)
        qtbot.waitUntil(lambda: not progress.bar.isVisible(), timeout=5000)
        assert time.monotonic() - clicked < 2.0  # stopped at the next chunks, not at the end
        assert window.wait_until_idle(30, formula=False)
        # The status bar says so and offers to run it again.
        assert progress.isVisible() and progress.label.text() == "Spread cancelled"
        assert progress.cancel_button.text() == "Run again" and progress.cancel_button.isEnabled()
        # The spread view says it was cancelled and draws none of the samples done.
        assert f"Spread: {SPREAD_CANCELLED}" in window.spread_view.header.text()
        assert all(item.getData()[0] is None or len(item.getData()[0]) == 0
                   for item in window.spread_view.lines.values())
        # The yield check has no value and says why; every other result of the edit is there.
        state, value, detail = check_row(window, "yield")
        assert state == "no value" and value == "—" and SPREAD_CANCELLED in detail
        assert check_row(window, "gain")[0] in ("met", "not met")
        assert "Up to date." == window.response_view.header.text()
        # The packet is not given the cancelled analysis: it would compute its own spread.
        assert window.worker.analysis_of(window.document.project) is None
        # "Run again" runs the spread of the same project to its end, with no edit.
        slow_spread.clear()
        before = window.document.project
        qtbot.mouseClick(progress.cancel_button, Qt.MouseButton.LeftButton)
        qtbot.waitUntil(lambda: not window.worker.spread_busy and SPREAD_CANCELLED not in
                        window.spread_view.header.text(), timeout=60000)
        assert window.wait_until_idle(60, formula=False)
        assert window.document.project == before
        assert len(window.spread_view.lines["nominal"].getData()[0]) > 0
        assert check_row(window, "yield")[0] in ("met", "not met")
        assert not progress.isVisible()
        # A later edit starts afresh and runs the spread to its end too.
        window.parts_table.edit_cell("R3", "value", "12k")
        assert window.wait_until_idle(60, formula=False)
        assert SPREAD_CANCELLED not in window.spread_view.header.text()
        assert check_row(window, "yield")[0] in ("met", "not met")
        assert not progress.isVisible()
    finally:
        window.shutdown()


@pytest.fixture
def spread_phase(monkeypatch: pytest.MonkeyPatch) -> threading.Event:
    """While cleared, the spread's phase (3) of the worker waits; set, it runs."""
    release = threading.Event()
    release.set()
    compute = worker_module.compute_outcome

    def held(*args: Any, **kwargs: Any) -> Any:
        if args[3] == 3:
            release.wait(60)
        return compute(*args, **kwargs)

    monkeypatch.setattr(worker_module, "compute_outcome", held)
    return release


def next_review_state(qtbot: Any, worker: Any) -> None:
    """Wait until the review state (phase 2) of the newest request is shown."""
    qtbot.waitUntil(lambda: worker.latest is not None and worker.latest.generation == worker._generation
                    and worker.latest.phase == 2, timeout=30000)


def test_a_yield_check_follows_the_spread_without_holding_the_review_state(  # type: ignore[no-untyped-def]
        qtbot, tmp_path: Path, spread_phase: threading.Event) -> None:
    window = make_window(qtbot, with_yield_check(tmp_path, 200))
    release = spread_phase
    try:
        window.document.set_current_stage("amp")
        state, value, _detail = check_row(window, "yield")
        # Source: non-inverting gain 1 + R3/R2; with both resistors within ±1 % it moves by at
        # most about ±0.17 dB, inside the ±0.5 dB of the gain check, so every sample meets the
        # only numeric check counted: a yield of 100 %, above the check's 90 %.
        assert state == "met" and value.startswith("100")
        assert "Yield 100.0 %" in window.spread_view.summary.text()
        release.clear()  # hold the spread of the next edit
        window.parts_table.edit_cell("R3", "value", "15k")
        worker = window.worker
        next_review_state(qtbot, worker)
        # The review state is in without the spread; the yield check says it follows.
        state, value, detail = check_row(window, "yield")
        assert state == "no value" and SPREAD_FOLLOWS in detail
        assert check_row(window, "gain")[0] in ("met", "not met")
        release.set()
        assert window.wait_until_idle(60, formula=False)
        state, value, _detail = check_row(window, "yield")
        assert state in ("met", "not met") and value.endswith("%")
    finally:
        release.set()
        window.shutdown()


def test_the_measurement_envelope_follows_the_spread(qtbot, tmp_path: Path,  # type: ignore[no-untyped-def]
                                                     spread_phase: threading.Event) -> None:
    path = tmp_path / "hydrophone.stagewise.json"
    shutil.copyfile(ROOT / "projects" / "hydrophone.stagewise.json", path)
    window = make_window(qtbot, path)
    release = spread_phase
    try:
        window.document.set_current_stage("adc")
        state, value, _detail = check_row(window, "bench")
        assert state in ("met", "not met") and value.endswith("%")
        assert window.measurement_view.shown[0].envelope_db is not None
        release.clear()
        worker = window.worker
        worker.request()  # the same circuit analysed again (as after a sign-off): the board stays current
        next_review_state(qtbot, worker)
        # Common practice, no source: the review state comes without waiting for a Monte Carlo;
        # the check read from the envelope says it follows, the view draws no stale envelope.
        state, value, detail = check_row(window, "bench")
        assert state == "no value" and SPREAD_FOLLOWS in detail
        assert window.measurement_view.shown[0].envelope_db is None
        release.set()
        assert window.wait_until_idle(60, formula=False)
        state, value, _detail = check_row(window, "bench")
        assert state in ("met", "not met") and value.endswith("%")
        assert window.measurement_view.shown[0].envelope_db is not None
    finally:
        release.set()
        window.shutdown()
