"""Framing of the plot views on both demos (pytest-qt, offscreen): what the user sees is in view."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
from PySide6.QtCore import QPoint, Qt

from stagewise.files.project_file import load_project
from stagewise.ui.main_window import MainWindow

ROOT = Path(__file__).resolve().parents[2]
DEMOS = ["hydrophone", "greenhouse"]


def _window(qtbot, name: str) -> MainWindow:  # type: ignore[no-untyped-def]
    window = MainWindow(load_project(ROOT / "projects" / f"{name}.stagewise.json"), None, interactive=False)
    qtbot.addWidget(window)
    window.resize(1280, 720)
    window.show()
    assert window.wait_until_idle(120, formula=False)
    return window


@pytest.mark.parametrize("demo", DEMOS)
def test_pole_zero_view_shows_every_pole_below_the_band_top(qtbot, demo: str) -> None:  # type: ignore[no-untyped-def]
    window = _window(qtbot, demo)
    try:
        view = window.pole_zero_view
        checked = 0
        for stage in window.document.project.stages:
            window.document.set_current_stage(stage.id)
            window.wait_until_idle(60, formula=False)
            (x_low, x_high), (y_low, y_high) = view.plot.getViewBox().viewRange()
            for key, item in view.scatters.items():
                if not item.isVisible() or not key.endswith(":poles"):
                    continue
                x, y = item.getData()
                tips = list(item.data["data"])
                for xi, yi, tip in zip(x, y, tips, strict=True):
                    # Every mark, in band or on the edge ring, lies in the visible region.
                    assert x_low <= xi <= x_high and y_low <= yi <= y_high, tip
                    checked += 1
                # Each pole below the band's top is drawn at its own distance, not on the edge:
                # log10 of its frequency over the floor (Common practice, no source: a log scale).
                frame = view.frame
                for xi, yi, tip in zip(x, y, tips, strict=True):
                    if "edge ring" in tip:
                        assert math.isclose(math.hypot(xi, yi), frame.edge_radius, rel_tol=1e-9)
                    else:
                        assert math.hypot(xi, yi) <= frame.top_radius + 1e-9
        assert checked > 0
    finally:
        window.shutdown()


def test_pole_zero_marks_read_f_q_and_zeta(qtbot) -> None:  # type: ignore[no-untyped-def]
    window = _window(qtbot, "hydrophone")
    try:
        view = window.pole_zero_view
        complex_pairs = 0
        for stage in window.document.project.stages:
            window.document.set_current_stage(stage.id)
            window.wait_until_idle(60, formula=False)
            for item in view.scatters.values():
                if not item.isVisible():
                    continue
                for tip in item.data["data"]:
                    assert "f = |s|/2π = " in tip
                    if "Q = " in tip:
                        # Source: standard second-order form, Q = 1/(2ζ) (Ogata, ch. 5).
                        q = float(tip.split("Q = ")[1].split(",")[0])
                        zeta = float(tip.split("ζ = ")[1].split(" ")[0].rstrip(","))
                        assert q == pytest.approx(1 / (2 * zeta), rel=1e-2)  # both printed to 3 digits
                        complex_pairs += 1
        assert complex_pairs > 0
    finally:
        window.shutdown()


def test_no_stock_right_click_menu_on_any_plot(qtbot) -> None:  # type: ignore[no-untyped-def]
    import pyqtgraph as pg

    from stagewise.ui.plots import PlotView

    window = _window(qtbot, "hydrophone")
    try:
        views = [widget for widget in window.findChildren(PlotView)]
        assert views
        for view in views:
            for item in view.graphics.ci.items:
                if isinstance(item, pg.PlotItem):
                    # Common practice, no source: a right click must not offer to change the axes.
                    assert not item.menuEnabled()
                    assert not item.getViewBox().menuEnabled()
        # A right click on the response plot leaves its range as it was.
        view = window.response_view
        before = view.magnitude.getViewBox().viewRange()
        centre = view.graphics.mapFromScene(view.magnitude.getViewBox().sceneBoundingRect().center())
        qtbot.mouseClick(view.graphics.viewport(), Qt.MouseButton.RightButton, pos=QPoint(int(centre.x()),
                                                                                         int(centre.y())))
        np.testing.assert_allclose(view.magnitude.getViewBox().viewRange(), before)
    finally:
        window.shutdown()
