"""The packet's bench-measurement section: one sub-section per measurement attached to the project.

Each shows where it was taken and what it was measured against, the instrument file's name and
SHA-256, who attached it and when, the measured points over the prediction (the GUI's markers,
:mod:`stagewise.ui.measured_plots`), the deviation with the Monte Carlo band, and the states of
the checks on measured metrics at its place. The numbers are those of ``analyze --json``
(:mod:`stagewise.engine.measured` through the packet's analysis object).
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
import pyqtgraph as pg
from PySide6.QtGui import QColor

from stagewise.model.values import format_value
from stagewise.report.content import PacketContent
from stagewise.report.layout import MUTED, Block, Column, Heading, PageBreak, Paragraph, Table
from stagewise.report.plots import (
    PRINT,
    FrequencyAxis,
    _label,
    _style_axes,
    response_plot,
    step_plot,
    trace_from_complex,
)
from stagewise.review.checks import CheckResult, CheckState
from stagewise.review.metrics import METRICS
from stagewise.review.words import WHERE_WORDS
from stagewise.ui.measured_plots import (
    STALE_WORDS,
    draw_deviation,
    marker_item,
    measured_phase_deg,
    measurement_label,
)
from stagewise.ui.palette import measurement_style

__all__ = ["measurement_blocks"]

MEASURED_METRICS = ("measured_dev_db_max", "measured_dev_deg_max", "measured_inside_spread_pct", "measured_rise_s",
                    "measured_overshoot_pct", "measured_settle_1pct_s")
DASH = "—"


def _comparisons(content: PacketContent) -> list[Any]:
    provider = content.provider
    if provider is not None and hasattr(provider, "measurements"):
        return list(provider.measurements)
    from stagewise.engine.measured import compare_measurement  # noqa: PLC0415

    return [compare_measurement(content.project, item) for item in content.project.measurements]


def _place(measurement: Any) -> str:
    if measurement.where == "chain":
        return "the whole chain (drive to last output)"
    return f'stage "{measurement.stage}", {WHERE_WORDS.get(measurement.where, measurement.where)}'


def _number(value: float | None, unit: str, digits: int = 3) -> str:
    if value is None or not np.isfinite(value):
        return DASH
    if unit in ("dB", "°", "%"):
        return f"{value:.{digits}g} {unit}"
    return format_value(float(value), unit, digits)


def _overlay(comparison: Any, style_index: int) -> Any:
    prediction = trace_from_complex("prediction", comparison.f_hz, comparison.predicted)
    widget = response_plot([prediction], legend=False)
    style = measurement_style(style_index)
    magnitude, phase = widget.ci.getItem(0, 0), widget.ci.getItem(1, 0)
    magnitude.addItem(marker_item(comparison.f_hz, comparison.measured_mag_db, style))
    phase.addItem(marker_item(comparison.f_hz, measured_phase_deg(comparison, prediction.f_hz, prediction.phase_deg),
                              style))
    return widget


def _deviation(comparison: Any, style_index: int) -> Any:
    widget = pg.GraphicsLayoutWidget()
    widget.setBackground(PRINT.background)
    plots = []
    for row, label in enumerate(("measured − predicted (dB)", "measured − predicted (°)")):
        plot = widget.addPlot(row=row, col=0, axisItems={"bottom": FrequencyAxis("bottom")}, enableMenu=False)
        _style_axes(plot, PRINT)
        plot.setLogMode(x=True, y=False)
        _label(plot, "left", label, PRINT)
        plot.getAxis("left").setWidth(64)
        plots.append(plot)
    plots[1].setXLink(plots[0])
    _label(plots[1], "bottom", "frequency (Hz)", PRINT)
    draw_deviation(plots[0], plots[1], [(comparison, measurement_style(style_index))])
    return widget


def _checks_at(measurement: Any, content: PacketContent, results: Sequence[CheckResult]) -> list[CheckResult]:
    chosen = []
    for result in results:
        if result.metric not in MEASURED_METRICS or result.where != measurement.where:
            continue
        if measurement.where != "chain" and result.stage_id != measurement.stage:
            continue
        chosen.append(result)
    return chosen


def _one(comparison: Any, index: int, content: PacketContent, results: Sequence[CheckResult]) -> list[Block]:
    from stagewise.report.sections import _plot_figure  # noqa: PLC0415 - sections imports this module

    measurement = comparison.measurement
    blocks: list[Block] = [Heading(f"Measurement {measurement.id}: {_place(measurement)}", 2)]
    state = f"OUT OF DATE ({STALE_WORDS})" if comparison.stale else "current: the circuit is as it was measured"
    rows = [
        ("File", measurement.file),
        ("SHA-256 of the file", measurement.sha256),
        ("Read as", measurement.source or DASH),
        ("Attached by", f"{measurement.by}, {measurement.time}"),
        ("Instrument", measurement.instrument or DASH),
        ("Set-up", measurement.setup or DASH),
        ("Note", measurement.note or DASH),
        ("State", state),
        ("Points", str(comparison.points)),
    ]
    if measurement.kind == "response":
        for key, unit in (("dev_db_max", "dB"), ("dev_deg_max", "°"), ("dev_db_rms", "dB"), ("dev_deg_rms", "°")):
            value = getattr(comparison, key)
            label = {"dev_db_max": "Largest gain deviation", "dev_deg_max": "Largest phase deviation",
                     "dev_db_rms": "RMS gain deviation", "dev_deg_rms": "RMS phase deviation"}[key]
            rows.append((label, _number(value, unit) if value is not None else
                         f"{DASH} ({comparison.why.get(key, comparison.why.get('dev_db_max', 'not computed'))})"))
        inside = comparison.inside_spread_pct
        rows.append(("Inside the predicted spread", f"{inside:.1f} % of the points" if inside is not None else
                     f"{DASH} ({comparison.why.get('inside_spread_pct', 'not computed')})"))
    table = Table([Column("", wrap=False), Column("")], [list(row) for row in rows], size_px=10.5, header=False,
                  row_marks=["bad" if label == "State" and comparison.stale else "" for label, _ in rows])
    blocks.append(table)
    style = measurement_style(index)
    if measurement.kind == "response" and comparison.predicted is not None:
        blocks.append(_plot_figure(lambda _canvas: _overlay(comparison, index), 300.0,
                                   f"{measurement_label(comparison)}: {style.colour_name} {style.symbol_name} markers; "
                                   "the prediction at the same place: black line. The measured phase is drawn on "
                                   "the prediction's branch (known modulo 360°)."))
    if measurement.kind == "response" and comparison.dev_db is not None:
        blocks.append(_plot_figure(lambda _canvas: _deviation(comparison, index), 250.0,
                                   "Measured minus predicted at each measured frequency. Shaded: the Monte Carlo "
                                   "envelope of the prediction (each sample relative to the nominal); a point inside "
                                   "the band lies within the predicted spread."))
    if measurement.kind == "step":
        t_s, v = np.asarray(comparison.t_s), np.asarray(comparison.v)
        blocks.append(_plot_figure(lambda canvas: step_plot([("capture", t_s, v)], "captured output (V)",
                                                                     canvas=canvas), 210.0,
                                   "The step capture as recorded; time zero at the input edge."))
        step = comparison.step
        if step is None:
            blocks.append(Paragraph(f"Step metrics: {comparison.why.get('step', 'not measurable')}.", 11.0))
        else:
            entries = (content.analysis or {}).get("measurements") or []
            entry = next((item for item in entries if item.get("id") == measurement.id), {})
            predicted = entry.get("predicted_step") or {}

            def predicted_text(key: str, unit: str) -> str:
                value = predicted.get(key)
                return _number(value, unit) if value is not None else DASH

            blocks.append(Table([Column("step metric"), Column("measured", "right"),
                                 Column("predicted (per unit step)", "right")], [
                ["Rise time (10–90 %)", _number(step.rise_s, "s"), predicted_text("rise_s", "s")],
                ["Overshoot", _number(step.overshoot_pct, "%"), predicted_text("overshoot_pct", "%")],
                ["Settling time (1 %)", _number(step.settle_1pct_s, "s"), predicted_text("settle_1pct_s", "s")],
                ["Final value", _number(step.final, "V"), predicted_text("final", "")],
            ], size_px=10.5))
            if not predicted:
                blocks.append(_unavailable_text(f"Predicted step: {entry.get('predicted_step_why') or 'not available'}."))
    checks = _checks_at(measurement, content, results)
    if checks:
        rows_checks = [[f"{result.stage_id}/{result.check_id}", METRICS[result.metric or ""].label, result.limits or DASH,
                        result.value_text(), str(result.state), result.why or ""] for result in checks]
        marks = ["bad" if result.state in (CheckState.NOT_MET, CheckState.NO_VALUE) else "" for result in checks]
        blocks.append(Table([Column("check"), Column("metric"), Column("limits", wrap=False),
                             Column("value", "right", wrap=False), Column("status", wrap=False), Column("reason")],
                            rows_checks, size_px=10.5, row_marks=marks))
    else:
        blocks.append(Paragraph("No check names a measured metric at this place.", 10.5, italic=True,
                                color=QColor(MUTED)))
    return blocks


def _unavailable_text(text: str) -> Paragraph:
    return Paragraph(text, 10.5, italic=True, color=QColor(MUTED))


def measurement_blocks(content: PacketContent, results: Sequence[CheckResult]) -> list[Block]:
    """The "Bench measurements" section (nothing when the project has none)."""
    if not content.project.measurements:
        return []
    blocks: list[Block] = [PageBreak(), Heading("Bench measurements", 1),
                           Paragraph("Measured responses against the prediction at the place each was taken. The "
                                     "points are kept in the project file; the SHA-256 names the instrument file "
                                     "they were read from. A measurement is out of date when the circuit it "
                                     "depends on has changed since.", 11.0)]
    for index, comparison in enumerate(_comparisons(content)):
        blocks.extend(_one(comparison, index, content, results))
    return blocks
