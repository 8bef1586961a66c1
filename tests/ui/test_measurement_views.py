"""Bench measurements in the GUI: markers over the prediction, toggled in the tree, the deviation view."""

from __future__ import annotations

from pathlib import Path

import numpy as np
from PySide6.QtCore import Qt

from conftest import make_window
from stagewise.cli import main
from stagewise.engine.analysis import response_points
from stagewise.files.project_file import load_project

F_HZ = np.logspace(1, 5, 41)


def _attach(sample_path: Path, tmp_path: Path) -> np.ndarray:
    project = load_project(sample_path)
    _, chain, _ = response_points(project, list(F_HZ))
    assert chain is not None
    board = chain * 1.05 * np.exp(1j * np.radians(2.0))  # a board 0.42 dB high with 2° of extra lead
    rows = [f"{float(f)!r},{float(v.real)!r},{float(v.imag)!r}" for f, v in zip(F_HZ, board, strict=True)]
    data = tmp_path / "board.csv"
    data.write_text("f_hz,re,im\n" + "\n".join(rows) + "\n", encoding="utf-8")
    assert main(["measure", str(sample_path), str(data), "--chain", "--by", "GUI test"]) == 0
    return board


def test_measured_markers_follow_the_tree_tick_and_the_deviation_view(qtbot, sample_path: Path,  # type: ignore[no-untyped-def]
                                                                     tmp_path: Path) -> None:
    board = _attach(sample_path, tmp_path)
    window = make_window(qtbot, sample_path)
    try:
        view = window.response_view
        drawn = view.measured.data("board")
        assert drawn is not None
        f_hz, mag_db, phase_deg = drawn
        # Reference library: numpy, 20·log10|H| of the measured points as written in the file.
        np.testing.assert_allclose(f_hz, F_HZ)
        np.testing.assert_allclose(mag_db, 20 * np.log10(np.abs(board)), atol=1e-9)
        # The phase is drawn beside the predicted chain trace: 2° above it at each frequency
        # (Common practice, no source: a phase is known modulo 360°).
        chain = view.trace_data("chain")
        assert chain is not None
        predicted = np.interp(np.log(F_HZ), np.log(chain[0]), chain[2])
        np.testing.assert_allclose(phase_deg - predicted, 2.0, atol=0.05)
        # One legend entry for it.
        labels = [label.text for _, label in view.legend.items]
        assert labels.count("Measured: board") == 1, labels
        # The tree row toggles it like the other traces.
        tree = window.tree
        root = tree.topLevelItem(0)
        row = next(root.child(i) for i in range(root.childCount()) if root.child(i).text(0).startswith("Measured: board"))
        row.setCheckState(2, Qt.CheckState.Unchecked)
        assert view.measured.data("board") is None
        row.setCheckState(2, Qt.CheckState.Checked)
        assert view.measured.data("board") is not None
        # The deviation view: 20·log10(1.05) ≈ 0.424 dB and 2° at every point (Source: definition of the decibel).
        deviation = window.measurement_view
        text = deviation.summary.text()
        assert "Reddish purple circles: board (whole chain, 41 points)" in text and "0.42 dB and 2.0°" in text
        (shown,) = deviation.shown
        np.testing.assert_allclose(shown.dev_db, 20 * np.log10(1.05), atol=1e-9)
    finally:
        window.shutdown()


def test_a_step_capture_is_drawn_beside_the_predicted_step(qtbot, sample_path: Path,  # type: ignore[no-untyped-def]
                                                           tmp_path: Path) -> None:
    # The sample's rc stage alone: R1 3k3, C1 6.8 nF. Source: first-order step 1 − exp(−t/RC).
    tau = 3.3e3 * 6.8e-9
    t_s = np.linspace(-0.2 * tau, 12 * tau, 2001)
    volts = np.where(t_s < 0, 0.1, 0.1 + 0.5 * (1 - np.exp(-np.clip(t_s, 0, None) / tau)))
    capture = tmp_path / "rc step.csv"
    capture.write_text("Time (s),CH1 (V)\n" + "\n".join(f"{float(t)!r},{float(v)!r}" for t, v in zip(t_s, volts, strict=True))
                       + "\n", encoding="utf-8")
    assert main(["measure", str(sample_path), str(capture), "--stage", "rc", "--by", "GUI test"]) == 0
    window = make_window(qtbot, sample_path)
    try:
        window.overlays.set_stage("rc", "isolated", True)
        item = window.step_view.measured.items.get("rc-step")
        assert item is not None
        t, y = item.getOriginalDataset()
        # Scaled to the prediction's final value (1 V/V): the capture's shape 1 − exp(−t/τ), within
        # the 1e-5 by which the mean of its last tenth sits below the true final value.
        np.testing.assert_allclose(y, 1 - np.exp(-t / tau), atol=2e-5)
    finally:
        window.shutdown()


def test_attaching_in_the_program_records_it_and_saves_it(qtbot, sample_path: Path,  # type: ignore[no-untyped-def]
                                                          tmp_path: Path) -> None:
    from stagewise.review.audit import unrecorded_decisions, verify_trail

    project = load_project(sample_path)
    _, amp, _ = response_points(project, list(F_HZ), "amp")
    assert amp is not None
    data = tmp_path / "amp.csv"
    data.write_text("f_hz,re,im\n" + "\n".join(f"{float(f)!r},{float(v.real)!r},{float(v.imag)!r}"
                                                for f, v in zip(F_HZ, amp, strict=True)) + "\n", encoding="utf-8")
    bad = tmp_path / "bad.csv"
    bad.write_text("f_hz,re\n1,2\n3,4\n", encoding="utf-8")
    window = make_window(qtbot, sample_path)
    try:
        assert window.attach_measurement_file(bad, "isolated", "amp") is False  # refused, nothing changed
        assert window.document.project.measurements == []
        assert window.attach_measurement_file(data, "isolated", "amp", "bench analyser") is True
        root = window.tree.topLevelItem(0)
        assert any(root.child(i).text(0).startswith("Measured: amp (amp, isolated)") for i in range(root.childCount()))
        assert window.wait_until_idle(60, formula=False)
        window.overlays.set_stage("amp", "isolated", True)
        drawn = window.response_view.measured.data("amp")
        assert drawn is not None
        # Reference library: numpy, 20·log10|H| of the values written to the file.
        np.testing.assert_allclose(drawn[1], 20 * np.log10(np.abs(amp)), atol=1e-9)
        assert window.save()
    finally:
        window.shutdown()
    saved = load_project(sample_path)
    (measurement,) = saved.measurements
    assert measurement.instrument == "bench analyser" and measurement.stage == "amp"
    assert verify_trail(saved.audit).intact
    assert any(event.what == "measurement" and event.detail["measurement"] == "amp" for event in saved.audit)
    assert unrecorded_decisions(saved) == []


def test_the_attach_dialog_asks_place_instrument_setup_and_note(qtbot, sample_path: Path,  # type: ignore[no-untyped-def]
                                                                tmp_path: Path, monkeypatch) -> None:
    # Common practice, no source: the program asks what `stagewise measure` takes (--instrument,
    # --setup, --note) in one form, and keeps each in its own field.
    from PySide6.QtCore import QTimer
    from PySide6.QtWidgets import QApplication, QFileDialog

    from stagewise.ui.measurement_dialog import MeasurementDialog

    data = tmp_path / "amp.csv"
    data.write_text("f_hz,mag_db,phase_deg\n100,0,-1\n1000,-0.5,-9\n", encoding="utf-8")
    window = make_window(qtbot, sample_path)
    monkeypatch.setattr(QFileDialog, "getOpenFileName", staticmethod(lambda *args, **kwargs: (str(data), "")))
    seen: list[str] = []

    def fill() -> None:
        dialog = QApplication.activeModalWidget()
        if not isinstance(dialog, MeasurementDialog):
            if dialog is not None:
                dialog.close()
            return
        seen.append(dialog.windowTitle())
        labels = [dialog.place.itemText(i) for i in range(dialog.place.count())]
        in_chain = next((i for i, text in enumerate(labels) if text.endswith("in chain")
                         and window.document.project.stage("amp").name in text), -1)  # type: ignore[union-attr]
        if in_chain < 0:
            dialog.reject()
            return
        dialog.place.setCurrentIndex(in_chain)
        qtbot.keyClicks(dialog.instrument, "gain-phase analyser GP-2")
        qtbot.keyClicks(dialog.setup, "100 mV source, 10x probe at the output")
        qtbot.keyClicks(dialog.note, "board 7")
        dialog.accept()

    try:
        QTimer.singleShot(0, fill)
        window.attach_measurement_dialog()
        assert seen == ["Attach amp.csv"]
        (measurement,) = window.document.project.measurements
        assert (measurement.where, measurement.stage) == ("in_chain", "amp")
        assert measurement.instrument == "gain-phase analyser GP-2"
        assert measurement.setup == "100 mV source, 10x probe at the output"
        assert measurement.note == "board 7"
    finally:
        window.shutdown()
