"""The chain's block diagram, drawn from the model with QPainter.

Stages are boxes in chain order, left to right and wrapping onto further rows, each with its
name, id and key figures (gain at the reference frequency and the −3 dB corners, isolated,
taken from the analysis document). A bypassed stage is drawn dashed and grey, raised above the
signal line, which runs straight past it. The source is at the left, the converter (or the
load) at the right.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

from PySide6.QtCore import QPointF, QRectF, Qt
from PySide6.QtGui import QBrush, QColor, QFontMetricsF, QPainter, QPainterPath, QPen, QPolygonF

from stagewise.report.layout import INK, MUTED, font, wrap_text

__all__ = ["DiagramBox", "diagram_height", "draw_diagram"]

BOX_WIDTH = 112.0
BOX_HEIGHT = 86.0  # an active stage
BYPASS_HEIGHT = 46.0  # a bypassed stage, drawn above the signal line
ACTIVE_TOP = 34.0
GAP = 22.0
ROW_PITCH = ACTIVE_TOP + BOX_HEIGHT + 30.0


@dataclass(frozen=True)
class DiagramBox:
    """One box: a stage (or the source/converter ends) with up to three lines of figures."""

    title: str
    subtitle: str
    figures: tuple[str, ...]
    bypassed: bool = False
    end: bool = False


def _per_row(width: float) -> int:
    return max(int((width + GAP) // (BOX_WIDTH + GAP)), 2)


def diagram_height(count: int, width: float) -> float:
    """Height needed to draw ``count`` boxes (ends included) in ``width``."""
    rows = math.ceil(count / _per_row(width))
    return rows * ROW_PITCH + 8.0


def _arrow(painter: QPainter, start: QPointF, end: QPointF) -> None:
    painter.setPen(QPen(INK, 1.2))
    painter.drawLine(start, end)
    angle = math.atan2(end.y() - start.y(), end.x() - start.x())
    size = 7.0
    head = QPolygonF([
        end,
        QPointF(end.x() - size * math.cos(angle - 0.4), end.y() - size * math.sin(angle - 0.4)),
        QPointF(end.x() - size * math.cos(angle + 0.4), end.y() - size * math.sin(angle + 0.4)),
    ])
    painter.setBrush(QBrush(INK))
    painter.drawPolygon(head)
    painter.setBrush(Qt.BrushStyle.NoBrush)


def _box(painter: QPainter, rect: QRectF, box: DiagramBox) -> None:
    colour = QColor("#8a8a8a") if box.bypassed else INK
    pen = QPen(colour, 1.0 if box.bypassed else 1.3)
    if box.bypassed:
        pen.setStyle(Qt.PenStyle.DashLine)
    painter.setPen(pen)
    painter.setBrush(QBrush(QColor("#ffffff") if not box.end else QColor("#f2f3f5")))
    painter.drawRoundedRect(rect, 5.0, 5.0)
    painter.setBrush(Qt.BrushStyle.NoBrush)
    title_font = font(10.5, bold=True)
    small = font(9.5)
    y = rect.top() + 4.0
    title_lines = wrap_text(box.title, QFontMetricsF(title_font), rect.width() - 8.0)
    if len(title_lines) > 2:
        title_lines = [title_lines[0], " ".join(title_lines[1:])]
    for text, text_font, text_colour in (
        [(line, title_font, colour) for line in title_lines]
        + [(box.subtitle, small, QColor("#8a8a8a") if box.bypassed else MUTED)]
        + [(line, small, colour) for line in box.figures]
    ):
        if not text:
            continue
        metrics = QFontMetricsF(text_font)
        shown = metrics.elidedText(text, Qt.TextElideMode.ElideRight, rect.width() - 8.0)
        painter.setFont(text_font)
        painter.setPen(text_colour)
        painter.drawText(QPointF(rect.center().x() - metrics.horizontalAdvance(shown) / 2, y + metrics.ascent()), shown)
        y += metrics.lineSpacing()


def draw_diagram(painter: QPainter, area: QRectF, boxes: Sequence[DiagramBox]) -> None:
    """Draw ``boxes`` (source first, converter last) as a wrapped row of blocks joined by arrows."""
    per_row = _per_row(area.width())
    used = min(per_row, len(boxes))
    row_width = used * BOX_WIDTH + (used - 1) * GAP
    left = area.left() + (area.width() - row_width) / 2
    rects: list[QRectF] = []
    for index, box in enumerate(boxes):
        row, column = divmod(index, per_row)
        x = left + column * (BOX_WIDTH + GAP)
        top = area.top() + row * ROW_PITCH
        if box.bypassed:
            rects.append(QRectF(x, top, BOX_WIDTH, BYPASS_HEIGHT))
        else:
            rects.append(QRectF(x, top + ACTIVE_TOP, BOX_WIDTH, BOX_HEIGHT))
    for rect, box in zip(rects, boxes, strict=True):
        _box(painter, rect, box)
    # The signal line joins the active boxes; it runs beneath bypassed ones.
    active = [index for index, box in enumerate(boxes) if not box.bypassed]
    for previous, following in zip(active, active[1:], strict=False):
        a, b = rects[previous], rects[following]
        line_y_a = a.center().y()
        line_y_b = b.center().y()
        if abs(a.top() - b.top()) < 1.0:  # same row
            _arrow(painter, QPointF(a.right(), line_y_a), QPointF(b.left(), line_y_b))
            continue
        # Next row: down from the right end, back to the left, into the next box.
        path = QPainterPath(QPointF(a.right(), line_y_a))
        turn_x = a.right() + GAP / 2
        mid_y = a.bottom() + (b.top() - a.bottom()) / 2
        path.lineTo(turn_x, line_y_a)
        path.lineTo(turn_x, mid_y)
        path.lineTo(b.left() - GAP / 2, mid_y)
        path.lineTo(b.left() - GAP / 2, line_y_b)
        painter.setPen(QPen(INK, 1.2))
        painter.drawPath(path)
        _arrow(painter, QPointF(b.left() - GAP / 2, line_y_b), QPointF(b.left(), line_y_b))
