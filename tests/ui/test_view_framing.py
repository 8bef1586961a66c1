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


def _independent_dominant_tau(poles: np.ndarray, zeros: np.ndarray) -> float:
    """Slowest time constant among the step's modes of at least 1 % of the largest amplitude.

    Reference library: scipy.signal.residue (partial fractions of H(s)/s, gain 1: only the
    modes' relative sizes matter). Source: the step response is H(0) + Σ r_k/p_k·e^{p_k t}
    (Ogata, Modern Control Engineering, ch. 5).
    """
    from scipy import signal

    numerator, denominator = signal.zpk2tf(zeros, poles, 1.0)
    residues, roots, _ = signal.residue(np.real_if_close(numerator), np.polymul(np.real_if_close(denominator),
                                                                                 [1.0, 0.0]))
    keep = np.abs(roots) > 1e-9 * np.max(np.abs(roots))
    amplitude = np.abs(residues[keep])
    roots = roots[keep]
    dominant = amplitude >= 1e-2 * amplitude.max()
    return float(1.0 / np.min(np.abs(roots[dominant].real)))


@pytest.mark.parametrize("demo", DEMOS)
def test_step_view_is_linear_and_spans_within_20_dominant_time_constants(qtbot, demo: str) -> None:  # type: ignore[no-untyped-def]
    from stagewise.ui.overlays import IN_CHAIN

    window = _window(qtbot, demo)
    try:
        view = window.step_view
        checked = 0
        for stage in window.document.project.stages:
            window.document.set_current_stage(stage.id)
            window.overlays.set_chain(False)
            window.overlays.show_only_stage(stage.id)
            window.overlays.set_stage(stage.id, IN_CHAIN, False)
            window.wait_until_idle(60, formula=False)
            roots = window.worker.latest.of_stage(stage.id, "poles")
            if not roots.ok or len(roots.value.poles_rad_s) == 0 or len(roots.value.poles_rad_s) > 8:
                continue
            assert not view.plot.getViewBox().state["logMode"][0]
            tau = _independent_dominant_tau(np.asarray(roots.value.poles_rad_s), np.asarray(roots.value.zeros_rad_s))
            (t_low, t_high), _ = view.plot.getViewBox().viewRange()
            span = t_high - max(t_low, 0.0)
            assert tau <= span <= 20 * tau, (stage.id, span, tau)
            checked += 1
        assert checked >= 3
    finally:
        window.shutdown()


def test_step_traces_in_different_units_are_each_over_their_own_final_value(qtbot) -> None:  # type: ignore[no-untyped-def]
    from stagewise.ui.overlays import ISOLATED

    window = _window(qtbot, "greenhouse")
    try:
        project = window.document.project
        current = next(stage for stage in project.stages if stage.drive == "current")
        voltage = next(stage for stage in project.stages if stage.drive != "current" and not stage.is_block)
        window.overlays.set_chain(False)
        window.overlays.show_only_stage(current.id)
        window.overlays.set_stage(voltage.id, ISOLATED, True)
        window.wait_until_idle(60, formula=False)
        view = window.step_view
        assert view.normalized
        assert "÷ final" in view.plot.getAxis("left").labelText  # noqa: SIM300
        for key in (f"{current.id}:isolated", f"{voltage.id}:isolated"):
            item = view.traces.items[key]
            t_s, y = item.getOriginalDataset()
            step = window.worker.latest.of_stage(key.split(":")[0], "step").value
            # Common practice, no source: each trace is drawn over its own final value, so
            # ohms and volts per volt share a dimensionless axis (both settle towards 1).
            assert step.final is not None and abs(step.final) > 0
            np.testing.assert_allclose(y, step.y / step.final, rtol=1e-12)
            assert y[-1] == pytest.approx(1.0, abs=1e-2)
    finally:
        window.shutdown()


def test_settling_limit_is_drawn_where_its_time_is(qtbot) -> None:  # type: ignore[no-untyped-def]
    window = _window(qtbot, "hydrophone")
    try:
        stage = next(stage for stage in window.document.project.stages
                     if any(check.metric == "settle_01pct_s" for check in stage.checks))
        check = next(check for check in stage.checks if check.metric == "settle_01pct_s")
        window.document.set_current_stage(stage.id)
        window.wait_until_idle(60, formula=False)
        view = window.step_view
        rects = [item for item in view.limits.items if hasattr(item, "rect")]
        assert rects
        rect = rects[0].rect()
        # Common practice, no source: a settling limit of T is the band from 0 to T on a
        # linear time axis (seconds as data, no logarithm).
        assert not view.plot.getViewBox().state["logMode"][0]
        assert rect.left() == pytest.approx(0.0, abs=1e-15)
        assert rect.right() == pytest.approx(check.max.si, rel=1e-12)
    finally:
        window.shutdown()


def test_noise_sources_keep_their_colour_when_re_ranked(qtbot) -> None:  # type: ignore[no-untyped-def]
    from stagewise.ui.analyses import NoiseTrace
    from stagewise.ui.worker import Computed, Outcome

    window = _window(qtbot, "hydrophone")
    try:
        view = window.noise_view
        f_hz = np.logspace(1, 4, 31)
        flat = np.ones_like(f_hz)

        def show(order: list[str], generation: int) -> dict[str, tuple[str, object]]:
            contributions = tuple((name, flat * (3 - rank)) for rank, name in enumerate(order))
            outcome = Outcome(generation, 3)
            outcome.chain["noise"] = Computed(NoiseTrace(f_hz, flat * 4, contributions, "summary"))
            view._on_outcome(outcome)  # noqa: SLF001 - as the worker delivers a result
            return {name: (view.traces.items[f"source:{name}"].opts["pen"].color().name(),
                           view.traces.items[f"source:{name}"].opts["pen"].style()) for name in order}

        before = show(["gain:R2", "sensor:R1", "buffer:U1 en"], 10_001)
        after = show(["buffer:U1 en", "gain:R2", "sensor:R1"], 10_002)
        # Common practice, no source: a trace keeps its colour while it stays on the plot.
        assert before == after
        assert len({colour for colour, _ in before.values()}) == 3
    finally:
        window.shutdown()


@pytest.mark.parametrize("demo", DEMOS)
def test_tree_columns_fit_at_1280_by_720(qtbot, demo: str) -> None:  # type: ignore[no-untyped-def]
    window = _window(qtbot, demo)
    try:
        tree = window.tree
        header = tree.header()
        # Common practice, no source: no column runs past the visible width of the tree.
        total = sum(header.sectionSize(column) for column in range(tree.columnCount()))
        assert total <= tree.viewport().width()
        assert header.sectionSize(0) >= 100  # room for the names, elided in the middle
        metrics = tree.fontMetrics()
        root = tree.topLevelItem(0)
        for index in range(root.childCount()):
            item = root.child(index)
            if item.data(0, Qt.ItemDataRole.UserRole) != "stage":
                continue
            state = item.text(3)
            # The review state is whole: a shape, a short word and the count, never cut.
            assert metrics.horizontalAdvance(state) <= header.sectionSize(3)
            assert any(glyph in state for glyph in "✓✗△○?")
            # The whole name is in the tooltip, whatever the column shows.
            assert item.text(0) in item.toolTip(0)
        assert tree.textElideMode() == Qt.TextElideMode.ElideMiddle
        # The project row has no expander (its width goes to the names) and stays open.
        assert not tree.rootIsDecorated()
        tree.collapseItem(root)
        assert root.isExpanded()
    finally:
        window.shutdown()


@pytest.mark.parametrize("demo", DEMOS)
def test_axis_labels_are_whole_at_1280_by_720(qtbot, demo: str) -> None:  # type: ignore[no-untyped-def]
    window = _window(qtbot, demo)
    try:
        qtbot.wait(50)
        views = {"step": window.step_view.plot, "noise": window.noise_view.plot}
        for name, plot in views.items():
            for side in ("left", "bottom"):
                axis = plot.getAxis(side)
                if not axis.label.isVisible() or not axis.labelText:
                    continue
                # Common practice, no source: a label is never longer than its axis (pyqtgraph
                # clips it), so its text along the axis fits the axis's length.
                along = axis.label.boundingRect().width()
                length = axis.size().height() if side == "left" else axis.size().width()
                assert along <= length, (name, side, axis.labelText, along, length)
            # The plot (and so its bottom label) is not pushed past the view's right edge.
            graphics = window.step_view.graphics if name == "step" else window.noise_view.graphics
            assert plot.sceneBoundingRect().right() <= graphics.viewport().width() + 1, name
        # The small step view still names what its axis holds.
        assert "Output" in views["step"].getAxis("left").labelText or "÷" in views["step"].getAxis("left").labelText
    finally:
        window.shutdown()


def _curve_points_in_scene(plot) -> list:  # type: ignore[no-untyped-def]
    import pyqtgraph as pg

    points = []
    for item in plot.listDataItems():
        if not isinstance(item, pg.PlotDataItem) or not item.isVisible():
            continue
        x, y = item.getData()
        if x is None:
            continue
        for xi, yi in zip(x, y, strict=True):
            if np.isfinite(xi) and np.isfinite(yi):
                points.append(plot.getViewBox().mapViewToScene(pg.Point(float(xi), float(yi))))
    return points


@pytest.mark.parametrize("demo", DEMOS)
def test_no_legend_covers_a_curve(qtbot, demo: str) -> None:  # type: ignore[no-untyped-def]
    import pyqtgraph as pg

    from stagewise.ui.plots import PlotView

    window = _window(qtbot, demo)
    try:
        window.overlays.set_chain(True)
        window.wait_until_idle(60, formula=False)
        checked = 0
        window.docks["spread"].raise_()  # tabbed with the noise view: show it too
        qtbot.wait(50)
        for view in window.findChildren(PlotView):
            if not view.isVisible():
                continue
            scene = view.graphics.scene()
            legends = [item for item in scene.items() if isinstance(item, pg.LegendItem) and item.isVisible()]
            plots = [item for item in view.graphics.ci.items if isinstance(item, pg.PlotItem)]
            for legend in legends:
                box = legend.sceneBoundingRect()
                for plot in plots:
                    # Common practice, no source: a legend never hides data: no curve point
                    # falls inside its rectangle.
                    assert not any(box.contains(point) for point in _curve_points_in_scene(plot)), type(view)
                    checked += 1
        assert checked > 0
    finally:
        window.shutdown()


def test_peaking_limit_is_drawn_as_a_level_above_the_pass_band_gain(qtbot) -> None:  # type: ignore[no-untyped-def]
    window = _window(qtbot, "hydrophone")
    try:
        stage = next(stage for stage in window.document.project.stages
                     if any(check.metric == "peaking_db" and check.where == "isolated" for check in stage.checks))
        check = next(check for check in stage.checks if check.metric == "peaking_db")
        window.document.set_current_stage(stage.id)
        window.wait_until_idle(60, formula=False)
        view = window.response_view
        view.refresh()
        rects = [item for item in view.magnitude_limits.items if hasattr(item, "rect")
                 and "peak ≤" in item.toolTip()]
        assert rects, view.magnitude_limits.labels
        level = rects[0].rect().top()
        f_hz, mag_db, _ = view.trace_data(f"{stage.id}:isolated")
        # Common practice, no source: a low-pass's peaking is measured against its DC gain, so
        # the limit sits at the gain at the band's low end plus the allowed peaking.
        assert level == pytest.approx(mag_db[0] + check.max.si, abs=0.01)
        assert float(np.nanmax(mag_db)) <= level  # the design meets it: the trace stays below
    finally:
        window.shutdown()


def test_loop_gain_view_marks_crossover_and_phase_margin(qtbot) -> None:  # type: ignore[no-untyped-def]
    window = _window(qtbot, "hydrophone")
    try:
        stage = next(stage for stage in window.document.project.stages if stage.id == "gain")
        window.document.set_current_stage(stage.id)
        window.wait_until_idle(60, formula=False)
        view = window.loop_view
        assert {trace.place for trace in view.shown} == {"alone", "in chain"}
        for trace in view.shown:
            item = view.magnitude_traces.items[f"loop:{trace.label}"]
            f_hz, magnitude_db = item.getOriginalDataset()
            _, phase_deg = view.phase_traces.items[f"loop:{trace.label}"].getOriginalDataset()
            assert trace.crossover_hz is not None and trace.phase_margin_deg is not None
            # Source: Bode (1945): the crossover is where |T| = 1 (0 dB), the phase margin
            # 180° + ∠T there; read here from the plotted data between grid points.
            at = np.interp(math.log10(trace.crossover_hz), np.log10(f_hz), magnitude_db)
            assert at == pytest.approx(0.0, abs=0.05)
            angle = np.interp(math.log10(trace.crossover_hz), np.log10(f_hz), phase_deg)
            assert ((180.0 + angle + 180.0) % 360.0) - 180.0 == pytest.approx(trace.phase_margin_deg, abs=0.5)
            lines = [item for plot, item in view.markers if plot is view.magnitude]
            assert any(line.value() == pytest.approx(math.log10(trace.crossover_hz)) for line in lines)
        assert "phase margin" in view.summary.text()
    finally:
        window.shutdown()


def test_transimpedance_traces_say_dbohm(qtbot) -> None:  # type: ignore[no-untyped-def]
    from stagewise.ui.overlays import ISOLATED

    window = _window(qtbot, "greenhouse")
    try:
        project = window.document.project
        current = next(stage for stage in project.stages if stage.drive == "current")
        voltage = next(stage for stage in project.stages if stage.drive != "current" and not stage.is_block)
        window.overlays.set_chain(False)
        window.overlays.show_only_stage(current.id)
        window.overlays.set_stage(current.id, "in_chain", False)
        window.wait_until_idle(60, formula=False)
        view = window.response_view
        # Common practice, no source: 20·log10 of ohms is dBΩ, never plain dB.
        assert "dBΩ" in view.magnitude.getAxis("left").labelText
        window.overlays.set_stage(voltage.id, ISOLATED, True)
        window.wait_until_idle(60, formula=False)
        label = view.magnitude.getAxis("left").labelText
        import re

        assert "dBΩ" in label and re.search(r"\bdB(?!Ω)", label)
        names = [item.opts["name"] for item in view.magnitude_traces.items.values() if item.isVisible()]
        assert any(name.endswith("(dBΩ)") for name in names) and any(name.endswith("(dB)") for name in names)
    finally:
        window.shutdown()
