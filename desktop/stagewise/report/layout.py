"""Page layout for the review packet: blocks that flow onto A4 pages, painted with QPainter.

The packet is a list of blocks (headings, paragraphs, tables, figures). :func:`paginate`
places them on pages first, splitting paragraphs and tables between lines or rows, so the
number of pages is known before anything is painted; :func:`paint_pages` then paints every
page with its header and its "page N of M" footer on any paged device (``QPdfWriter`` for the
file, ``QPrinter`` for paper).

Coordinates are logical pixels at 96 per inch (A4 is about 794 × 1123). Fonts are sized in
pixels, not points, so a painter scaled for another device resolution draws the same page.
"""

from __future__ import annotations

import functools
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field

from PySide6.QtCore import QPointF, QRectF, Qt
from PySide6.QtGui import QColor, QFont, QFontMetricsF, QPagedPaintDevice, QPainter, QPen

from stagewise.present.typography import keep_units_together

__all__ = [
    "LOGICAL_DPI",
    "Block",
    "Figure",
    "Heading",
    "Page",
    "PageBreak",
    "PageFrame",
    "Paragraph",
    "Spacer",
    "Table",
    "font",
    "paginate",
    "paint_pages",
]

LOGICAL_DPI = 96
MM = LOGICAL_DPI / 25.4  # logical pixels per millimetre
FONT_FAMILIES = ["DejaVu Sans", "Liberation Sans", "Arial", "Helvetica", "sans-serif"]

INK = QColor("#111111")
MUTED = QColor("#555555")
RULE = QColor("#9a9a9a")
SHADE = QColor("#eef0f2")


def font(size_px: float, bold: bool = False, italic: bool = False, mono: bool = False) -> QFont:
    """The packet's font: a clean sans-serif (or monospace for hashes and formulas), sized in pixels.

    One shared object per size and style (a packet asks some ten thousand times while it lays out
    its tables): set it on a painter, never change it.
    """
    return _font(max(int(round(size_px)), 1), bold, italic, mono)


_METRICS: dict[int, tuple[QFont, QFontMetricsF]] = {}


def metrics_of(shared: QFont) -> QFontMetricsF:
    """The metrics of a font from :func:`font`, made once per font."""
    found = _METRICS.get(id(shared))
    if found is None or found[0] is not shared:
        found = _METRICS[id(shared)] = (shared, QFontMetricsF(shared))
    return found[1]


@functools.lru_cache(maxsize=64)
def _font(size_px: int, bold: bool, italic: bool, mono: bool) -> QFont:
    result = QFont()
    result.setFamilies(["DejaVu Sans Mono", "Liberation Mono", "monospace"] if mono else FONT_FAMILIES)
    result.setPixelSize(size_px)
    result.setBold(bold)
    result.setItalic(italic)
    result.setKerning(True)
    # No ligatures: text copied or searched in the PDF must read "fi", not one "ﬁ" glyph.
    for tag in ("liga", "clig"):
        result.setFeature(QFont.Tag(tag), 0)
    return result


def wrap_text(text: str, metrics: QFontMetricsF, width: float) -> list[str]:
    """Greedy word wrap to ``width``; words longer than a line are cut between characters.

    Linear in the length of the text: a word too long for a line is cut by measuring only
    prefixes up to about twice what a line holds (:func:`_fitting_prefix`), never the whole
    remaining word, so a 100,000-character word (a pasted hash dump) costs no more than the same
    text in words.
    """
    lines: list[str] = []
    for paragraph in text.split("\n"):
        current = ""
        for word in paragraph.split(" "):
            candidate = word if not current else current + " " + word
            if metrics.horizontalAdvance(candidate) <= width:
                current = candidate
                continue
            if current:
                lines.append(current)
            # A word wider than the line (a hash, a long formula): cut it.
            while len(word) > 1:
                cut = _fitting_prefix(word, metrics, width)
                if cut >= len(word):
                    break
                lines.append(word[:cut])
                word = word[cut:]
            current = word
        lines.append(current)
    return lines


def _fitting_prefix(word: str, metrics: QFontMetricsF, width: float) -> int:
    """The length of the longest prefix of ``word`` no wider than ``width`` (at least 1).

    Galloping then bisection: the prefixes measured are at most twice the answer long, so the
    cost is O(answer · log answer) whatever the length of ``word``.
    """
    fits, reach = 1, 1
    while reach < len(word) and metrics.horizontalAdvance(word[: reach * 2]) <= width:
        reach *= 2
        fits = reach
    if reach >= len(word):
        return len(word)
    low, high = fits, min(reach * 2, len(word))  # prefix[:low] fits (or low is 1), prefix[:high] does not
    if fits == 1 and metrics.horizontalAdvance(word[:1]) > width:
        return 1
    while high - low > 1:
        middle = (low + high) // 2
        if metrics.horizontalAdvance(word[:middle]) <= width:
            low = middle
        else:
            high = middle
    return low


class Block:
    """Something that flows onto pages. Subclasses measure, split and paint themselves."""

    keep_with_next = False
    splittable = False

    def height(self, width: float) -> float:
        raise NotImplementedError

    def split(self, width: float, available: float) -> tuple[Block | None, Block | None]:
        """The part that fits in ``available`` and the rest; ``(None, self)`` when it cannot split."""
        return None, self

    def paint(self, painter: QPainter, x: float, y: float, width: float) -> None:
        raise NotImplementedError


@dataclass
class Spacer(Block):
    size: float

    def height(self, width: float) -> float:
        return self.size

    def paint(self, painter: QPainter, x: float, y: float, width: float) -> None:
        return None


class PageBreak(Block):
    """Start a new page (ignored at the top of a page)."""

    def height(self, width: float) -> float:
        return 0.0

    def paint(self, painter: QPainter, x: float, y: float, width: float) -> None:
        return None


@dataclass
class Paragraph(Block):
    """Wrapped text in one font and colour; splits between lines."""

    splittable = True

    text: str
    size_px: float = 12.0
    bold: bool = False
    italic: bool = False
    mono: bool = False
    color: QColor = field(default_factory=lambda: QColor(INK))
    space_after: float = 6.0
    indent: float = 0.0
    lines: list[str] | None = None  # pre-wrapped continuation of a split paragraph
    _wrapped: tuple[float, list[str]] | None = field(default=None, repr=False)  # (width, lines) measured last

    def _font(self) -> QFont:
        return font(self.size_px, self.bold, self.italic, self.mono)

    def _lines(self, width: float) -> list[str]:
        if self.lines is not None:
            return self.lines
        if self._wrapped is None or self._wrapped[0] != width:
            # A number and its unit never end up on two lines.
            self._wrapped = (width, wrap_text(keep_units_together(self.text), metrics_of(self._font()),
                                              width - self.indent))
        return self._wrapped[1]

    def _line_height(self) -> float:
        return metrics_of(self._font()).lineSpacing()

    def height(self, width: float) -> float:
        return len(self._lines(width)) * self._line_height() + self.space_after

    def split(self, width: float, available: float) -> tuple[Block | None, Block | None]:
        lines = self._lines(width)
        fitting = int(available // self._line_height())
        if fitting < 2 or len(lines) - fitting < 2:  # no widow or orphan lines
            return None, self
        first = Paragraph(self.text, self.size_px, self.bold, self.italic, self.mono, self.color, 0.0,
                          self.indent, lines[:fitting])
        rest = Paragraph(self.text, self.size_px, self.bold, self.italic, self.mono, self.color,
                         self.space_after, self.indent, lines[fitting:])
        return first, rest

    def paint(self, painter: QPainter, x: float, y: float, width: float) -> None:
        painter.setFont(self._font())
        painter.setPen(self.color)
        metrics = metrics_of(self._font())
        step = metrics.lineSpacing()
        baseline = y + metrics.ascent()
        for line in self._lines(width):
            painter.drawText(QPointF(x + self.indent, baseline), line)
            baseline += step


@dataclass
class Heading(Block):
    """A section title; never left alone at the bottom of a page."""

    text: str
    level: int = 1
    keep_with_next = True

    def _font(self) -> QFont:
        return font({0: 24.0, 1: 18.0, 2: 14.5, 3: 12.5}.get(self.level, 12.5), bold=True)

    def height(self, width: float) -> float:
        metrics = metrics_of(self._font())
        lines = wrap_text(self.text, metrics, width)
        above = {0: 0.0, 1: 4.0, 2: 10.0, 3: 8.0}.get(self.level, 6.0)
        rule = 6.0 if self.level == 1 else 0.0
        return above + len(lines) * metrics.lineSpacing() + rule + 6.0

    def paint(self, painter: QPainter, x: float, y: float, width: float) -> None:
        metrics = metrics_of(self._font())
        painter.setFont(self._font())
        painter.setPen(INK)
        baseline = y + {0: 0.0, 1: 4.0, 2: 10.0, 3: 8.0}.get(self.level, 6.0) + metrics.ascent()
        lines = wrap_text(self.text, metrics, width)
        for line in lines:
            painter.drawText(QPointF(x, baseline), line)
            baseline += metrics.lineSpacing()
        if self.level == 1:
            painter.setPen(QPen(INK, 1.2))
            rule_y = baseline - metrics.ascent() + 3.0
            painter.drawLine(QPointF(x, rule_y), QPointF(x + width, rule_y))


@dataclass
class Column:
    """A table column: header text, alignment, and whether its text may wrap."""

    title: str
    align: str = "left"  # "left", "right" or "center"
    wrap: bool = True
    mono: bool = False


@dataclass
class Table(Block):
    """Rows of text in aligned columns; splits between rows and repeats its header.

    ``row_marks`` gives an optional mark per row: ``"bad"`` (bold, red-brown text, for not met
    and stale) or ``"muted"`` (grey, for waived or bypassed), so status does not rely on colour
    alone (the status words are in the cells).
    """

    columns: list[Column]
    rows: list[list[str]]
    size_px: float = 11.0
    header: bool = True
    row_marks: list[str] | None = None
    space_after: float = 10.0
    widths: list[float] | None = None
    _cached: tuple[float, list[float], list[list[list[str]]]] | None = field(default=None, repr=False)

    PAD_X = 5.0
    PAD_Y = 3.0

    def _fonts(self) -> tuple[QFont, QFont]:
        return font(self.size_px), font(self.size_px, bold=True)

    def _cell_font(self, column: int, mark: str = "") -> QFont:
        return font(self.size_px, bold=mark == "bad", mono=self.columns[column].mono)

    def _marks(self) -> list[str]:
        marks = list(self.row_marks or [])
        return marks + [""] * (len(self.rows) - len(marks))

    def _column_widths(self, width: float) -> list[float]:
        if self.widths is not None:
            return self.widths
        _, bold = self._fonts()
        natural: list[float] = []
        minimum: list[float] = []
        marks = self._marks()
        for index, column in enumerate(self.columns):
            measured = [(metrics_of(self._cell_font(index, marks[row_index])), row[index])
                        for row_index, row in enumerate(self.rows) if index < len(row)]
            widest = max([metrics.horizontalAdvance(line) for metrics, text in measured for line in text.split("\n")]
                         + [0.0])
            head = metrics_of(bold).horizontalAdvance(column.title) if self.header else 0.0
            natural.append(max(widest, head) + 2 * self.PAD_X + 1)
            if column.wrap:
                longest_word = max([metrics.horizontalAdvance(word) for metrics, text in measured for word in text.split()]
                                   + [metrics_of(bold).horizontalAdvance(word) for word in column.title.split()]
                                   + [0.0])
                minimum.append(min(longest_word + 2 * self.PAD_X + 1, natural[-1]))
            else:
                minimum.append(natural[-1])
        total = sum(natural)
        if total <= width:
            # Spread the spare width over the wrapping columns (text reads better wide).
            spare = width - total
            wrapping = [index for index, column in enumerate(self.columns) if column.wrap] or list(range(len(natural)))
            share = sum(natural[index] for index in wrapping)
            return [natural[i] + (spare * natural[i] / share if i in wrapping else 0.0) for i in range(len(natural))]
        # Too wide: fixed columns keep their width; wrapping ones share the rest by natural width.
        fixed = sum(minimum[i] for i, column in enumerate(self.columns) if not column.wrap)
        flexible = [i for i, column in enumerate(self.columns) if column.wrap]
        room = max(width - fixed, 0.0)
        # Share by the square root of the natural width: long texts still get more room, but a
        # long question does not squeeze its neighbours into one word per line.
        weights = {i: math.sqrt(natural[i]) for i in flexible}
        share = sum(weights.values()) or 1.0
        widths = list(minimum)
        for i in flexible:
            widths[i] = max(minimum[i], room * weights[i] / share)
        excess = sum(widths) - width
        if excess > 0:  # still too wide: shrink the flexible columns evenly above their minimum
            for i in flexible:
                give = min(excess, max(widths[i] - minimum[i], 0.0))
                widths[i] -= give
                excess -= give
        if excess > 0 and flexible:
            # Long unbroken words (hashes, formulas): wrap_text cuts them, so the widest flexible
            # columns are capped at one width L (found by bisection) that makes the table fit,
            # leaving the narrow ones (names, short words) whole.
            room_left = max(width - fixed, 12.0 * len(flexible))
            low, high = 0.0, max(widths[i] for i in flexible)
            for _ in range(50):
                level = (low + high) / 2
                if sum(min(widths[i], level) for i in flexible) > room_left:
                    high = level
                else:
                    low = level
            for i in flexible:
                widths[i] = min(widths[i], low)
        total = sum(widths)
        if total > width:  # even the fixed columns are too wide: scale every column to fit
            widths = [w * width / total for w in widths]
        return widths

    def _layout(self, width: float) -> tuple[list[float], list[list[list[str]]]]:
        if self._cached is not None and self._cached[0] == width:
            return self._cached[1], self._cached[2]
        widths = self._column_widths(width)
        cells: list[list[list[str]]] = []
        for row, mark in zip(self.rows, self._marks(), strict=True):
            wrapped = []
            for index, column in enumerate(self.columns):
                text = row[index] if index < len(row) else ""
                inner = widths[index] - 2 * self.PAD_X
                metrics = metrics_of(self._cell_font(index, mark))
                wrapped.append(wrap_text(keep_units_together(text), metrics, inner) if column.wrap
                               else keep_units_together(text).split("\n"))
            cells.append(wrapped)
        self._cached = (width, widths, cells)
        return widths, cells

    def _line(self) -> float:
        return metrics_of(font(self.size_px)).lineSpacing()

    def _header_height(self, width: float) -> float:
        if not self.header:
            return 0.0
        widths, _ = self._layout(width)
        _, bold = self._fonts()
        metrics = metrics_of(bold)
        lines = max(len(wrap_text(column.title, metrics, widths[i] - 2 * self.PAD_X))
                    for i, column in enumerate(self.columns))
        return lines * metrics.lineSpacing() + 2 * self.PAD_Y

    def _row_heights(self, width: float) -> list[float]:
        _, cells = self._layout(width)
        return [max(len(cell) for cell in row) * self._line() + 2 * self.PAD_Y for row in cells]

    def height(self, width: float) -> float:
        return self._header_height(width) + sum(self._row_heights(width)) + self.space_after

    def split(self, width: float, available: float) -> tuple[Block | None, Block | None]:
        heights = self._row_heights(width)
        used = self._header_height(width)
        count = 0
        for row_height in heights:
            if used + row_height > available:
                break
            used += row_height
            count += 1
        if count == 0 or count == len(self.rows):
            return None, self
        marks = self._marks()
        first = Table(self.columns, self.rows[:count], self.size_px, self.header, marks[:count], 0.0,
                      self._column_widths(width))
        rest = Table(self.columns, self.rows[count:], self.size_px, self.header, marks[count:],
                     self.space_after, self._column_widths(width))
        # The rows keep the lines they were wrapped into at this width.
        widths, cells = self._layout(width)
        first._cached, rest._cached = (width, widths, cells[:count]), (width, widths, cells[count:])
        return first, rest

    def paint(self, painter: QPainter, x: float, y: float, width: float) -> None:
        widths, cells = self._layout(width)
        regular, bold = self._fonts()
        total_width = sum(widths)
        top = y
        if self.header:
            head_height = self._header_height(width)
            painter.fillRect(QRectF(x, y, total_width, head_height), SHADE)
            painter.setFont(bold)
            painter.setPen(INK)
            metrics = metrics_of(bold)
            left = x
            for index, column in enumerate(self.columns):
                lines = wrap_text(column.title, metrics, widths[index] - 2 * self.PAD_X)
                self._draw_lines(painter, lines, metrics, left, y + self.PAD_Y, widths[index], column.align)
                left += widths[index]
            y += head_height
            painter.setPen(QPen(INK, 0.8))
            painter.drawLine(QPointF(x, y), QPointF(x + total_width, y))
        marks = self._marks()
        for row_index, (row, row_height) in enumerate(zip(cells, self._row_heights(width), strict=True)):
            mark = marks[row_index]
            left = x
            for index, column in enumerate(self.columns):
                cell_font = self._cell_font(index, mark)
                painter.setFont(cell_font)
                painter.setPen(QColor("#8a1c00") if mark == "bad" else MUTED if mark == "muted" else INK)
                self._draw_lines(painter, row[index], metrics_of(cell_font), left, y + self.PAD_Y,
                                 widths[index], column.align)
                left += widths[index]
            y += row_height
            painter.setPen(QPen(RULE, 0.5))
            painter.drawLine(QPointF(x, y), QPointF(x + total_width, y))
        painter.setFont(regular)
        if self.header:
            painter.setPen(QPen(INK, 0.8))
            painter.drawLine(QPointF(x, top), QPointF(x + total_width, top))

    def _draw_lines(self, painter: QPainter, lines: Sequence[str], metrics: QFontMetricsF, left: float, top: float,
                    width: float, align: str) -> None:
        baseline = top + metrics.ascent()
        for line in lines:
            advance = metrics.horizontalAdvance(line)
            if align == "right":
                start = left + width - self.PAD_X - advance
            elif align == "center":
                start = left + (width - advance) / 2
            else:
                start = left + self.PAD_X
            painter.drawText(QPointF(start, baseline), line)
            baseline += self._line()


@dataclass
class Figure(Block):
    """A drawing of fixed height (a plot, the block diagram) with an optional caption below."""

    draw: Callable[[QPainter, QRectF], None]
    figure_height: float
    caption: str = ""
    space_after: float = 10.0
    _caption_block: Paragraph | None = field(default=None, repr=False)

    def _caption(self) -> Paragraph:
        if self._caption_block is None or self._caption_block.text != self.caption:
            self._caption_block = Paragraph(self.caption, 10.5, italic=True, color=QColor(MUTED), space_after=0.0)
        return self._caption_block

    def height(self, width: float) -> float:
        caption = self._caption().height(width) + 2.0 if self.caption else 0.0
        return self.figure_height + caption + self.space_after

    def paint(self, painter: QPainter, x: float, y: float, width: float) -> None:
        painter.save()
        self.draw(painter, QRectF(x, y, width, self.figure_height))
        painter.restore()
        if self.caption:
            self._caption().paint(painter, x, y + self.figure_height + 2.0, width)


@dataclass
class PageFrame:
    """The page: size and margins in logical pixels, and the header's words."""

    title: str
    revision: str
    short_sha: str
    footer_left: str
    width: float = 210 * MM
    height: float = 297 * MM
    margin_left: float = 20 * MM
    margin_right: float = 18 * MM
    margin_top: float = 22 * MM
    margin_bottom: float = 20 * MM

    @property
    def body(self) -> QRectF:
        return QRectF(self.margin_left, self.margin_top, self.width - self.margin_left - self.margin_right,
                      self.height - self.margin_top - self.margin_bottom)


@dataclass
class Page:
    """The blocks placed on one page, each with its top in logical pixels."""

    placed: list[tuple[Block, float]] = field(default_factory=list)


def paginate(blocks: Sequence[Block], frame: PageFrame) -> list[Page]:
    """Place ``blocks`` on pages, splitting paragraphs and tables, keeping headings with what follows."""
    body = frame.body
    width = body.width()
    pages = [Page()]
    y = 0.0
    queue = list(blocks)
    index = 0
    while index < len(queue):
        block = queue[index]
        if isinstance(block, PageBreak):
            if pages[-1].placed:
                pages.append(Page())
                y = 0.0
            index += 1
            continue
        height = block.height(width)
        needed = height
        if block.keep_with_next and index + 1 < len(queue):
            following = queue[index + 1]
            # Keep a heading with the first lines of what follows, or all of it when it cannot split.
            following_height = following.height(width)
            needed += min(following_height, 90.0) if following.splittable else following_height
        if y + needed <= body.height() or (y == 0.0 and height > body.height() and block.split(width, body.height())[0] is None):
            pages[-1].placed.append((block, y))
            y += height
            index += 1
            continue
        if not block.keep_with_next:
            first, rest = block.split(width, body.height() - y)
            if first is not None and rest is not None:
                pages[-1].placed.append((first, y))
                pages.append(Page())
                y = 0.0
                queue[index] = rest
                continue
        if y == 0.0:  # does not fit on an empty page either: place it and let it run over
            pages[-1].placed.append((block, y))
            y += height
            index += 1
            continue
        pages.append(Page())
        y = 0.0
    if not pages[-1].placed and len(pages) > 1:
        pages.pop()
    return pages


def paint_pages(device: QPagedPaintDevice, painter: QPainter, pages: Sequence[Page], frame: PageFrame,
                progress: Callable[[int, int], bool] | None = None) -> bool:
    """Paint ``pages`` with header and footer; ``False`` when ``progress`` asked to stop.

    ``painter`` is active on ``device``; its transform maps logical pixels at 96 per inch to
    the device (identity for a QPdfWriter set to 96 dpi).
    """
    body = frame.body
    total = len(pages)
    for number, page in enumerate(pages, start=1):
        if number > 1:
            device.newPage()
        _paint_header(painter, frame)
        for block, top in page.placed:
            block.paint(painter, body.left(), body.top() + top, body.width())
        _paint_footer(painter, frame, number, total)
        if progress is not None and not progress(number, total):
            return False
    return True


def _paint_header(painter: QPainter, frame: PageFrame) -> None:
    small = font(10.0)
    metrics = metrics_of(small)
    left = frame.margin_left
    right = frame.width - frame.margin_right
    baseline = frame.margin_top - 9 * MM
    painter.setFont(small)
    painter.setPen(MUTED)
    right_text = f"Revision {frame.revision or '—'} · file SHA-256 {frame.short_sha}"
    right_width = metrics.horizontalAdvance(right_text)
    title = metrics.elidedText(frame.title, Qt.TextElideMode.ElideRight, right - left - right_width - 20)
    painter.drawText(QPointF(left, baseline), title)
    painter.drawText(QPointF(right - right_width, baseline), right_text)
    painter.setPen(QPen(RULE, 0.6))
    painter.drawLine(QPointF(left, baseline + 5), QPointF(right, baseline + 5))


def _paint_footer(painter: QPainter, frame: PageFrame, number: int, total: int) -> None:
    small = font(10.0)
    metrics = metrics_of(small)
    left = frame.margin_left
    right = frame.width - frame.margin_right
    baseline = frame.height - frame.margin_bottom + 10 * MM
    painter.setPen(QPen(RULE, 0.6))
    painter.drawLine(QPointF(left, baseline - metrics.ascent() - 5), QPointF(right, baseline - metrics.ascent() - 5))
    painter.setFont(small)
    painter.setPen(MUTED)
    painter.drawText(QPointF(left, baseline), frame.footer_left)
    text = f"page {number} of {total}"
    painter.drawText(QPointF(right - metrics.horizontalAdvance(text), baseline), text)
