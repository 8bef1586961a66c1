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
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
import pyqtgraph as pg
from numpy.typing import NDArray
from PySide6.QtCore import QRectF, Qt
from PySide6.QtGui import QColor, QFont, QPainter, QPen

from stagewise.model.values import format_value

__all__ = [
    "LINE_STYLES",
    "PALETTE",
    "FrequencyAxis",
    "PlotStyle",
    "ResponseTrace",
    "Shade",
    "bars_plot",
    "pole_zero_plot",
    "render_plot",
    "response_plot",
    "trace_from_complex",
]

# Okabe & Ito (2008): black, orange, sky blue, bluish green, yellow, blue, vermillion, reddish purple.
# Yellow is left out: it vanishes on white paper.
PALETTE = ("#0072B2", "#D55E00", "#009E73", "#CC79A7", "#56B4E9", "#E69F00", "#000000")
LINE_STYLES = (Qt.PenStyle.SolidLine, Qt.PenStyle.DashLine, Qt.PenStyle.DotLine, Qt.PenStyle.DashDotLine,
               Qt.PenStyle.DashDotDotLine)


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


@dataclass
class ResponseTrace:
    """One curve of a magnitude/phase plot: label, frequency (Hz), magnitude (dB), phase (deg)."""

    label: str
    f_hz: NDArray[np.float64]
    mag_db: NDArray[np.float64]
    phase_deg: NDArray[np.float64]


@dataclass
class Shade:
    """A check's limit drawn as a shaded band on the magnitude plot: dB range over a frequency span."""

    f_low_hz: float
    f_high_hz: float
    low_db: float | None
    high_db: float | None
    label: str = ""
    extra: dict[str, str] = field(default_factory=dict)


def trace_from_complex(label: str, f_hz: NDArray[np.float64], response: NDArray[np.complex128]) -> ResponseTrace:
    """Magnitude in dB (20·log10|H|) and unwrapped phase in degrees of a complex response."""
    with np.errstate(divide="ignore"):
        magnitude = 20.0 * np.log10(np.abs(response))
    phase = np.degrees(np.unwrap(np.angle(response)))
    return ResponseTrace(label, np.asarray(f_hz, dtype=float), magnitude, phase)


class FrequencyAxis(pg.AxisItem):
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
    pen = pg.mkPen(PALETTE[index % len(PALETTE)], width=style.line_width)
    pen.setStyle(LINE_STYLES[index % len(LINE_STYLES)])
    return pen


def _legend(plot: pg.PlotItem, style: PlotStyle) -> pg.LegendItem:
    legend = plot.addLegend(offset=(-8, 8), labelTextColor=style.foreground, labelTextSize=f"{style.tick_px}px",
                            brush=pg.mkBrush(style.background), pen=pg.mkPen(style.foreground, width=0.5))
    return legend


def response_plot(traces: Sequence[ResponseTrace], shades: Sequence[Shade] = (), style: PlotStyle = PRINT,
                  show_phase: bool = True) -> pg.GraphicsLayoutWidget:
    """Magnitude (dB) above phase (degrees) on linked log-frequency axes, one style per trace."""
    widget = pg.GraphicsLayoutWidget()
    widget.setBackground(style.background)
    magnitude = widget.addPlot(row=0, col=0, axisItems={"bottom": FrequencyAxis("bottom")})
    _style_axes(magnitude, style)
    magnitude.setLogMode(x=True, y=False)
    _label(magnitude, "left", "magnitude (dB)", style)
    if len(traces) > 1:
        _legend(magnitude, style)
    for shade in shades:
        _add_shade(magnitude, shade)
    for index, trace in enumerate(traces):
        finite = np.isfinite(trace.mag_db)
        magnitude.plot(trace.f_hz[finite], trace.mag_db[finite], pen=_pen(index, style), name=trace.label)
    _minimum_span(magnitude, [trace.mag_db for trace in traces], 2.0)
    magnitude.getAxis("left").setWidth(64)
    if show_phase:
        phase = widget.addPlot(row=1, col=0, axisItems={"bottom": FrequencyAxis("bottom")})
        _style_axes(phase, style)
        phase.setLogMode(x=True, y=False)
        phase.setXLink(magnitude)
        _label(phase, "left", "phase (°)", style)
        _label(phase, "bottom", "frequency (Hz)", style)
        for index, trace in enumerate(traces):
            finite = np.isfinite(trace.phase_deg)
            phase.plot(trace.f_hz[finite], trace.phase_deg[finite], pen=_pen(index, style))
        _minimum_span(phase, [trace.phase_deg for trace in traces], 20.0)
        widget.ci.layout.setRowStretchFactor(0, 3)
        widget.ci.layout.setRowStretchFactor(1, 2)
        phase.getAxis("left").setWidth(64)
    else:
        _label(magnitude, "bottom", "frequency (Hz)", style)
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


def _add_shade(plot: pg.PlotItem, shade: Shade) -> None:
    # A limit drawn as the forbidden region's edge: the band where the check is met is shaded.
    low = shade.low_db if shade.low_db is not None else -400.0
    high = shade.high_db if shade.high_db is not None else 400.0
    x = np.log10([shade.f_low_hz, shade.f_high_hz])
    region = pg.FillBetweenItem(pg.PlotDataItem(x, [low, low]), pg.PlotDataItem(x, [high, high]),
                                brush=pg.mkBrush(0, 158, 115, 40))
    plot.addItem(region, ignoreBounds=True)


def pole_zero_plot(poles_rad_s: Sequence[complex], zeros_rad_s: Sequence[complex],
                   style: PlotStyle = PRINT) -> pg.GraphicsLayoutWidget:
    """Poles (×) and zeros (○) in the s-plane, axes in rad/s with SI prefixes."""
    widget = pg.GraphicsLayoutWidget()
    widget.setBackground(style.background)
    plot = widget.addPlot()
    _style_axes(plot, style)
    for name in ("left", "bottom"):
        plot.getAxis(name).enableAutoSIPrefix(True)
    _label(plot, "bottom", "real part σ (rad/s)", style)
    _label(plot, "left", "imaginary part ω (rad/s)", style)
    values = [complex(v) for v in list(poles_rad_s) + list(zeros_rad_s)]
    extent = max([abs(v.real) for v in values] + [abs(v.imag) for v in values] + [1.0]) * 1.15
    plot.addLine(x=0, pen=pg.mkPen(style.foreground, width=0.6, style=Qt.PenStyle.DashLine))
    plot.addLine(y=0, pen=pg.mkPen(style.foreground, width=0.6, style=Qt.PenStyle.DashLine))
    if poles_rad_s:
        plot.plot([p.real for p in poles_rad_s], [p.imag for p in poles_rad_s], pen=None, symbol="x",
                  symbolSize=11, symbolPen=pg.mkPen(PALETTE[1], width=1.8), symbolBrush=None, name="poles")
    if zeros_rad_s:
        plot.plot([z.real for z in zeros_rad_s], [z.imag for z in zeros_rad_s], pen=None, symbol="o",
                  symbolSize=10, symbolPen=pg.mkPen(PALETTE[0], width=1.6), symbolBrush=None, name="zeros")
    plot.setXRange(-extent, max(extent * 0.25, max([v.real for v in values] + [0.0]) * 1.15), padding=0)
    plot.setYRange(-extent, extent, padding=0)
    return widget


def bars_plot(labels: Sequence[str], values: Sequence[float], unit_label: str,
              style: PlotStyle = PRINT) -> pg.GraphicsLayoutWidget:
    """Horizontal bars, largest first from the top (a noise budget's contributors)."""
    widget = pg.GraphicsLayoutWidget()
    widget.setBackground(style.background)
    plot = widget.addPlot()
    _style_axes(plot, style)
    count = len(values)
    positions = np.arange(count)[::-1].astype(float)
    bars = pg.BarGraphItem(x0=np.zeros(count), y=positions, height=0.6, width=np.asarray(values, dtype=float),
                           brush=pg.mkBrush(PALETTE[0]), pen=pg.mkPen(style.foreground, width=0.5))
    plot.addItem(bars)
    plot.getAxis("left").setTicks([[(float(p), label) for p, label in zip(positions, labels, strict=True)]])
    _label(plot, "bottom", unit_label, style)
    plot.setYRange(-0.6, count - 0.4, padding=0)
    plot.setXRange(0, max(list(values) + [0.0]) * 1.05 or 1.0, padding=0)
    plot.showGrid(x=True, y=False, alpha=style.grid_alpha)
    return widget


def render_plot(widget: pg.GraphicsLayoutWidget, painter: QPainter, rect: QRectF) -> None:
    """Paint a plot widget into ``rect`` as vectors (the widget need not be shown).

    The widget's layout is set to the rectangle's size first, so fonts and line widths keep
    their size instead of being scaled.
    """
    width, height = int(round(rect.width())), int(round(rect.height()))
    widget.resize(width, height)
    widget.ci.setGeometry(QRectF(0, 0, width, height))
    widget.ci.layout.activate()
    painter.save()
    painter.setRenderHint(QPainter.RenderHint.Antialiasing, True)
    painter.setClipRect(rect)
    widget.scene().render(painter, rect, QRectF(0, 0, width, height))
    painter.restore()
    frame = QPen(QColor("#9a9a9a"), 0.5)
    painter.setPen(frame)
    painter.setBrush(Qt.BrushStyle.NoBrush)
    painter.drawRect(rect)
