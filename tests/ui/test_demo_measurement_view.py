"""The hydrophone demo opens with its bench measurement drawn over the chain's prediction."""

from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np

from conftest import make_window
from stagewise.files.project_file import load_project

ROOT = Path(__file__).resolve().parents[2]


def test_the_demo_opens_with_board_a_over_the_prediction(qtbot, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    path = tmp_path / "hydrophone.stagewise.json"
    shutil.copyfile(ROOT / "projects" / "hydrophone.stagewise.json", path)
    (record,) = load_project(path).measurements
    window = make_window(qtbot, path)
    try:
        # The default view, untouched: the board's points are drawn and named in the legend.
        drawn = window.response_view.measured.data("board-A")
        assert drawn is not None
        f_hz, mag_db, _phase = drawn
        np.testing.assert_allclose(f_hz, record.f_hz)
        # Reference library: numpy, 20·log10|H| of the points held in the file.
        np.testing.assert_allclose(mag_db, 20 * np.log10(np.abs(np.asarray(record.re) + 1j * np.asarray(record.im))),
                                   atol=1e-9)
        labels = [label.text for _, label in window.response_view.legend.items]
        assert "Measured: board-A" in labels
    finally:
        window.shutdown()
