"""Plot building shared by the packet (and written so the GUI can build the same plots).

Each ``*_plot`` function takes plain data (result arrays, never model objects) and returns a
pyqtgraph widget; :func:`render_plot` paints one into a rectangle of any QPainter. On a
``QPdfWriter`` set to 96 dpi the result stays vector (paths and text, no images). Traces
differ by colour (the Okabe & Ito colour-blind-safe palette) *and* by line style, so they stay
apart in grey print.

References
----------
M. Okabe and K. Ito, "Color Universal Design (CUD): how to make figures and presentations that
are friendly to colorblind people", 2008.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Hashable, Iterator, Sequence
from contextlib import contextmanager
from contextvars import ContextVar
from dataclasses import dataclass

import numpy as np
import pyqtgraph as pg
import shiboken6
from numpy.typing import NDArray
from PySide6.QtCore import QRectF, Qt
from PySide6.QtGui import QColor, QFont, QFontMetricsF, QPainter, QPen, QPicture
from PySide6.QtWidgets import QGraphicsRectItem

from stagewise.model.values import format_value
from stagewise.present.framing import PoleZeroFrame, pole_zero_frame
from stagewise.present.limits import LimitShape
from stagewise.ui.palette import LINE_STYLES as GUI_LINE_STYLES
from stagewise.ui.palette import OKABE_ITO, PLOT_OPTIONS, limit_brush_colour, trace_style

__all__ = [
    "LINE_STYLES",
    "PALETTE",
    "FrequencyAxis",
    "PlotCanvas",
    "PlotStyle",
    "ResponseTrace",
    "active_canvas",
    "bars_plot",
    "curve_data",
    "legend_text",
    "loop_gain_plot",
    "pole_zero_caption",
    "pole_zero_plot",
    "render_plot",
    "response_plot",
    "step_plot",
    "trace_from_complex",
    "using_canvas",
]

# The program's plot options (ui/palette.py): the packet draws the same items as the program, and
# must not depend on whether the GUI was loaded.
pg.setConfigOptions(**PLOT_OPTIONS)

# The GUI's trace styles (ui/palette.py), so a trace looks the same on screen and on paper.
PALETTE = tuple(colour for _, colour in OKABE_ITO)
LINE_STYLES = tuple(line for _, line in GUI_LINE_STYLES)


@dataclass(frozen=True)
class PlotStyle:
    """Colours and sizes of a plot: print (white paper) by default; the GUI may pass its own."""

    background: str = "#ffffff"
    foreground: str = "#111111"
    grid_alpha: float = 0.25
    tick_px: int = 10
    label_px: int = 11
    line_width: float = 1.6


PRINT = PlotStyle()

# The resolution pyqtgraph lays its axes out for (and the packet's logical resolution).
LAYOUT_DPI = 96


@dataclass
class ResponseTrace:
    """One curve of a magnitude/phase plot: label, frequency (Hz), magnitude (dB), phase (deg)."""

    label: str
    f_hz: NDArray[np.float64]
    mag_db: NDArray[np.float64]
    phase_deg: NDArray[np.float64]


class PlotCanvas:
    """Off-screen plot frames reused from figure to figure.

    Building a pyqtgraph plot (axes, view box, their menus and signals) costs about 5 ms and a
    packet draws some forty of them. A frame of each kind (response pair, pole-zero plane, step,
    bars, loop gain) is built once per canvas; each figure clears it, sets its own labels, tick
    spacing and ranges, and adds its data, so what is drawn is the same as from a new frame.
    Close the canvas (or use it in a ``with``) to destroy the widgets: without an event loop
    ``deleteLater()`` never runs, and Qt objects left for interpreter shutdown can crash it.
    """

    MAX_FRAMES = 12  # frames kept at once (each a widget with its plots)

    def __init__(self) -> None:
        self._frames: dict[Hashable, pg.GraphicsLayoutWidget] = {}
        self._scenery: dict[Hashable, set[int]] = {}
        self.last: pg.GraphicsLayoutWidget | None = None  # the frame handed out last (tests read its plots)

    def frame(self, key: Hashable, build: Callable[[], pg.GraphicsLayoutWidget]) -> pg.GraphicsLayoutWidget:
        """The frame of kind ``key``, built by ``build`` the first time, cleared the next times.

        What ``build`` put into its plots (a pole-zero plane's rings) is the frame's scenery and
        stays; what a figure added (data, gates, labels) is removed. A frame with scenery keeps
        its own ranges (they belong to the scenery); the others range on their data again.
        """
        widget = self.last = self._frames.pop(key, None)
        if widget is None:
            if len(self._frames) >= self.MAX_FRAMES:
                # A long chain has many pole-zero planes: the frame used longest ago goes.
                oldest = next(iter(self._frames))
                shiboken6.delete(self._frames.pop(oldest))
                del self._scenery[oldest]
            widget = self.last = self._frames[key] = build()
            self._scenery[key] = {id(item) for plot in _plots(widget) for item in plot.items}
            return widget
        self._frames[key] = widget  # now the most recently used
        scenery = self._scenery[key]
        for plot in _plots(widget):
            if scenery:
                for item in [item for item in plot.items if id(item) not in scenery]:
                    plot.removeItem(item)
            else:
                plot.clear()  # data, gates and labels (and their legend entries)
                plot.enableAutoRange()
            plot.getAxis("left").setTickSpacing()
            plot.getAxis("left").setTicks(None)
        return widget

    def __len__(self) -> int:
        """How many frames the canvas holds now."""
        return len(self._frames)

    def owns(self, widget: object) -> bool:
        """Whether ``widget`` is one of this canvas's frames (its owner destroys it, not the caller)."""
        return any(frame is widget for frame in self._frames.values())

    def close(self) -> None:
        for widget in self._frames.values():
            shiboken6.delete(widget)
        self._frames.clear()
        self._scenery.clear()
        self.last = None

    def __enter__(self) -> PlotCanvas:
        return self

    def __exit__(self, *_: object) -> None:
        self.close()


_CANVAS: ContextVar[PlotCanvas | None] = ContextVar("stagewise_plot_canvas", default=None)


@contextmanager
def using_canvas() -> Iterator[PlotCanvas]:
    """A canvas the figures painted inside the ``with`` share (closed at its end)."""
    with PlotCanvas() as canvas:
        token = _CANVAS.set(canvas)
        try:
            yield canvas
        finally:
            _CANVAS.reset(token)


def active_canvas() -> PlotCanvas | None:
    """The canvas of the enclosing :func:`using_canvas`, if any."""
    return _CANVAS.get()


def _plots(widget: pg.GraphicsLayoutWidget) -> list[pg.PlotItem]:
    return [item for item in widget.ci.items if isinstance(item, pg.PlotItem)]


def _frame(canvas: PlotCanvas | None, key: Hashable,
           build: Callable[[], pg.GraphicsLayoutWidget]) -> pg.GraphicsLayoutWidget:
    """A new frame (the caller owns it) without a canvas, else the canvas's reused one."""
    return build() if canvas is None else canvas.frame(key, build)


def _new_widget(style: PlotStyle) -> pg.GraphicsLayoutWidget:
    widget = pg.GraphicsLayoutWidget()
    widget.setBackground(style.background)
    return widget


def legend_text(labels: Sequence[str]) -> str:
    """The traces' styles in words ("isolated: black, solid; in chain: blue, dash"), for captions."""
    return "; ".join(f"{label}: {trace_style(index).colour_name}, {trace_style(index).line_name}"
                     for index, label in enumerate(labels))


def trace_from_complex(label: str, f_hz: NDArray[np.float64], response: NDArray[np.complex128]) -> ResponseTrace:
    """Magnitude in dB (20·log10|H|) and unwrapped phase in degrees of a complex response."""
    with np.errstate(divide="ignore"):
        magnitude = 20.0 * np.log10(np.abs(response))
    phase = np.degrees(np.unwrap(np.angle(response)))
    return ResponseTrace(label, np.asarray(f_hz, dtype=float), magnitude, phase)


class FrequencyAxis(pg.AxisItem):  # type: ignore[misc]  # pyqtgraph has no type hints
    """A log-frequency axis whose ticks read 10, 100, 1k, 10k (SI prefixes), not powers of ten."""

    def tickStrings(self, values: Sequence[float], scale: float, spacing: float) -> list[str]:  # noqa: N802
        strings = []
        for value in values:
            frequency = 10.0 ** value if self.logMode else value
            strings.append(format_value(frequency, "", 3) if math.isfinite(frequency) else "")
        return strings


def _tick_font(style: PlotStyle) -> QFont:
    result = QFont()
    result.setFamilies(["DejaVu Sans", "Liberation Sans", "Arial", "sans-serif"])
    result.setPixelSize(style.tick_px)
    return result


def _style_axes(plot: pg.PlotItem, style: PlotStyle) -> None:
    for name in ("left", "bottom", "right", "top"):
        axis = plot.getAxis(name)
        axis.setPen(pg.mkPen(style.foreground, width=0.8))
        axis.setTextPen(pg.mkPen(style.foreground))
        axis.setStyle(tickFont=_tick_font(style), tickTextOffset=4)
        axis.enableAutoSIPrefix(False)
    plot.showGrid(x=True, y=True, alpha=style.grid_alpha)


def _label(plot: pg.PlotItem, side: str, text: str, style: PlotStyle) -> None:
    plot.getAxis(side).setLabel(text, **{"font-size": f"{style.label_px}px", "color": style.foreground})


def _pen(index: int, style: PlotStyle) -> QPen:
    chosen = trace_style(index, style.line_width)
    pen: QPen = pg.mkPen(chosen.colour, width=chosen.width)
    pen.setStyle(chosen.line)
    return pen


def _curve(plot: pg.PlotItem, x: NDArray[np.float64], y: NDArray[np.float64], pen: QPen, name: str | None = None,
           connect: str = "all") -> pg.PlotCurveItem:
    """A line through (x, y) on ``plot``, x in data units (hertz on a log-frequency axis).

    A bare ``PlotCurveItem`` (what a ``PlotDataItem`` draws with) costs a fifth of a
    ``PlotDataItem``, which also builds a scatter item; the log mapping of x is done here.
    ``curve_data`` gives the data back in data units.
    """
    x = np.asarray(x, dtype=float)
    log_x = bool(plot.getAxis("bottom").logMode)
    item = pg.PlotCurveItem(np.log10(x) if log_x else x, np.asarray(y, dtype=float), pen=pen, connect=connect,
                            name=name)
    item.log_x = log_x
    plot.addItem(item)
    return item


def curve_data(plot: pg.PlotItem) -> list[tuple[NDArray[np.float64], NDArray[np.float64]]]:
    """The lines drawn on ``plot`` as (x, y) in data units, in the order drawn (for tests and checks)."""
    found = []
    for item in plot.items:
        if isinstance(item, pg.PlotCurveItem):
            x, y = item.getData()
            found.append((10.0 ** x if getattr(item, "log_x", False) else x, y))
    return found


def _legend(plot: pg.PlotItem, style: PlotStyle) -> pg.LegendItem:
    legend = plot.addLegend(offset=(-8, 8), labelTextColor=style.foreground, labelTextSize=f"{style.tick_px}px",
                            brush=pg.mkBrush(style.background), pen=pg.mkPen(style.foreground, width=0.5))
    return legend


Limit = LimitShape
"""A check's limit as :mod:`stagewise.present.limits` gives it: (plot, label, x range, y range)."""


def _bode_frame(style: PlotStyle, show_phase: bool, with_legend: bool) -> pg.GraphicsLayoutWidget:
    """Magnitude above phase on linked log-frequency axes: what stays the same from plot to plot."""
    widget = _new_widget(style)
    magnitude = widget.addPlot(row=0, col=0, axisItems={"bottom": FrequencyAxis("bottom")}, enableMenu=False)
    _style_axes(magnitude, style)
    magnitude.setLogMode(x=True, y=False)
    if with_legend:
        _legend(magnitude, style)
    magnitude.getAxis("left").setWidth(64)
    if show_phase:
        phase = widget.addPlot(row=1, col=0, axisItems={"bottom": FrequencyAxis("bottom")}, enableMenu=False)
        _style_axes(phase, style)
        phase.setLogMode(x=True, y=False)
        phase.setXLink(magnitude)
        _label(phase, "bottom", "frequency (Hz)", style)
        widget.ci.layout.setRowStretchFactor(0, 3)
        widget.ci.layout.setRowStretchFactor(1, 2)
        phase.getAxis("left").setWidth(64)
    else:
        _label(magnitude, "bottom", "frequency (Hz)", style)
    return widget


def _bode(canvas: PlotCanvas | None, style: PlotStyle, show_phase: bool,
          with_legend: bool) -> tuple[pg.GraphicsLayoutWidget, pg.PlotItem, pg.PlotItem | None]:
    widget = _frame(canvas, ("bode", style, show_phase, with_legend),
                    lambda: _bode_frame(style, show_phase, with_legend))
    return widget, widget.ci.getItem(0, 0), widget.ci.getItem(1, 0) if show_phase else None


def response_plot(traces: Sequence[ResponseTrace], limits: Sequence[Limit] = (), style: PlotStyle = PRINT,
                  show_phase: bool = True, magnitude_label: str = "magnitude (dB)",
                  legend: bool = True, canvas: PlotCanvas | None = None) -> pg.GraphicsLayoutWidget:
    """Magnitude (dB) above phase (degrees) on linked log-frequency axes, one style per trace.

    ``limits`` are drawn as shaded gates (the band a trace must pass through for the check to
    be met) or, for a level such as a peaking limit, a dashed line the trace must stay below
    (:mod:`stagewise.present.limits` gives them, as the program draws them). With ``canvas`` the
    plot is drawn in the canvas's reused frame (the canvas owns it).
    """
    widget, magnitude, phase = _bode(canvas, style, show_phase, legend and len(traces) > 1)
    _label(magnitude, "left", magnitude_label, style)
    for index, trace in enumerate(traces):
        finite = np.isfinite(trace.mag_db)
        _curve(magnitude, trace.f_hz[finite], trace.mag_db[finite], _pen(index, style), name=trace.label)
    _minimum_span(magnitude, [trace.mag_db for trace in traces], 2.0)
    _tick_spacing(magnitude, [trace.mag_db for trace in traces], (1, 2, 5, 10, 20, 50, 100))
    _add_limits(magnitude, [limit for limit in limits if limit[0] == "magnitude"], traces, "mag_db", style)
    if phase is not None:
        _label(phase, "left", "phase (°)", style)
        for index, trace in enumerate(traces):
            finite = np.isfinite(trace.phase_deg)
            _curve(phase, trace.f_hz[finite], trace.phase_deg[finite], _pen(index, style))
        _minimum_span(phase, [trace.phase_deg for trace in traces], 20.0)
        _tick_spacing(phase, [trace.phase_deg for trace in traces], (5, 10, 15, 30, 45, 90, 180, 360))
        _add_limits(phase, [limit for limit in limits if limit[0] == "phase"], traces, "phase_deg", style)
    return widget


def loop_gain_plot(traces: Sequence[ResponseTrace], crossovers_hz: Sequence[float | None], style: PlotStyle = PRINT,
                   canvas: PlotCanvas | None = None) -> pg.GraphicsLayoutWidget:
    """Loop gains T = A·β, magnitude above phase, marked as the program's loop-gain view marks
    them: a dashed 0 dB line, and a dotted line in each trace's colour at its crossover."""
    widget, magnitude, phase = _bode(canvas, style, True, False)
    assert phase is not None
    _label(magnitude, "left", "|T| (dB)", style)
    _label(phase, "left", "∠T (°)", style)
    zero = pg.mkPen("#808080", width=1.0)
    zero.setStyle(Qt.PenStyle.DashLine)
    magnitude.addLine(y=0, pen=zero)
    for index, (trace, crossover_hz) in enumerate(zip(traces, crossovers_hz, strict=True)):
        for plot, values in ((magnitude, trace.mag_db), (phase, trace.phase_deg)):
            finite = np.isfinite(values)
            _curve(plot, trace.f_hz[finite], values[finite], _pen(index, style))
            if crossover_hz is not None and crossover_hz > 0:
                # The crossover: |T| = 1 (0 dB); the phase margin is read there (180° + ∠T).
                marker = pg.mkPen(trace_style(index).colour, width=1.0)
                marker.setStyle(Qt.PenStyle.DotLine)
                plot.addItem(pg.InfiniteLine(math.log10(crossover_hz), angle=90, pen=marker), ignoreBounds=True)
    for plot, field_name, steps in ((magnitude, "mag_db", (10, 20, 50, 100)),
                                    (phase, "phase_deg", (30, 45, 90, 180, 360))):
        series = [getattr(trace, field_name) for trace in traces]
        _minimum_span(plot, series, 20.0)
        _tick_spacing(plot, series, steps)
    return widget


def _minimum_span(plot: pg.PlotItem, series: Sequence[NDArray[np.float64]], span: float) -> None:
    """Show at least ``span`` on the y axis, so a flat curve is not drawn as rounding noise."""
    values = np.concatenate([np.asarray(item, dtype=float).ravel() for item in series]) if series else np.array([])
    values = values[np.isfinite(values)]
    if values.size == 0:
        return
    low, high = float(values.min()), float(values.max())
    if high - low < span:
        middle = (high + low) / 2
        plot.setYRange(middle - span / 2, middle + span / 2, padding=0.05)


def _tick_spacing(plot: pg.PlotItem, series: Sequence[NDArray[np.float64]], steps: Sequence[float],
                  count: int = 5) -> None:
    """Major y ticks on the first of ``steps`` giving at most ``count`` intervals (dB or degree steps)."""
    values = np.concatenate([np.asarray(item, dtype=float).ravel() for item in series]) if series else np.array([])
    values = values[np.isfinite(values)]
    if values.size == 0:
        return
    span = float(values.max() - values.min())
    for step in steps:
        if span / step <= count:
            plot.getAxis("left").setTickSpacing(step, step / 2 if step > 1 else step)
            return
    plot.getAxis("left").setTickSpacing()


def _add_limits(plot: pg.PlotItem, limits: Sequence[Limit], traces: Sequence[ResponseTrace], field_name: str,
                style: PlotStyle) -> None:
    """Shaded gates for check limits; open sides end just outside the traces' range."""
    if not limits or not traces:
        return
    f_all = np.concatenate([trace.f_hz for trace in traces])
    y_all = np.concatenate([np.asarray(getattr(trace, field_name)) for trace in traces])
    y_all = y_all[np.isfinite(y_all)]
    if y_all.size == 0:
        return
    y_span = max(float(y_all.max() - y_all.min()), 1.0)
    y_floor, y_ceiling = float(y_all.min()) - 0.1 * y_span, float(y_all.max()) + 0.1 * y_span
    f_low, f_high = float(f_all.min()), float(f_all.max())
    brush = pg.mkBrush(limit_brush_colour(70))
    for _, label, (x_low, x_high), (y_low, y_high) in limits:
        x0 = math.log10(min(max(x_low, f_low), f_high)) if x_low > 0 else math.log10(f_low)
        x1 = math.log10(max(min(x_high, f_high), f_low)) if math.isfinite(x_high) else math.log10(f_high)
        if y_low == y_high and math.isfinite(y_low):
            _add_level(plot, label, (10.0 ** x0, 10.0 ** x1), y_low, style)
            continue
        y0 = y_low if math.isfinite(y_low) else y_floor
        y1 = y_high if math.isfinite(y_high) else y_ceiling
        if x1 <= x0 or y1 <= y0:
            continue
        gate = QGraphicsRectItem(x0, y0, x1 - x0, y1 - y0)
        gate.setBrush(brush)
        gate.setPen(pg.mkPen(limit_brush_colour(200), width=0.8))
        plot.addItem(gate, ignoreBounds=True)
        # The label hangs inside the gate's top, kept within the traces' range so it is on the plot.
        text = pg.TextItem(label, color=style.foreground, anchor=(0, 0))
        text.setFont(_tick_font(style))
        text.setPos(x0, min(y1, float(y_all.max()) + 0.05 * y_span))
        plot.addItem(text, ignoreBounds=True)


def _add_level(plot: pg.PlotItem, label: str, f_range: tuple[float, float], level: float, style: PlotStyle) -> None:
    """A limit the trace must stay below (a peaking limit): a dashed line across the band, labelled.

    The line counts in the plot's range, so a level above every trace is still on the plot. Its
    label hangs below the line's high-frequency end, where a low-pass shape (the usual place of
    peaking) has fallen away, and stays inside the plot when the level is its top.
    """
    pen = pg.mkPen(limit_brush_colour(200), width=1.0)
    pen.setStyle(Qt.PenStyle.DashLine)
    _curve(plot, np.array(f_range), np.array([level, level]), pen)
    text = pg.TextItem(label, color=style.foreground, anchor=(1, 0))
    text.setFont(_tick_font(style))
    text.setPos(math.log10(f_range[1]), level)
    plot.addItem(text, ignoreBounds=True)


def _plane_frame(style: PlotStyle, frame: PoleZeroFrame) -> pg.GraphicsLayoutWidget:
    """The plane of ``frame``: decade rings labelled in hertz, the dashed edge ring, the axes."""
    widget = _new_widget(style)
    plot = widget.addPlot(enableMenu=False)  # no context menu: nobody clicks on paper
    _style_axes(plot, style)
    plot.showGrid(x=False, y=False)
    plot.hideAxis("bottom")
    plot.hideAxis("left")
    plot.setAspectLocked(True)
    angles = np.linspace(0.0, 2 * math.pi, 181)
    if frame.rings:
        # Every decade ring in one curve (NaN between rings): one plot item, not one per ring.
        radii = np.array([radius for radius, _ in frame.rings])[:, None]
        gap = np.full((len(frame.rings), 1), np.nan)
        _curve(plot, np.hstack([radii * np.cos(angles), gap]).ravel(), np.hstack([radii * np.sin(angles), gap]).ravel(),
               pg.mkPen("#c8c8c8", width=0.6), connect="finite")
    for radius, f_hz in frame.rings:
        label = pg.TextItem(format_value(f_hz, "Hz", 3), color="#606060", anchor=(0.5, 1.0))
        label.setFont(_tick_font(style))
        label.setPos(0.0, radius)
        plot.addItem(label, ignoreBounds=True)
    _curve(plot, frame.edge_radius * np.cos(angles), frame.edge_radius * np.sin(angles),
           pg.mkPen(style.foreground, width=0.6, style=Qt.PenStyle.DashLine))
    _curve(plot, np.array([-frame.limit, frame.limit]), np.zeros(2), pg.mkPen(style.foreground, width=0.6))
    _curve(plot, np.zeros(2), np.array([-frame.limit, frame.limit]), pg.mkPen(style.foreground, width=0.6))
    plot.setRange(xRange=(-frame.limit, frame.limit), yRange=(-frame.limit, frame.limit), padding=0)
    return widget


def pole_zero_plot(poles_rad_s: Sequence[complex], zeros_rad_s: Sequence[complex], f_top_hz: float,
                   style: PlotStyle = PRINT, canvas: PlotCanvas | None = None) -> pg.GraphicsLayoutWidget:
    """Poles (×, blue) and zeros (○, vermillion) on the program's signed logarithmic radius.

    The frame is :func:`stagewise.present.framing.pole_zero_frame`, as in the program: every root
    from the lowest to ``f_top_hz`` (the analysis band's top) in view, decade rings labelled in
    hertz, roots above the top on a dashed edge ring (:func:`pole_zero_caption` says so). Stages
    whose roots give the same frame share its drawn plane in a canvas.
    """
    frame = pole_zero_frame(list(poles_rad_s), list(zeros_rad_s), f_top_hz)
    widget = _frame(canvas, ("plane", style, frame), lambda: _plane_frame(style, frame))
    plot = widget.ci.getItem(0, 0)
    # useCache=False: pyqtgraph otherwise stamps symbols from a pixmap atlas, which would put
    # raster images into the PDF; drawn each time they stay vector paths.
    for kind, values, symbol, colour_index in (("poles", poles_rad_s, "x", 1), ("zeros", zeros_rad_s, "o", 2)):
        if not values:
            continue
        x, y, _above = frame.map(values)
        plot.addItem(pg.ScatterPlotItem(x, y, symbol=symbol, size=11 if symbol == "x" else 10,
                                        pen=pg.mkPen(trace_style(colour_index).colour, width=1.8), brush=None,
                                        useCache=False, name=kind))
    return widget


def pole_zero_caption(poles_rad_s: Sequence[complex], zeros_rad_s: Sequence[complex], f_top_hz: float) -> str:
    """How to read :func:`pole_zero_plot`, and how many roots sit on its edge ring."""
    frame = pole_zero_frame(list(poles_rad_s), list(zeros_rad_s), f_top_hz)
    far = {kind: int(np.count_nonzero(frame.map(values)[2])) for kind, values in
           (("poles", poles_rad_s), ("zeros", zeros_rad_s))}
    caption = (f"Distance from the centre: decades of |s|/2π above {format_value(frame.f_floor_hz, 'Hz')} "
               "(rings in hertz); direction as in the s-plane, so the angle reads as damping.")
    counted = [f"{count}\u00a0{kind if count != 1 else kind[:-1]}" for kind, count in far.items() if count]
    if counted:
        caption += (f" {' and '.join(counted)} above the analysis band's top "
                    f"({format_value(f_top_hz, 'Hz')}) on the dashed edge ring.")
    return caption


def _time_frame(style: PlotStyle) -> pg.GraphicsLayoutWidget:
    widget = _new_widget(style)
    plot = widget.addPlot(enableMenu=False)  # no context menu: nobody clicks on paper
    _style_axes(plot, style)
    plot.getAxis("bottom").enableAutoSIPrefix(True)
    plot.getAxis("bottom").setLabel("time", units="s", **{"font-size": f"{style.label_px}px",
                                                         "color": style.foreground})
    plot.getAxis("left").setWidth(64)
    return widget


def step_plot(traces: Sequence[tuple[str, NDArray[np.float64], NDArray[np.float64]]], y_label: str,
              style: PlotStyle = PRINT, canvas: PlotCanvas | None = None) -> pg.GraphicsLayoutWidget:
    """Unit-step responses ``(label, t_s, y)`` on a linear time axis in seconds (SI prefixes)."""
    widget = _frame(canvas, ("time", style), lambda: _time_frame(style))
    plot = widget.ci.getItem(0, 0)
    _label(plot, "left", y_label, style)
    for index, (_, t_s, y) in enumerate(traces):
        finite = np.isfinite(y)
        _curve(plot, t_s[finite], y[finite], _pen(index, style))
    return widget


def _bars_frame(style: PlotStyle) -> pg.GraphicsLayoutWidget:
    widget = _new_widget(style)
    plot = widget.addPlot(enableMenu=False)  # no context menu: nobody clicks on paper
    _style_axes(plot, style)
    plot.showGrid(x=True, y=False, alpha=style.grid_alpha)
    return widget


def bars_plot(labels: Sequence[str], values: Sequence[float], unit_label: str,
              style: PlotStyle = PRINT, canvas: PlotCanvas | None = None) -> pg.GraphicsLayoutWidget:
    """Horizontal bars, largest first from the top (a noise budget's contributors)."""
    widget = _frame(canvas, ("bars", style), lambda: _bars_frame(style))
    plot = widget.ci.getItem(0, 0)
    count = len(values)
    positions = np.arange(count)[::-1].astype(float)
    bars = pg.BarGraphItem(x0=np.zeros(count), y=positions, height=0.6, width=np.asarray(values, dtype=float),
                           brush=pg.mkBrush(trace_style(1).colour), pen=pg.mkPen(style.foreground, width=0.5))
    plot.addItem(bars)
    left = plot.getAxis("left")
    left.setTicks([[(float(p), label) for p, label in zip(positions, labels, strict=True)]])
    metrics = QFontMetricsF(_tick_font(style))
    left.setWidth(int(max([metrics.horizontalAdvance(label) for label in labels] + [20.0]) + 14))
    _label(plot, "bottom", unit_label, style)
    plot.setYRange(-0.6, count - 0.4, padding=0)
    plot.setXRange(0, max(list(values) + [0.0]) * 1.05 or 1.0, padding=0)
    return widget


def render_plot(widget: pg.GraphicsLayoutWidget, painter: QPainter, rect: QRectF) -> None:
    """Paint a plot widget into ``rect`` as vectors (the widget need not be shown).

    The widget's layout is set to the rectangle's size first, so fonts and line widths keep
    their size instead of being scaled. On a device of the resolution pyqtgraph lays its axes out
    for (96 dpi, the PDF writer) the scene is painted straight into it; on another (a 600-dpi
    printer) the tick labels would be misplaced, so the scene is recorded into a ``QPicture`` at
    96 dpi and replayed through ``painter``. Either way the result stays vector.
    """
    width, height = int(round(rect.width())), int(round(rect.height()))
    widget.resize(width, height)
    widget.ci.setGeometry(QRectF(0, 0, width, height))
    widget.ci.layout.activate()
    # An axis places its label when it is resized; a reused frame of the same size keeps the
    # previous figure's place (centred for the previous text), so every label is placed anew.
    for plot in _plots(widget):
        for name in ("left", "bottom", "right", "top"):
            plot.getAxis(name).resizeEvent(None)
    source = QRectF(0, 0, width, height)
    painter.save()
    try:  # the painter's clip and offset never outlive this figure, even when painting fails
        painter.setClipRect(rect)
        painter.translate(rect.topLeft())
        if painter.device().logicalDpiX() == LAYOUT_DPI:
            painter.setRenderHint(QPainter.RenderHint.Antialiasing, True)
            widget.scene().render(painter, source, source)
        else:
            picture = QPicture()
            recorder = QPainter(picture)
            try:
                recorder.setRenderHint(QPainter.RenderHint.Antialiasing, True)
                recorder.setClipRect(source)
                widget.scene().render(recorder, source, source)
            finally:
                recorder.end()
            # drawPicture scales by (device dpi / picture dpi) by itself; the painter's transform
            # already maps our 96-dpi units to the device, so that factor is taken back out here.
            factor = picture.logicalDpiX() / painter.device().logicalDpiX()
            painter.scale(factor, factor)
            painter.drawPicture(0, 0, picture)
    finally:
        painter.restore()
    frame = QPen(QColor("#9a9a9a"), 0.5)
    painter.setPen(frame)
    painter.setBrush(Qt.BrushStyle.NoBrush)
    painter.drawRect(rect)
