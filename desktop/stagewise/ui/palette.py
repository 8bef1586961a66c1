"""Trace colours and line styles that stay distinguishable without colour.

The colours are the eight-colour palette for colour-blind readers of Okabe & Ito; each trace
also gets one of four line styles, so two traces never differ by colour alone.

References
----------
M. Okabe and K. Ito, "Color Universal Design (CUD): How to make figures and presentations that
are friendly to colorblind people", J*FLY, 2008.
"""

from __future__ import annotations

from dataclasses import dataclass

from PySide6.QtCore import Qt
from PySide6.QtGui import QColor

__all__ = [
    "LINE_STYLES",
    "MEASUREMENT_MARKERS",
    "OKABE_ITO",
    "PLOT_OPTIONS",
    "MarkerStyle",
    "TraceStyle",
    "limit_brush_colour",
    "measurement_style",
    "trace_style",
]

# Okabe & Ito (2008), in their order, black first; yellow is left to the end because it is
# faint on white.
OKABE_ITO: tuple[tuple[str, str], ...] = (
    ("black", "#000000"),
    ("blue", "#0072B2"),
    ("vermillion", "#D55E00"),
    ("bluish green", "#009E73"),
    ("orange", "#E69F00"),
    ("reddish purple", "#CC79A7"),
    ("sky blue", "#56B4E9"),
    ("yellow", "#F0E442"),
)

LINE_STYLES: tuple[tuple[str, Qt.PenStyle], ...] = (
    ("solid", Qt.PenStyle.SolidLine),
    ("dash", Qt.PenStyle.DashLine),
    ("dot", Qt.PenStyle.DotLine),
    ("dash-dot", Qt.PenStyle.DashDotLine),
)


@dataclass(frozen=True, slots=True)
class TraceStyle:
    """Colour and line style of one trace, with their names for the legend and tests."""

    colour: str
    colour_name: str
    line: Qt.PenStyle
    line_name: str
    width: float

    def qcolor(self) -> QColor:
        return QColor(self.colour)


def trace_style(index: int, width: float = 2.0) -> TraceStyle:
    """The style of the ``index``-th trace.

    Trace k uses colour k mod 8 and line style (k + k div 8) mod 4: neighbours differ in both,
    and the first 32 traces never share both colour and style.
    """
    colour_name, colour = OKABE_ITO[index % len(OKABE_ITO)]
    line_name, line = LINE_STYLES[(index + index // len(OKABE_ITO)) % len(LINE_STYLES)]
    return TraceStyle(colour, colour_name, line, line_name, width)


# pyqtgraph's global options for every plot, in the program and in the packet (both set them, so a
# packet made without the GUI loaded draws as the program does): curves, symbols and text
# antialiased, dark ink on white.
PLOT_OPTIONS: dict[str, object] = {"antialias": True, "background": "w", "foreground": "#202020"}


def limit_brush_colour(alpha: int = 50) -> QColor:
    """Fill colour of shaded check limits: the palette's sky blue, translucent."""
    colour = QColor(OKABE_ITO[6][1])
    colour.setAlpha(alpha)
    return colour


# Bench measurements are drawn as markers without a line (they are sampled data, not a model),
# with their own colour order (reddish purple first, which no predicted trace takes before the sixth)
# and a marker shape per measurement, so they stay distinguishable without colour.
MEASUREMENT_MARKERS: tuple[tuple[str, str], ...] = (
    ("circle", "o"),
    ("square", "s"),
    ("triangle", "t"),
    ("diamond", "d"),
)
_MEASUREMENT_COLOURS = (5, 3, 4, 2, 6, 1)  # indices into OKABE_ITO


@dataclass(frozen=True, slots=True)
class MarkerStyle:
    """Colour and marker shape of one measured trace, with their names for the legend and tests."""

    colour: str
    colour_name: str
    symbol: str
    symbol_name: str
    size: float

    def qcolor(self) -> QColor:
        return QColor(self.colour)


def measurement_style(index: int, size: float = 6.0) -> MarkerStyle:
    """The style of the ``index``-th measured trace: colour and marker both change with the index."""
    colour_name, colour = OKABE_ITO[_MEASUREMENT_COLOURS[index % len(_MEASUREMENT_COLOURS)]]
    symbol_name, symbol = MEASUREMENT_MARKERS[index % len(MEASUREMENT_MARKERS)]
    return MarkerStyle(colour, colour_name, symbol, symbol_name, size)


# Each sign-off state as the tree shows it: a short word, a shape that reads without colour, and
# a colour of the palette above (darkened where the pure colour is too light for text on white).
STATE_MARKS: dict[str, tuple[str, str, str]] = {
    "accepted": ("accepted", "✓", "#007a5a"),            # bluish green
    "returned for rework": ("rework", "✗", "#b34700"),   # vermillion, darkened
    "out of date": ("out of date", "△", "#9a6a00"),      # orange, darkened
    "unrecorded": ("unrecorded", "?", "#b34700"),
    "not signed": ("unsigned", "○", "#505050"),
}
