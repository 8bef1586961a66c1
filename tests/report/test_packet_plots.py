"""What the packet's plots draw, read from their plot items (``getData()``) and the PDF's text.

The packet paints its figures through one :class:`~stagewise.report.plots.PlotCanvas`; a figure
drawn inside :func:`~stagewise.report.plots.using_canvas` leaves its frame as ``canvas.last``,
so a test reads exactly the items the packet painted.
"""

from __future__ import annotations

import json
import math
import re
from pathlib import Path

import numpy as np
import pypdf
import pyqtgraph as pg
import pytest
import shiboken6
from PySide6.QtCore import QRectF
from PySide6.QtGui import QColor, QImage, QPainter

from stagewise.files.project_file import load_project
from stagewise.report.content import gather
from stagewise.report.layout import Figure
from stagewise.report.packet import _metric_provider, build_packet, ensure_application
from stagewise.report.plots import (
    PlotCanvas,
    curve_data,
    pole_zero_plot,
    render_plot,
    response_plot,
    step_plot,
    trace_from_complex,
    using_canvas,
)
from stagewise.report.sections import build_blocks
from stagewise.review.checks import evaluate_project
from stagewise.review.signoff import signoff_states

ROOT = Path(__file__).resolve().parents[2]

# A unity-gain follower on a one-pole op-amp model of our own choosing.
A0_DB, GBW_HZ = 100.0, 2.0e6
FOLLOWER = {
    "format": "stagewise-project", "version": 1, "title": "Follower loop", "revision": "A",
    "settings": {"f_min_hz": 1, "f_max_hz": 1e6, "points_per_decade": 40, "temperature_c": 25, "ref_hz": 1000,
                 "noise_band_hz": [10, 20000], "seed": 3},
    "input": {"drive": "voltage", "amplitude": "10m"},
    "converter": {"fs_hz": 96000, "bits": 16, "full_scale_vpp": 5},
    "load": {"r_ohm": None, "c_f": None},
    "opamp_models": {"one-pole-2M": {"a0_db": A0_DB, "gbw_hz": GBW_HZ, "rout_ohm": 0}},
    "stages": [{"id": "buf", "name": "Follower", "drive": "voltage", "ports": {"in": "in", "out": "out"},
                "parts": [{"ref": "R1", "type": "R", "nodes": ["in", "0"], "value": "470k"},
                          {"ref": "U1", "type": "opamp", "nodes": ["in", "out", "out"], "model": "one-pole-2M"}],
                "checks": [], "signoffs": [], "comments": [], "notes": ""}],
    "audit": [],
}


def _blocks(path: Path) -> list[object]:
    ensure_application()
    project = load_project(path)
    content = gather(project, path)
    assert content is not None
    results = evaluate_project(project, _metric_provider(content))
    return build_blocks(content, results, signoff_states(project), "2026-12-03T12:00:00Z")


def _drawn(figure: Figure, canvas: PlotCanvas) -> pg.GraphicsLayoutWidget:
    """Paint ``figure`` as the packet does and return the frame it was drawn in."""
    image = QImage(700, int(figure.figure_height), QImage.Format.Format_ARGB32)
    image.fill(QColor("white"))
    painter = QPainter(image)
    try:
        figure.draw(painter, QRectF(0, 0, 700, figure.figure_height))
    finally:
        painter.end()
    assert canvas.last is not None
    return canvas.last


def _figure(blocks: list[object], caption_start: str, after: str = "") -> Figure:
    figures = [block for block in blocks if isinstance(block, Figure)]
    found = [figure for figure in figures if figure.caption.startswith(caption_start) and after in figure.caption]
    assert found, [figure.caption[:60] for figure in figures]
    return found[0]


def test_packet_draws_the_peaking_limit_as_the_program_does() -> None:
    blocks = _blocks(ROOT / "projects" / "hydrophone.stagewise.json")
    project = load_project(ROOT / "projects" / "hydrophone.stagewise.json")
    check = next(check for stage in project.stages for check in stage.checks
                 if check.metric == "peaking_db" and check.where == "isolated")
    # The stage's response figure: the one whose caption mentions the peaking level.
    figures = [block for block in blocks if isinstance(block, Figure) and "peaking check allows" in block.caption]
    assert len(figures) == 1
    with using_canvas() as canvas:
        magnitude = _drawn(figures[0], canvas).ci.getItem(0, 0)
        curves = curve_data(magnitude)
        isolated_f, isolated_db = curves[0]
        level = [y for x, y in curves if len(y) == 2 and y[0] == y[1]]
        assert len(level) == 1
        # Common practice, no source: a low-pass's peaking is measured against its DC gain, so
        # the limit sits at the gain at the band's low end plus the allowed peaking, across the band.
        assert level[0][0] == pytest.approx(isolated_db[0] + check.max.si, abs=0.01)
        assert float(np.max(isolated_db)) <= level[0][0]  # the design meets it: the trace stays below
        labels = [item.textItem.toPlainText() for item in magnitude.items if isinstance(item, pg.TextItem)]
        assert f"{check.id} (alone): peak ≤ {level[0][0]:.2f} dB" in labels, labels


def test_packet_loop_gain_plot_marks_the_crossover_and_phase_margin(tmp_path: Path) -> None:
    path = tmp_path / "follower.stagewise.json"
    path.write_text(json.dumps(FOLLOWER), encoding="utf-8")
    blocks = _blocks(path)
    figure = _figure(blocks, "Traces: U1 alone")
    with using_canvas() as canvas:
        widget = _drawn(figure, canvas)
        magnitude, phase = widget.ci.getItem(0, 0), widget.ci.getItem(1, 0)
        assert magnitude.getAxis("left").labelText == "|T| (dB)"
        assert phase.getAxis("left").labelText == "∠T (°)"
        (f_hz, magnitude_db), *_ = curve_data(magnitude)
        (_, phase_deg), *_ = curve_data(phase)
        markers = [item.value() for item in magnitude.items
                   if isinstance(item, pg.InfiniteLine) and item.angle == 90]
        assert markers
        crossover_hz = 10.0 ** markers[0]
        # Source: single-pole op-amp, A(s) = A0/(1 + s/ωp) with ωp = 2π·GBW/A0; a follower has
        # β = 1, so T = A and |T| = 1 at f = sqrt(GBW² − fp²) ≈ GBW, where ∠T = −atan(f/fp)
        # (any control text, e.g. Ogata, Modern Control Engineering, ch. 7).
        fp = GBW_HZ / 10.0 ** (A0_DB / 20.0)
        expected_hz = math.sqrt(GBW_HZ**2 - fp**2)
        assert crossover_hz == pytest.approx(expected_hz, rel=1e-3)
        assert float(np.interp(math.log10(crossover_hz), np.log10(f_hz), magnitude_db)) == pytest.approx(0.0, abs=0.05)
        phase_at = float(np.interp(math.log10(crossover_hz), np.log10(f_hz), phase_deg))
        expected_margin = 180.0 - math.degrees(math.atan(expected_hz / fp))
        assert 180.0 + phase_at == pytest.approx(expected_margin, abs=0.2)
    # The margin in words under the plot, in the PDF as a reader sees it.
    output = tmp_path / "follower.pdf"
    build_packet(load_project(path), path, output, printed_utc="2026-12-03T12:00:00Z")
    text = " ".join(" ".join(page.extract_text() for page in pypdf.PdfReader(str(output)).pages).split())
    assert re.search(rf"U1 alone: crossover 2 MHz, phase margin {expected_margin:.1f}°", text), text[-2000:]
    assert "|T| (dB)" in text and "Loop gain" in text


def test_reused_frames_draw_what_new_frames_draw() -> None:
    ensure_application()
    f_hz = np.logspace(0, 6, 301)
    first = [trace_from_complex("a", f_hz, 1.0 / (1.0 + 1j * f_hz / 1e3))]
    second = [trace_from_complex("b", f_hz, 10.0 / (1.0 + 1j * f_hz / 1e4) ** 2)]
    with PlotCanvas() as canvas:
        response_plot(first, canvas=canvas, legend=False)
        reused = response_plot(second, canvas=canvas, legend=False)
        fresh = response_plot(second, legend=False)
        try:
            for row in (0, 1):
                old, new = reused.ci.getItem(row, 0), fresh.ci.getItem(row, 0)
                assert len(curve_data(old)) == len(curve_data(new)) == 1  # the first figure's curve is gone
                # Common practice, no source: the same data gives the same axes.
                assert np.allclose(old.getViewBox().viewRange(), new.getViewBox().viewRange())
        finally:
            shiboken6.delete(fresh)
        planes = [pole_zero_plot([complex(-1e3, 2e3), complex(-1e3, -2e3)], [], 1e6, canvas=canvas)
                  for _ in range(2)]
        scatters = [item for item in planes[1].ci.getItem(0, 0).items if isinstance(item, pg.ScatterPlotItem)]
        assert len(scatters) == 1  # the second figure's poles only


def test_step_plot_of_a_transimpedance_shows_the_whole_step() -> None:
    # A photodiode stage's step in V per A reaches 2e8: the plot's range holds it whole (a
    # PlotDataItem clips data beyond 1e6 times its view height, and the trace vanished).
    ensure_application()
    t_s = np.linspace(0.0, 1.0, 400)
    y = 2.0e8 * (1.0 - np.exp(-t_s / 0.1))
    with PlotCanvas() as canvas:
        widget = step_plot([("isolated", t_s, y)], "output (V per A) for a unit step", canvas=canvas)
        image = QImage(700, 210, QImage.Format.Format_ARGB32)
        painter = QPainter(image)
        try:
            render_plot(widget, painter, QRectF(0, 0, 700, 210))  # as the packet paints it
        finally:
            painter.end()
        plot = widget.ci.getItem(0, 0)
        (_, y_low), (_, y_high) = zip(*plot.getViewBox().viewRange(), strict=True)
        # Common practice, no source: the axis spans the data it draws.
        assert y_low <= 0.0 and y_high >= 2.0e8 * (1.0 - math.exp(-10.0))
        (_, drawn), = curve_data(plot)
        assert float(drawn.max()) == pytest.approx(float(y.max()))


def test_a_canvas_keeps_a_bounded_number_of_frames() -> None:
    # A 200-stage chain has as many pole-zero planes: the canvas keeps the recent ones only.
    ensure_application()
    with PlotCanvas() as canvas:
        for decade in range(PlotCanvas.MAX_FRAMES + 5):
            pole = complex(-(10.0 ** (decade % 9)), 0.0)
            pole_zero_plot([pole], [], 10.0 ** (10 + decade), canvas=canvas)
        assert len(canvas) == PlotCanvas.MAX_FRAMES
        scatters = [item for item in canvas.last.ci.getItem(0, 0).items if isinstance(item, pg.ScatterPlotItem)]
        assert len(scatters) == 1
