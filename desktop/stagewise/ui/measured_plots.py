"""Drawing bench measurements: markers over the predicted response, and the deviation plot.

The drawing functions here (:func:`measured_phase_deg`, :func:`marker_item`,
:func:`draw_deviation`) are shared with the packet (``report/sections.py``), so a measurement
looks the same on screen and on paper. Numbers come from
:class:`stagewise.engine.measured.MeasurementComparison`; nothing is computed here but the
placement of the measured phase on the predicted trace's branch.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
import pyqtgraph as pg
from numpy.typing import NDArray
from PySide6.QtCore import Qt
from PySide6.QtGui import QColor

from stagewise.review.words import WHERE_WORDS
from stagewise.ui.overlays import CHAIN, IN_CHAIN, ISOLATED, OverlaySelection, TraceSpec
from stagewise.ui.palette import MarkerStyle, measurement_style

__all__ = [
    "MeasuredOverlay",
    "MeasuredSteps",
    "draw_deviation",
    "marker_data",
    "marker_item",
    "measured_phase_deg",
    "measurement_label",
    "measurement_summary",
    "scaled_capture",
]

STALE_WORDS = "out of date: the circuit changed after it was measured"


def measurement_label(comparison: Any) -> str:
    """The legend label of a measured trace: ``Measured: <id>``."""
    return f"Measured: {comparison.measurement.id}"


def _place(comparison: Any) -> str:
    measurement = comparison.measurement
    if measurement.where == "chain":
        return "whole chain"
    return f"{measurement.stage}, {WHERE_WORDS.get(measurement.where, measurement.where)}"


def measurement_summary(comparison: Any) -> str:
    """One line: place, largest deviations, share inside the spread, staleness."""
    words = [f"{comparison.measurement.id} ({_place(comparison)}, {comparison.points} points)"]
    if comparison.measurement.kind == "step":
        step = comparison.step
        if step is None:
            words.append(comparison.why.get("step", "no step to measure"))
        else:
            rise = "—" if step.rise_s is None else pg.siFormat(step.rise_s, suffix="s")
            overshoot = "—" if step.overshoot_pct is None else f"{step.overshoot_pct:.2g} %"
            words.append(f"step capture: rise {rise}, overshoot {overshoot}")
    elif comparison.dev_db_max is None:
        words.append(comparison.why.get("dev_db_max", "no deviation could be computed"))
    else:
        words.append(f"largest deviation {comparison.dev_db_max:.2f} dB and {comparison.dev_deg_max:.1f}°")
        if comparison.inside_spread_pct is not None:
            words.append(f"{comparison.inside_spread_pct:.0f} % of points inside the predicted spread")
    if comparison.stale:
        words.append(STALE_WORDS)
    return "; ".join(words) + "."


def measured_phase_deg(comparison: Any, trace_f_hz: NDArray[np.float64] | None = None,
                       trace_phase_deg: NDArray[np.float64] | None = None) -> NDArray[np.float64]:
    """The measured phase in degrees, on the branch of the predicted trace it is drawn against.

    The measured phase is known modulo 360°; drawn as the prediction's unwrapped phase plus the
    measured deviation (exact at every measured frequency), shifted by whole turns to meet the
    predicted trace, it sits beside the curve it is compared with.
    """
    measured = np.asarray(comparison.measured)
    if comparison.predicted is None or comparison.dev_deg is None:
        return np.asarray(np.degrees(np.unwrap(np.angle(measured))), dtype=float)
    predicted = np.degrees(np.unwrap(np.angle(np.asarray(comparison.predicted))))
    phase = predicted + np.asarray(comparison.dev_deg)
    if trace_f_hz is not None and trace_phase_deg is not None and trace_f_hz.size > 1:
        f_hz = np.asarray(comparison.f_hz)
        inside = np.flatnonzero((f_hz >= trace_f_hz[0]) & (f_hz <= trace_f_hz[-1]))
        index = int(inside[0]) if inside.size else 0
        on_trace = float(np.interp(np.log(f_hz[index]), np.log(trace_f_hz), trace_phase_deg))
        phase = phase + 360.0 * np.round((on_trace - predicted[index]) / 360.0)
    return np.asarray(phase, dtype=float)


def marker_item(f_hz: NDArray[np.float64], y: NDArray[np.float64], style: MarkerStyle) -> pg.ScatterPlotItem:
    """Markers without a line at ``f_hz`` on a log-frequency plot, in a measurement's colour and shape.

    A scatter item does not follow the plot's log mode, so it is given log10(f) itself; it is
    drawn symbol by symbol (``useCache=False``), which keeps it a vector path in the packet.
    """
    colour = QColor(style.colour)
    return pg.ScatterPlotItem(x=np.log10(np.asarray(f_hz, dtype=float)), y=np.asarray(y, dtype=float),
                              symbol=style.symbol, size=style.size, pen=pg.mkPen(colour, width=1.2),
                              brush=pg.mkBrush(255, 255, 255), useCache=False)


def marker_data(item: pg.ScatterPlotItem) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """(f_hz, y) of a :func:`marker_item` (tests read the plot items)."""
    x, y = item.getData()
    return np.asarray(10.0 ** np.asarray(x, dtype=float)), np.asarray(y, dtype=float)


def draw_deviation(plot_db: pg.PlotItem, plot_deg: pg.PlotItem | None,
                   comparisons: Sequence[tuple[Any, MarkerStyle]]) -> None:
    """Measured − predicted (dB, and degrees when ``plot_deg``) with the Monte Carlo envelope shaded.

    The envelope is each sample's ratio to the nominal at the measured frequencies: a point
    inside the shaded band lies within the predicted spread.
    """
    for plot in (plot_db, plot_deg):
        if plot is not None:
            plot.addItem(pg.InfiniteLine(pos=0.0, angle=0, pen=pg.mkPen("#808080", width=1)), ignoreBounds=True)
    for comparison, style in comparisons:
        if comparison.dev_db is None:
            continue
        f_hz = np.asarray(comparison.f_hz)
        pairs: list[tuple[pg.PlotItem, Any, Any]] = [(plot_db, comparison.envelope_db, comparison.dev_db)]
        if plot_deg is not None:
            pairs.append((plot_deg, comparison.envelope_deg, comparison.dev_deg))
        for plot, envelope, deviation in pairs:
            if envelope is not None:
                band = QColor(style.colour)
                band.setAlpha(45)
                low = pg.PlotDataItem(f_hz, np.asarray(envelope[0]), pen=pg.mkPen(band, width=0.5))
                high = pg.PlotDataItem(f_hz, np.asarray(envelope[1]), pen=pg.mkPen(band, width=0.5))
                plot.addItem(low)
                plot.addItem(high)
                plot.addItem(pg.FillBetweenItem(low, high, brush=pg.mkBrush(band)))
            line = pg.PlotDataItem(f_hz, np.asarray(deviation), pen=pg.mkPen(QColor(style.colour), width=0.8))
            plot.addItem(line)
            plot.addItem(marker_item(f_hz, np.asarray(deviation), style))


def _matches(comparison: Any, spec: TraceSpec) -> bool:
    return comparison.measurement.kind == "response" and _matches_place(comparison, spec)


def _matches_place(comparison: Any, spec: TraceSpec) -> bool:
    measurement = comparison.measurement
    if spec.view == CHAIN:
        return measurement.where == "chain"
    if spec.view in (ISOLATED, IN_CHAIN):
        return measurement.where == spec.view and measurement.stage == spec.stage_id
    return False


class MeasuredOverlay:
    """Measured markers on the response view's magnitude and phase plots.

    A measurement is drawn when it is ticked and the predicted trace of its place is shown, so
    every set of markers sits beside the curve it is compared with.
    """

    def __init__(self, magnitude: pg.PlotItem, phase: pg.PlotItem, legend: pg.LegendItem | None) -> None:
        self.magnitude = magnitude
        self.phase = phase
        self.legend = legend
        self.items: dict[str, tuple[pg.ScatterPlotItem, pg.ScatterPlotItem]] = {}

    def clear(self) -> None:
        for magnitude, phase in self.items.values():
            self.magnitude.removeItem(magnitude)
            self.phase.removeItem(phase)
            if self.legend is not None:
                self.legend.removeItem(magnitude)
        self.items = {}

    def draw(self, comparisons: Sequence[Any], shown: Sequence[tuple[TraceSpec, Any]],
             overlays: OverlaySelection) -> None:
        self.clear()
        for index, comparison in enumerate(comparisons):
            if not overlays.measurement_shown(comparison.measurement.id):
                continue
            trace = next((trace for spec, trace in shown if _matches(comparison, spec)), None)
            if trace is None:
                continue
            style = measurement_style(index)
            label = measurement_label(comparison) + (" (out of date)" if comparison.stale else "")
            magnitude = marker_item(comparison.f_hz, comparison.measured_mag_db, style)
            phase = marker_item(comparison.f_hz, measured_phase_deg(comparison, trace.f_hz, trace.phase_deg), style)
            self.magnitude.addItem(magnitude)
            self.phase.addItem(phase)
            if self.legend is not None:
                self.legend.addItem(magnitude, label)
            self.items[comparison.measurement.id] = (magnitude, phase)

    def data(self, measurement_id: str) -> tuple[np.ndarray, np.ndarray, np.ndarray] | None:
        """(f_hz, mag_db, phase_deg) drawn for a measurement (tests read the plot items)."""
        items = self.items.get(measurement_id)
        if items is None:
            return None
        f_hz, mag_db = marker_data(items[0])
        _, phase_deg = marker_data(items[1])
        return f_hz, mag_db, phase_deg


def scaled_capture(comparison: Any, predicted_final: float) -> tuple[NDArray[np.float64], NDArray[np.float64]] | None:
    """A step capture from its edge on, baseline removed and scaled so its final value is
    ``predicted_final``: the shape compared with the predicted unit step (the capture's own
    amplitude depends on the step the bench applied)."""
    step = comparison.step
    if step is None or not step.final or not np.isfinite(predicted_final):
        return None
    return np.asarray(step.t_s), np.asarray(step.y) / float(step.final) * predicted_final


class MeasuredSteps:
    """Step captures on the step view, beside the predicted step of their place (when shown)."""

    def __init__(self, plot: pg.PlotItem) -> None:
        self.plot = plot
        self.items: dict[str, pg.PlotDataItem] = {}

    def draw(self, comparisons: Sequence[Any], rows: Sequence[tuple[TraceSpec, Any, Any]],
             overlays: OverlaySelection, finals: dict[str, float] | None = None) -> None:
        for item in self.items.values():
            self.plot.removeItem(item)
        self.items = {}
        for index, comparison in enumerate(comparisons):
            if comparison.measurement.kind != "step" or not overlays.measurement_shown(comparison.measurement.id):
                continue
            row = next((row for row in rows if _matches_place(comparison, row[0])), None)
            if row is None or len(row[2]) == 0:
                continue
            # The prediction's final value when the view knows it (its window may end before the
            # step has fully settled), else its last point.
            final = (finals or {}).get(row[0].key)
            captured = scaled_capture(comparison, float(np.asarray(row[2])[-1]) if final is None else final)
            if captured is None:
                continue
            t_s, y = captured
            if self.plot.getAxis("bottom").logMode:
                t_s, y = t_s[t_s > 0], y[t_s > 0]
            style = measurement_style(index)
            pen = pg.mkPen(QColor(style.colour), width=1.4)
            pen.setStyle(Qt.PenStyle.DashDotDotLine)
            pen.setCosmetic(True)
            item = pg.PlotDataItem(t_s, y, pen=pen)
            self.plot.addItem(item)
            self.items[comparison.measurement.id] = item
