"""The plot views: response (magnitude and phase), step, poles and zeros, noise, spread.

Each view owns its pyqtgraph items, created once per trace and updated with ``setData``; it
draws result records from :mod:`stagewise.ui.analyses` and never computes anything itself.
A header line says whether the results are current, still being recomputed, or could not be
computed (with the reason).
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Iterable
from typing import Any

import numpy as np
import pyqtgraph as pg
from PySide6.QtCore import QPointF, QRectF, Qt, Signal
from PySide6.QtGui import QBrush, QColor, QPen
from PySide6.QtWidgets import QGraphicsRectItem, QLabel, QVBoxLayout, QWidget

from stagewise.model.values import format_value
from stagewise.present.limits import limit_shapes, peaking_level
from stagewise.present.loops import loop_summary
from stagewise.ui.analyses import ResponseTrace, finite
from stagewise.ui.document import Document
from stagewise.ui.measured_plots import MeasuredOverlay, MeasuredSteps
from stagewise.ui.overlays import BASELINE, CHAIN, FROM_INPUT, IN_CHAIN, ISOLATED, OverlaySelection, TraceSpec
from stagewise.ui.palette import OKABE_ITO, PLOT_OPTIONS, limit_brush_colour
from stagewise.ui.subscriptions import Subscriptions
from stagewise.ui.worker import Computed, ComputeWorker, Outcome

__all__ = ["LoopGainView", "NoiseView", "PlotView", "PoleZeroView", "ResponseView", "SpreadView", "StepView", "limit_shapes"]

pg.setConfigOptions(**PLOT_OPTIONS)

# Step traces whose windows differ by more than this factor are framed by the fastest one.
SPAN_RATIO_SHOWN = 20.0
STALE_TEXT = "Recomputing… the traces show the previous results."
PARTLY_STALE_TEXT = "Computing the slower results; shown from before the last edit until they arrive: {what}."


def _pen(spec: TraceSpec) -> QPen:
    pen = pg.mkPen(color=spec.style.colour, width=spec.style.width)
    pen.setStyle(spec.style.line)
    pen.setCosmetic(True)
    return pen


def _log_axis(plot: pg.PlotItem) -> None:
    plot.setLogMode(x=True, y=False)
    # Without this a log axis reads "10⁻⁶ … 1 (MHz)" instead of plain hertz.
    plot.getAxis("bottom").enableAutoSIPrefix(False)


def _bode_pair(graphics: pg.GraphicsLayoutWidget, axis_width: int) -> tuple[pg.PlotItem, pg.PlotItem]:
    """Magnitude above phase on log-frequency axes with a grid (rows 0 and 1 of ``graphics``)."""
    magnitude = graphics.addPlot(row=0, col=0)
    phase = graphics.addPlot(row=1, col=0)
    for plot in (magnitude, phase):
        _log_axis(plot)
        plot.showGrid(x=True, y=True, alpha=0.25)
        plot.getAxis("left").enableAutoSIPrefix(False)
        plot.getAxis("left").setWidth(axis_width)
    return magnitude, phase


def result_for(outcome: Outcome | None, spec: TraceSpec, kind: str) -> Computed:
    """The result a trace shows for ``kind`` (``response``, ``step``, ``poles``).

    The chain and stages alone use ``kind``; stages in chain ``in_chain_<kind>``, seen from the
    chain input ``from_input_<kind>``; the baseline
    ``baseline_<kind>`` (chain results of the baseline project).
    """
    if outcome is None:
        return Computed(None, "not computed yet")
    name = {CHAIN: kind, ISOLATED: kind, IN_CHAIN: f"in_chain_{kind}", FROM_INPUT: f"from_input_{kind}",
            BASELINE: f"baseline_{kind}"}[spec.view]
    if spec.view in (CHAIN, BASELINE):
        return outcome.of_chain(name)
    return outcome.of_stage(spec.stage_id, name)


def _entry(outcome: Outcome, key: tuple[str, str]) -> Computed | None:
    where, name = key
    return outcome.chain.get(name) if where == "chain" else outcome.stage.get(where, {}).get(name)


class PlotView(QWidget):
    """Base of the plot views: header line, stale marking, subscriptions and clean-up.

    A new outcome whose results read by the last drawing are the very objects already drawn
    (the worker carries unchanged results from phase to phase) changes only the header.
    """

    updated = Signal()

    def __init__(self, document: Document, worker: ComputeWorker, overlays: OverlaySelection,
                 parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.document = document
        self.worker = worker
        self.overlays = overlays
        self.outcome: Outcome | None = worker.latest
        self.header = QLabel(self)
        self.header.setWordWrap(True)
        self.header.setTextFormat(Qt.TextFormat.PlainText)
        self.header.setObjectName("plotHeader")
        self.graphics = pg.GraphicsLayoutWidget(self)
        self.graphics.setMinimumSize(150, 130)
        layout = QVBoxLayout(self)
        layout.setContentsMargins(4, 2, 4, 2)
        layout.setSpacing(2)
        layout.addWidget(self.header)
        layout.addWidget(self.graphics, 1)
        self._problems: list[str] = []
        self._read: set[tuple[str, str]] = set()
        self.subscriptions = Subscriptions()
        self.subscriptions.connect_all([
            (worker.outcomeReady, self._on_outcome),
            (worker.busyChanged, self._on_busy),
            (overlays.changed, self.refresh),
            (document.currentStageChanged, self._on_selection),
            (document.projectReplaced, self.refresh),
            (document.chainChanged, self.refresh),
        ])

    def disconnect_all(self) -> None:
        """Stop listening to the document and the worker (the window calls this when it closes)."""
        self.subscriptions.close()

    def _on_outcome(self, outcome: Outcome) -> None:
        previous, self.outcome = self.outcome, outcome
        # The worker carries unchanged results from phase to phase as the same objects: when
        # everything this view read in its last drawing is unchanged, only the header changes.
        if previous is not None and self._read and all(
                _entry(outcome, key) is _entry(previous, key) for key in self._read):
            self._show_header()
            return
        self.refresh()

    def _on_selection(self, _stage_id: str) -> None:
        self.refresh()

    def _on_busy(self, _busy: bool) -> None:
        self._show_header()

    def _previous_shown(self) -> list[str]:
        """Names of what this view draws from before the last edit (slower results still coming)."""
        outcome = self.outcome
        if outcome is None:
            return []
        shown = {(key, name) for key, name in self._read if outcome.is_previous(key, name)
                 and (outcome.chain.get(name) if key == "chain" else outcome.stage.get(key, {}).get(name)) is not None}
        drawn = []
        for key, name in shown:
            computed = outcome.chain[name] if key == "chain" else outcome.stage[key][name]
            if computed.ok and not (isinstance(computed.value, list) and not computed.value):
                drawn.append(name.replace("_", " "))
        return sorted(set(drawn))

    def _show_header(self) -> None:
        """Say what the traces show: all new, partly from before the last edit, or all previous."""
        previous = self._previous_shown()
        busy = bool(self.worker.quick_pending or previous)
        if self.worker.quick_pending:
            lines = [STALE_TEXT]
        elif previous:
            lines = [PARTLY_STALE_TEXT.format(what=", ".join(previous))]
        else:
            lines = []
        lines.extend(self._problems)
        self.header.setText("\n".join(lines) if lines else "Up to date.")
        self.header.setStyleSheet("color: #8a4b00; font-style: italic;" if busy else
                                  ("color: #7a1f00;" if self._problems else "color: #505050;"))
        self.header.setProperty("stale", busy)

    def specs(self) -> list[TraceSpec]:
        return self.overlays.traces(self.document.project, self.document.baseline is not None)

    def refresh(self) -> None:
        """Redraw from the latest outcome and the current overlay selection."""
        for item in self.graphics.ci.items:
            if isinstance(item, pg.PlotItem) and item.menuEnabled():
                _no_stock_menu(item)
        self._problems = []
        outcome = self.outcome
        if outcome is not None:
            outcome.begin_reading()
        try:
            self.draw()
        finally:
            self._read = outcome.end_reading() if outcome is not None else set()
        self._show_header()
        self._fit_legends()
        self.updated.emit()

    def resizeEvent(self, event: Any) -> None:  # noqa: N802 - Qt's name
        super().resizeEvent(event)
        self._fit_legends()

    def _fit_legends(self) -> None:
        """Fewer legend columns when the entries side by side would be wider than the view: a
        legend wider than its view pushes the plots' right edge (and their labels) out of sight."""
        width = self.graphics.viewport().width() - 16.0
        for item in list(self.graphics.ci.items):
            if not isinstance(item, pg.LegendItem):
                continue
            most = item.__dict__.setdefault("_most_columns", item.columnCount)
            widest = max((sample.boundingRect().width() + label.boundingRect().width() + 12.0
                          for sample, label in item.items), default=0.0)
            columns = max(1, min(most, int(width // widest))) if widest > 0 else most
            if item.columnCount != columns:
                item.setColumnCount(columns)

    def draw(self) -> None:  # pragma: no cover - every view overrides it
        raise NotImplementedError

    def note(self, label: str, computed: Computed) -> None:
        """Record why a trace is missing; shown in the header (not while it is still coming)."""
        if computed.why == "not computed yet" and (self.worker.is_busy or self.worker.spread_busy):
            return
        if not computed.ok:
            self._problems.append(f"{label}: {computed.why}")


class _TraceItems:
    """The plot items of one trace key in one plot, created once and reused.

    Pens and the legend are touched only when the set of traces or their styles change; a new
    result only calls ``setData``.
    """

    def __init__(self, plot: pg.PlotItem, legend: pg.LegendItem | None) -> None:
        self.plot = plot
        self.legend = legend
        self.items: dict[str, pg.PlotDataItem] = {}
        self._styles: dict[str, tuple[str, object, float]] = {}
        self._legend_entries: list[tuple[str, str]] = []

    def show(self, specs: Iterable[tuple[TraceSpec, Any, Any]]) -> None:
        """Set the data of the wanted traces, hide the others. Each tuple is (spec, x, y)."""
        wanted: list[tuple[str, str]] = []
        for spec, x, y in specs:
            wanted.append((spec.key, spec.label))
            item = self.items.get(spec.key)
            if item is None:
                item = pg.PlotDataItem()
                self.plot.addItem(item)
                self.items[spec.key] = item
            style = (spec.style.colour, spec.style.line, spec.style.width)
            if self._styles.get(spec.key) != style:
                item.setPen(_pen(spec))
                self._styles[spec.key] = style
            item.setData(x, y)
            item.opts["name"] = spec.label
            if not item.isVisible():
                item.setVisible(True)
        keys = {key for key, _ in wanted}
        for key, item in self.items.items():
            if key not in keys and item.isVisible():
                item.setVisible(False)
                item.setData([], [])
        if self.legend is not None and wanted != self._legend_entries:
            self.legend.clear()
            for key, label in wanted:
                self.legend.addItem(self.items[key], label)
            self._legend_entries = wanted


class _LimitLayer:
    """Shaded check limits on one plot (items rebuilt when the checks change; few and cheap)."""

    def __init__(self, plot: pg.PlotItem, log_x: bool) -> None:
        self.plot = plot
        self.log_x = log_x
        self.items: list[Any] = []
        self.labels: list[str] = []
        self._shapes: list[tuple[str, tuple[float, float], tuple[float, float]]] = []

    def set_shapes(self, shapes: list[tuple[str, tuple[float, float], tuple[float, float]]]) -> None:
        if shapes == self._shapes:
            return
        self._shapes = list(shapes)
        for item in self.items:
            self.plot.removeItem(item)
        self.items = []
        self.labels = []
        brush = QBrush(limit_brush_colour(60))
        border = QPen(QColor(OKABE_ITO[1][1]), 0)
        border.setStyle(Qt.PenStyle.DashLine)
        border.setCosmetic(True)
        big = 1e6
        for number, (label, (x0, x1), (y0, y1)) in enumerate(shapes):
            if self.log_x:
                x0 = math.log10(x0) if x0 > 0 and math.isfinite(x0) else -big
                x1 = math.log10(x1) if math.isfinite(x1) else big
            else:
                x0 = x0 if math.isfinite(x0) else -big
                x1 = x1 if math.isfinite(x1) else big
            y0 = y0 if math.isfinite(y0) else -big
            y1 = y1 if math.isfinite(y1) else big
            rect = QGraphicsRectItem(QRectF(QPointF(x0, y0), QPointF(x1, y1)).normalized())
            rect.setBrush(brush)
            rect.setPen(border)
            rect.setZValue(-10)
            rect.setToolTip(label)
            self.plot.addItem(rect, ignoreBounds=True)
            # Labels alternate above and below their region so that neighbours do not overlap.
            above = number % 2 == 0
            text = pg.TextItem(label, color=OKABE_ITO[1][1], anchor=(0, 1) if above else (0, 0))
            font = text.textItem.font()
            font.setPointSizeF(8)
            text.setFont(font)
            y_label = y1 if above else y0
            if not -big < y_label < big:
                y_label = y0 if -big < y0 < big else (y1 if -big < y1 < big else 0)
            text.setPos(x0 if x0 > -big else 0, y_label)
            self.plot.addItem(text, ignoreBounds=True)
            self.items.extend([rect, text])
            self.labels.append(label)


class ResponseView(PlotView):
    """Magnitude and phase on linked log-frequency axes, with legend, limits and a cursor."""

    def __init__(self, document: Document, worker: ComputeWorker, overlays: OverlaySelection,
                 parent: QWidget | None = None) -> None:
        super().__init__(document, worker, overlays, parent)
        self.magnitude, self.phase = _bode_pair(self.graphics, 64)
        self.magnitude.setLabel("left", "Magnitude", units="dB")
        self.phase.setLabel("left", "Phase", units="°")
        self.phase.setLabel("bottom", "Frequency (Hz)")
        self.phase.setXLink(self.magnitude)
        # The legend sits below the plots, outside the data area: it never covers a curve.
        self.legend = pg.LegendItem(labelTextSize="8pt", colCount=2, verSpacing=-6)
        self.graphics.addItem(self.legend, row=2, col=0)
        self.magnitude_traces = _TraceItems(self.magnitude, self.legend)
        self.phase_traces = _TraceItems(self.phase, None)
        self.magnitude_limits = _LimitLayer(self.magnitude, log_x=True)
        self.phase_limits = _LimitLayer(self.phase, log_x=True)
        self.measured = MeasuredOverlay(self.magnitude, self.phase, self.legend)
        self.cursor_lines = [pg.InfiniteLine(angle=90, movable=False, pen=pg.mkPen("#808080", width=1))
                             for _ in (self.magnitude, self.phase)]
        for plot, line in zip((self.magnitude, self.phase), self.cursor_lines, strict=True):
            plot.addItem(line, ignoreBounds=True)
            line.setVisible(False)
        self.readout = QLabel("Point at a trace to read frequency, dB and degrees.", self)
        self.readout.setObjectName("cursorReadout")
        self.readout.setTextFormat(Qt.TextFormat.PlainText)
        self.readout.setWordWrap(True)
        self.layout().addWidget(self.readout)
        self._shown: list[tuple[TraceSpec, ResponseTrace]] = []
        self._mouse_proxy = pg.SignalProxy(self.graphics.scene().sigMouseMoved, rateLimit=30, slot=self._mouse_moved)
        self.subscriptions.connect(document.stageChanged, self._on_stage_changed)
        self.refresh()

    def _on_stage_changed(self, _stage_id: str) -> None:
        self._draw_limits()

    def draw(self) -> None:
        shown: list[tuple[TraceSpec, ResponseTrace]] = []
        for spec in self.specs():
            computed = result_for(self.outcome, spec, "response")
            if computed.ok:
                shown.append((spec, computed.value))
            elif self.outcome is not None:
                self.note(spec.label, computed)
        units = {trace.unit for _, trace in shown}
        if len(units) > 1:
            # Two units on one axis, said in each trace's legend entry and on the axis.
            shown = [(dataclasses.replace(spec, label=f"{spec.label} ({decibel_unit(trace.unit)})"), trace)
                     for spec, trace in shown]
        self._shown = shown
        self.magnitude_traces.show((spec, trace.f_hz, finite(trace.mag_db)) for spec, trace in shown)
        self.phase_traces.show((spec, trace.f_hz, finite(trace.phase_deg)) for spec, trace in shown)
        if len(units) > 1:
            label = "|H| (" + ", ".join(sorted(decibel_unit(unit) for unit in units)) + ")"
        else:
            label = f"|H| ({decibel_unit(next(iter(units)) if units else 'V/V')})"
        self.magnitude.setLabel("left", label)
        measured = self.outcome.of_chain("measurements") if self.outcome is not None else None
        self.measured.draw(measured.value if measured is not None and measured.ok else [], shown, self.overlays)
        self._draw_limits()

    def _draw_limits(self) -> None:
        stage = self.document.current_stage
        magnitude: list[tuple[str, tuple[float, float], tuple[float, float]]] = []
        phase: list[tuple[str, tuple[float, float], tuple[float, float]]] = []
        if stage is not None:
            references = self.outcome.of_stage(stage.id, "peaking_reference") if self.outcome is not None else None
            for check in stage.checks:
                for plot, label, x_range, y_range in limit_shapes(check, self.document.project):
                    if plot == "magnitude":
                        magnitude.append((label, x_range, y_range))
                    elif plot == "phase":
                        phase.append((label, x_range, y_range))
                if references is not None and references.ok:
                    # Peaking is the peak gain over the pass-band reference: its limit is a level.
                    shape = peaking_level(check, references.value.get(check.where))
                    if shape is not None:
                        magnitude.append(shape[1:])
        self.magnitude_limits.set_shapes(magnitude)
        self.phase_limits.set_shapes(phase)

    def trace_data(self, key: str) -> tuple[np.ndarray, np.ndarray, np.ndarray] | None:
        """The (f_hz, mag_db, phase_deg) drawn for a trace key (tests read the plot items)."""
        magnitude = self.magnitude_traces.items.get(key)
        phase = self.phase_traces.items.get(key)
        if magnitude is None or phase is None or not magnitude.isVisible():
            return None
        # getData() returns the displayed (log10-mapped) x; the dataset as given is what was drawn.
        f_hz, mag_db = magnitude.getOriginalDataset()
        _, phase_deg = phase.getOriginalDataset()
        return f_hz, mag_db, phase_deg

    def _mouse_moved(self, event: tuple[QPointF]) -> None:
        position = event[0]
        for plot in (self.magnitude, self.phase):
            if plot.sceneBoundingRect().contains(position):
                x_log = plot.vb.mapSceneToView(position).x()
                self.show_cursor(10.0 ** x_log)
                return

    def show_cursor(self, f_hz: float) -> str:
        """Move the cursor to ``f_hz`` and show each trace's dB and degrees there."""
        for line in self.cursor_lines:
            line.setPos(math.log10(f_hz))
            line.setVisible(True)
        parts = [f"f = {format_value(f_hz, 'Hz')}"]
        for spec, trace in self._shown:
            if trace.f_hz.size == 0 or not trace.f_hz[0] <= f_hz <= trace.f_hz[-1]:
                continue
            # The nearest computed point (no interpolation: the read-out shows computed values).
            index = int(np.argmin(np.abs(np.log(trace.f_hz / f_hz))))
            parts.append(f"{spec.label}: {trace.mag_db[index]:.2f} dB, {trace.phase_deg[index]:.1f}° "
                         f"(at {format_value(float(trace.f_hz[index]), 'Hz')})")
        text = "   |   ".join(parts)
        self.readout.setText(text)
        return text


class StepView(PlotView):
    """Step response of the selected traces (time axis linear), with settling limits."""

    def __init__(self, document: Document, worker: ComputeWorker, overlays: OverlaySelection,
                 parent: QWidget | None = None) -> None:
        super().__init__(document, worker, overlays, parent)
        self.plot = self.graphics.addPlot()
        self.plot.showGrid(x=True, y=True, alpha=0.25)
        self.plot.setLabel("bottom", "Time", units="s")
        self.plot.setLabel("left", "Output per unit step")
        self.plot.getAxis("left").enableAutoSIPrefix(False)
        self.span_s: float | None = None
        self.normalized = False
        # No legend of its own: traces keep the colours and line styles of the response legend.
        self.traces = _TraceItems(self.plot, None)
        self.limits = _LimitLayer(self.plot, log_x=False)
        self.measured = MeasuredSteps(self.plot)
        self.summary = QLabel(self)
        self.summary.setTextFormat(Qt.TextFormat.PlainText)
        self.summary.setWordWrap(True)
        self.layout().addWidget(self.summary)
        self.refresh()

    def draw(self) -> None:
        rows = []
        steps = []
        summaries = []
        for spec in self.specs():
            if spec.view == BASELINE:
                continue  # the baseline is compared on the response plot
            computed = result_for(self.outcome, spec, "step")
            if computed.ok:
                rows.append((spec, computed.value.t_s, computed.value.y))
                steps.append((spec, computed.value))
                if computed.value.summary:
                    summaries.append(f"{spec.label}: {computed.value.summary}")
            elif self.outcome is not None:
                self.note(spec.label, computed)
        # A linear time axis framed by the dominant poles of what is shown (present/framing.py):
        # the longest window of the shown traces, 8 slowest dominant time constants each.
        spans = [trace.span_s for _, trace in steps if trace.span_s is not None]
        if not spans:
            spans = [float(trace.t_s[-1]) for _, trace in steps if len(trace.t_s) > 1 and trace.t_s[-1] > 0]
        self.span_s = max(spans) if spans else None
        if spans and max(spans) > SPAN_RATIO_SHOWN * min(spans):
            # Time scales far apart (a sensor's slow corner beside the chain's edge): the window
            # of the fastest trace, so its edge is seen; the slower ones are said to go on.
            self.span_s = min(spans)
            summaries.append(f"Window {format_value(self.span_s, 's')}: the slower traces go on beyond it "
                             f"(up to {format_value(max(spans), 's')}).")
        units = {trace.unit for _, trace in steps}
        # Units that differ (a photodiode stage in ohms beside volts per volt) never share an
        # axis: each trace is then drawn over its own final value (or its own peak when it
        # settles at zero), dimensionless.
        finals = [abs(trace.final) for _, trace in steps if trace.final is not None and trace.final != 0]
        # Units that differ, or final values more than 10x apart (a 200 MΩ stage beside the
        # chain's 2 MΩ), would flatten a trace: each is then drawn over its own final value.
        self.normalized = len(units) > 1 or (len(finals) > 1 and max(finals) > 10 * min(finals))
        if self.normalized:
            rows = [(spec, t, y / _own_scale(trace)) for (spec, t, y), (_, trace) in zip(rows, steps, strict=True)]
            fitted_label(self.plot, "left", "Output ÷ own final value", "Output ÷ final value", "÷ final value", "÷ final")
        else:
            unit = next(iter(units)) if units else "V/V"
            fitted_label(self.plot, "left", f"Output ({_step_unit(unit)})", f"({_step_unit(unit)})")
        if self.span_s is not None:
            self.plot.setXRange(0.0, self.span_s, padding=0.02)
        self.traces.show(rows)
        measured = self.outcome.of_chain("measurements") if self.outcome is not None else None
        finals = {spec.key: (trace.final / _own_scale(trace) if self.normalized else trace.final)
                  for spec, trace in steps if trace.final is not None}
        self.measured.draw(measured.value if measured is not None and measured.ok else [], rows, self.overlays,
                           finals)
        self.summary.setText("\n".join(summaries))
        shapes = []
        stage = self.document.current_stage
        if stage is not None:
            for check in stage.checks:
                for plot, label, x_range, y_range in limit_shapes(check, self.document.project):
                    if plot == "step":
                        shapes.append((label, x_range, y_range))
        self.limits.set_shapes(shapes)


def decibel_unit(unit: str) -> str:
    """The decibel unit of a response in ``unit``: dB (V/V), dBΩ (transimpedance, V/A), dBS."""
    return {"V/V": "dB", "Ω": "dBΩ", "V/A": "dBΩ", "S": "dBS", "A/V": "dBS"}.get(unit, f"dB re 1 {unit}")


def _own_scale(trace: Any) -> float:
    """A step trace's own final value, or its largest |value| when it settles at (near) zero."""
    peak = float(np.nanmax(np.abs(trace.y))) if len(trace.y) else 1.0
    final = trace.final
    if final is not None and math.isfinite(final) and abs(final) > 1e-3 * peak:
        return float(final)
    return peak or 1.0


def _step_unit(unit: str) -> str:
    """The unit of a step response's output per unit of input step (V per V, V per A)."""
    return {"V/V": "V per V", "Ω": "V per A"}.get(unit, unit)


class PoleZeroView(PlotView):
    """Poles (×) and zeros (○) of the shown traces on a signed logarithmic radius, with hover values.

    Framed by :func:`stagewise.present.framing.pole_zero_frame` (shared with the packet): every
    root from the lowest to the analysis band's top in view; roots above the top sit on a dashed
    edge ring, counted in the header line below the plot.
    """

    def __init__(self, document: Document, worker: ComputeWorker, overlays: OverlaySelection,
                 parent: QWidget | None = None) -> None:
        super().__init__(document, worker, overlays, parent)
        self.plot = self.graphics.addPlot()
        _no_stock_menu(self.plot)
        self.plot.setAspectLocked(True)
        self.plot.hideAxis("bottom")
        self.plot.hideAxis("left")
        self.axes = [self.plot.plot([], [], pen=pg.mkPen("#a0a0a0", width=1)) for _ in range(2)]
        self.rings: list[pg.PlotDataItem] = []
        self.ring_labels: list[pg.TextItem] = []
        self.edge = self.plot.plot([], [], pen=pg.mkPen("#7a7a7a", width=1, style=Qt.PenStyle.DashLine))
        self.frame: Any = None
        # Colours as in the response legend; × marks poles and ○ zeros (hover a mark for its value).
        self.scatters: dict[str, pg.ScatterPlotItem] = {}
        self.scale_note = QLabel(self)
        self.scale_note.setObjectName("poleZeroScale")
        self.scale_note.setTextFormat(Qt.TextFormat.PlainText)
        self.scale_note.setWordWrap(True)
        self.layout().addWidget(self.scale_note)
        self.refresh()

    def _scatter(self, key: str) -> pg.ScatterPlotItem:
        item = self.scatters.get(key)
        if item is None:
            item = pg.ScatterPlotItem(hoverable=True, tip=self._tip, hoverSize=14)
            self.plot.addItem(item)
            self.scatters[key] = item
        return item

    @staticmethod
    def _tip(x: float, y: float, data: Any) -> str:
        return str(data)

    def _draw_frame(self, frame: Any) -> None:
        angles = np.linspace(0.0, 2 * math.pi, 181)
        while len(self.rings) < len(frame.rings):
            ring = self.plot.plot([], [], pen=pg.mkPen("#d0d0d0", width=1))
            label = pg.TextItem("", color="#707070", anchor=(0.5, 1.0))
            self.plot.addItem(label, ignoreBounds=True)
            self.rings.append(ring)
            self.ring_labels.append(label)
        # Three ring labels (the lowest ring, one between, the band's top), so they never crowd.
        count = len(frame.rings)
        labelled = {0, count // 2, count - 1} if count > 3 else set(range(count))
        for index, (ring, label) in enumerate(zip(self.rings, self.ring_labels, strict=True)):
            if index < len(frame.rings):
                radius, f_hz = frame.rings[index]
                ring.setData(radius * np.cos(angles), radius * np.sin(angles))
                label.setText(format_value(f_hz, "Hz", 3))
                label.setPos(0.0, radius)
                ring.setVisible(True)
                label.setVisible(index in labelled)
            else:
                ring.setVisible(False)
                label.setVisible(False)
        self.edge.setData(frame.edge_radius * np.cos(angles), frame.edge_radius * np.sin(angles))
        self.axes[0].setData([-frame.limit, frame.limit], [0.0, 0.0])
        self.axes[1].setData([0.0, 0.0], [-frame.limit, frame.limit])
        self.plot.setRange(xRange=(-frame.limit, frame.limit), yRange=(-frame.limit, frame.limit), padding=0)

    def draw(self) -> None:
        from stagewise.present.framing import pole_zero_frame

        wanted: set[str] = set()
        shown = []
        for spec in self.specs():
            if spec.view == BASELINE:
                continue
            computed = result_for(self.outcome, spec, "poles")
            if not computed.ok:
                if self.outcome is not None:
                    self.note(spec.label, computed)
                continue
            shown.append((spec, computed.value))
        f_top = self.document.project.settings.f_max_hz.si
        frame = pole_zero_frame([p for _, roots in shown for p in roots.poles_rad_s],
                                [z for _, roots in shown for z in roots.zeros_rad_s], f_top)
        self.frame = frame
        self._draw_frame(frame)
        off_scale = {"poles": 0, "zeros": 0}
        for spec, roots in shown:
            for kind, symbol, values in (("poles", "x", roots.poles_rad_s), ("zeros", "o", roots.zeros_rad_s)):
                key = f"{spec.key}:{kind}"
                wanted.add(key)
                item = self._scatter(key)
                values = np.asarray(values, dtype=complex)
                x, y, above = frame.map(values)
                off_scale[kind] += int(np.count_nonzero(above))
                tips = [_root_tip(spec.label, kind[:-1], value, bool(far), f_top)
                        for value, far in zip(values, above, strict=True)]
                brush = pg.mkBrush(spec.style.colour) if symbol == "x" else pg.mkBrush(None)
                item.setData(x=x, y=y, data=tips, symbol=symbol, size=13,
                             pen=pg.mkPen(spec.style.colour, width=2), brush=brush)
                item.setVisible(True)
        for key, item in self.scatters.items():
            if key not in wanted:
                item.setData(x=[], y=[])
                item.setVisible(False)
        words = [f"Distance from the centre: decades of |s|/2π above {format_value(frame.f_floor_hz, 'Hz')} "
                 "(rings in hertz); direction as in the s-plane, so the angle reads as damping."]
        far = [f"{count} {kind if count != 1 else kind[:-1]}" for kind, count in off_scale.items() if count]
        if far:
            words.append(f"{' and '.join(far)} above the band's top ({format_value(f_top, 'Hz')}) drawn on the "
                         "dashed edge ring.")
        words.append("Hover a mark for f, Q and ζ.")
        self.scale_note.setText(" ".join(words))


def _root_tip(label: str, kind: str, value: complex, off_scale: bool = False, f_top_hz: float = math.inf) -> str:
    from stagewise.present.framing import root_words

    words = root_words(value)
    f_hz = float(words["f_hz"] or 0.0)
    text = f"{label}: {kind} at s = {value.real:.4g} {value.imag:+.4g}j rad/s, f = |s|/2π = {format_value(f_hz, 'Hz')}"
    if words["q"] is not None and words["zeta"] is not None:
        # Q and ζ of a complex pair: ζ = −Re s/|s|, Q = 1/(2ζ) (second-order section in standard form).
        text += f", Q = {words['q']:.3g}, ζ = {words['zeta']:.3g}"
    if off_scale:
        text += f" (above the band's top, {format_value(f_top_hz, 'Hz')}: drawn on the edge ring)"
    return text


def fitted_label(plot: pg.PlotItem, side: str, *forms: str) -> None:
    """Label an axis with the longest of ``forms`` (longest first) that fits its length, whole.

    A dock at 1280×720 can be a few hundred pixels tall and pyqtgraph clips a label that is
    longer than its axis; the label is chosen again whenever the plot is resized, so a reader
    sees "Output noise (V/√Hz)" where there is room and "Noise (V/√Hz)" where there is not.
    """
    chosen: dict[str, tuple[str, ...]] = plot.__dict__.setdefault("_fitted_labels", {})
    first = side not in chosen
    chosen[side] = forms

    def fit() -> None:
        from PySide6.QtGui import QFontMetricsF

        for name, texts in chosen.items():
            axis = plot.getAxis(name)
            length = axis.size().height() if name in ("left", "right") else axis.size().width()
            metrics = QFontMetricsF(axis.label.font())
            # The label is a text item: its document margin lies on both sides of the text.
            room = length - 2.0 * axis.label.document().documentMargin() - 2.0
            text = next((form for form in texts if metrics.horizontalAdvance(form) <= room), texts[-1])
            if axis.labelText != text or not axis.label.isVisible():
                axis.setLabel(text)

    if first:  # the axis's own length changes after the view box's (a legend reflowed, a dock resized)
        plot.getAxis(side).geometryChanged.connect(fit)
    fit()


def _no_stock_menu(plot: pg.PlotItem) -> None:
    """No pyqtgraph right-click menu: its axis and range commands would change the views under
    the program (the framing is ours; the mouse wheel and drag still zoom and pan)."""
    plot.setMenuEnabled(False)
    plot.getViewBox().setMenuEnabled(False)


class NoiseView(PlotView):
    """Output noise density: the total and the largest contributions, log-log."""

    def __init__(self, document: Document, worker: ComputeWorker, overlays: OverlaySelection,
                 parent: QWidget | None = None) -> None:
        super().__init__(document, worker, overlays, parent)
        self.plot = self.graphics.addPlot()
        self.plot.setLogMode(x=True, y=True)
        self.plot.getAxis("bottom").enableAutoSIPrefix(False)
        self.plot.getAxis("left").enableAutoSIPrefix(False)
        self.plot.showGrid(x=True, y=True, alpha=0.25)
        fitted_label(self.plot, "bottom", "Frequency (Hz)", "f (Hz)")
        fitted_label(self.plot, "left", "Output noise (V/√Hz)", "Noise (V/√Hz)", "V/√Hz")
        # The legend sits below the plot: the sources are many and the plot is small.
        self.legend = pg.LegendItem(labelTextSize="8pt", colCount=2, verSpacing=-6)
        self.graphics.addItem(self.legend, row=1, col=0)
        self.traces = _TraceItems(self.plot, self.legend)
        self._source_styles: dict[str, int] = {}
        self._summary_text = ""
        self.summary = QLabel(self)
        self.summary.setTextFormat(Qt.TextFormat.PlainText)
        self.summary.setWordWrap(True)
        self.layout().addWidget(self.summary)
        self.refresh()

    def draw(self) -> None:
        from stagewise.ui.palette import trace_style

        computed = self.outcome.of_chain("noise") if self.outcome is not None else Computed(None, "")
        rows = []
        if computed.ok:
            noise = computed.value
            rows.append((TraceSpec("total", "Total", CHAIN, "", trace_style(0, 2.5)), noise.f_hz, noise.total))
            shown = [name for name, _ in noise.contributions]
            for name, density in noise.contributions:
                rows.append((TraceSpec(f"source:{name}", name, CHAIN, "", trace_style(self._style_of(name, shown), 1.5)),
                             noise.f_hz, density))
            self._set_summary(noise.summary)
        else:
            if self.outcome is not None:
                self.note("Chain noise", computed)
            self.summary.setText("")
        self.traces.show(rows)


    def _set_summary(self, text: str) -> None:
        """The noise figures under the plot; in a short view only the first sentence (the output
        noise over the band), the rest in the label's tooltip, so the plot keeps its height."""
        self._summary_text = text
        first = text.split("; ")[0].split(". ")[0]
        short = self.height() < 320 and first != text
        self.summary.setText(first + (" …" if short else "") if short else text)
        self.summary.setToolTip(text if short else "")

    def resizeEvent(self, event: Any) -> None:  # noqa: N802 - Qt's name
        super().resizeEvent(event)
        if self._summary_text:
            self._set_summary(self._summary_text)

    def _style_of(self, name: str, shown: list[str]) -> int:
        """A noise source keeps its colour and line style while it stays in the view, whatever its
        rank after an edit; a newcomer takes the first style no shown source is using."""
        styles = self._source_styles
        if name not in styles:
            taken = {styles[other] for other in shown if other in styles}
            styles[name] = next(index for index in range(1, 64) if index not in taken)
        return styles[name]


class SpreadView(PlotView):
    """Spread over part tolerances: min/max and percentile envelopes around the nominal."""

    def __init__(self, document: Document, worker: ComputeWorker, overlays: OverlaySelection,
                 parent: QWidget | None = None) -> None:
        super().__init__(document, worker, overlays, parent)
        self.plot = self.graphics.addPlot()
        _log_axis(self.plot)
        self.plot.showGrid(x=True, y=True, alpha=0.25)
        self.plot.setLabel("bottom", "Frequency (Hz)")
        self.plot.setLabel("left", "Chain magnitude", units="dB")
        self.plot.getAxis("left").enableAutoSIPrefix(False)
        # Below the plot, outside the data area, as in the response view.
        self.legend = pg.LegendItem(labelTextSize="8pt", colCount=3, verSpacing=-6)
        self.graphics.addItem(self.legend, row=1, col=0)
        self.lines = {name: pg.PlotDataItem() for name in ("min", "max", "low", "high", "nominal")}
        for item in self.lines.values():
            self.plot.addItem(item)
        self.outer = pg.FillBetweenItem(self.lines["min"], self.lines["max"], brush=pg.mkBrush(86, 180, 233, 50))
        self.inner = pg.FillBetweenItem(self.lines["low"], self.lines["high"], brush=pg.mkBrush(0, 114, 178, 70))
        self.plot.addItem(self.outer)
        self.plot.addItem(self.inner)
        self._styled = False
        self._legend_entries: list[tuple[str, str]] = []
        self.summary = QLabel(self)
        self.summary.setTextFormat(Qt.TextFormat.PlainText)
        self.summary.setWordWrap(True)
        self.layout().addWidget(self.summary)
        self.subscriptions.connect(worker.spreadBusyChanged, lambda _busy: self._show_header())
        self.refresh()

    def draw(self) -> None:
        computed = self.outcome.of_chain("spread") if self.outcome is not None else Computed(None, "")
        if not computed.ok:
            if self.outcome is not None:
                self.note("Spread", computed)
            for item in self.lines.values():
                item.setData([], [])
            self.summary.setText("")
            return
        spread = computed.value
        styles = {
            "min": ("#56B4E9", Qt.PenStyle.DotLine, f"min / max of {spread.samples} samples"),
            "max": ("#56B4E9", Qt.PenStyle.DotLine, None),
            "low": ("#0072B2", Qt.PenStyle.DashLine, f"{spread.low_pct:g}–{spread.high_pct:g} percentile"),
            "high": ("#0072B2", Qt.PenStyle.DashLine, None),
            "nominal": ("#000000", Qt.PenStyle.SolidLine, "nominal"),
        }
        data = {"min": spread.min_db, "max": spread.max_db, "low": spread.low_db, "high": spread.high_db,
                "nominal": spread.nominal_db}
        first = not self._styled
        for name, item in self.lines.items():
            colour, style, label = styles[name]
            if first:
                pen = pg.mkPen(colour, width=2 if name == "nominal" else 1.2)
                pen.setStyle(style)
                item.setPen(pen)
            item.setData(spread.f_hz, finite(data[name]))
        legend = [(name, styles[name][2]) for name in self.lines if styles[name][2]]
        if legend != self._legend_entries:
            self.legend.clear()
            for name, label in legend:
                self.legend.addItem(self.lines[name], label)
            self._legend_entries = legend
        self._styled = True
        self.summary.setText(spread.summary)


class LoopGainView(PlotView):
    """Loop gain T = A·β of each op-amp of the selected stage, alone and in chain (each trace its
    own colour and line style, named in the legend): magnitude and phase on log-frequency axes,
    the crossover and the margins marked."""

    def __init__(self, document: Document, worker: ComputeWorker, overlays: OverlaySelection,
                 parent: QWidget | None = None) -> None:
        super().__init__(document, worker, overlays, parent)
        self.magnitude, self.phase = _bode_pair(self.graphics, 56)
        self.magnitude.setLabel("left", "|T| (dB)")
        self.phase.setLabel("left", "∠T (°)")
        self.phase.setLabel("bottom", "Frequency (Hz)")
        self.phase.setXLink(self.magnitude)
        self.magnitude.addLine(y=0, pen=pg.mkPen("#808080", width=1, style=Qt.PenStyle.DashLine))
        self.legend = pg.LegendItem(labelTextSize="8pt", colCount=2, verSpacing=-6)
        self.graphics.addItem(self.legend, row=2, col=0)
        self.magnitude_traces = _TraceItems(self.magnitude, self.legend)
        self.phase_traces = _TraceItems(self.phase, None)
        self.markers: list[Any] = []
        self.shown: list[Any] = []
        self.summary = QLabel(self)
        self.summary.setTextFormat(Qt.TextFormat.PlainText)
        self.summary.setWordWrap(True)
        self.layout().addWidget(self.summary)
        self.refresh()

    def draw(self) -> None:
        from stagewise.ui.palette import trace_style

        for plot, item in self.markers:
            plot.removeItem(item)
        self.markers = []
        stage = self.document.current_stage
        computed = self.outcome.of_stage(stage.id, "loops") if (self.outcome is not None and stage is not None) \
            else Computed(None, "no stage selected")
        rows_magnitude, rows_phase, words = [], [], []
        self.shown = list(computed.value) if computed.ok else []
        if not computed.ok and computed.why != "not computed yet":
            # A stage without a finite op-amp has no loop: said below the plot, not as a fault.
            words.append(computed.why)
        for index, trace in enumerate(self.shown):
            style = trace_style(index)
            spec = TraceSpec(f"loop:{trace.label}", f"{trace.label}", IN_CHAIN if trace.place == "in chain" else ISOLATED,
                             stage.id if stage is not None else "", style)
            with np.errstate(divide="ignore"):
                magnitude_db = 20.0 * np.log10(np.abs(trace.loop_gain))
            phase_deg = np.degrees(np.unwrap(np.angle(trace.loop_gain)))
            rows_magnitude.append((spec, trace.f_hz, finite(magnitude_db)))
            rows_phase.append((spec, trace.f_hz, finite(phase_deg)))
            if trace.crossover_hz is not None:
                # The crossover: |T| = 1 (0 dB); the phase margin is read there (180° + ∠T).
                for plot in (self.magnitude, self.phase):
                    line = pg.InfiniteLine(math.log10(trace.crossover_hz), angle=90,
                                           pen=pg.mkPen(style.colour, width=1, style=Qt.PenStyle.DotLine))
                    plot.addItem(line, ignoreBounds=True)
                    self.markers.append((plot, line))
            words.append(loop_summary(trace.label, trace.crossover_hz, trace.phase_margin_deg, trace.gain_margin_db,
                                      trace.why))
        self.magnitude_traces.show(rows_magnitude)
        self.phase_traces.show(rows_phase)
        self.summary.setText("\n".join(words))
