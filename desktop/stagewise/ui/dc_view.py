"""The "DC accuracy" view: the DC error budget at the converter input, or at the selected stage's
output (in chain or alone), chosen in the view's place selector.

Largest contributors first, as horizontal bars (magnitudes, in the table's unit) and as a table
(source, stage, kind, error at the converter input with its unit in the header, gain error in
percent, whether the term is a drift over the temperature range). The rows come from
``engine.dc.budget_table``, the same rows the packet prints.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pyqtgraph as pg
from PySide6.QtCore import Qt
from PySide6.QtWidgets import QAbstractItemView, QComboBox, QLabel, QTableWidget, QTableWidgetItem, QWidget

from stagewise.ui.document import Document
from stagewise.ui.overlays import OverlaySelection
from stagewise.ui.palette import trace_style
from stagewise.ui.plots import PlotView
from stagewise.ui.worker import Computed, ComputeWorker

__all__ = ["DcView", "table_headers"]

BARS_SHOWN = 12
# The place selector: its words and the (where, stage?) it picks.
PLACES = (("At the converter input (whole chain)", "chain"),
          ("At the selected stage's output: its own errors, in chain", "in_chain"),
          ("At the selected stage's output: every stage up to it", "from_input"),
          ("At the selected stage's output: the stage alone", "isolated"))


def table_headers(unit: str, where: str = "chain") -> list[str]:
    """Column headers, each with its unit."""
    place = "At the converter" if where == "chain" else "At the output"
    return ["Source", "Stage", "Kind", f"{place} ({unit})", "Gain error (%)", "Over temperature"]


class DcView(PlotView):
    """Bars and a table of the DC budget, largest first, with a summary of the totals."""

    def __init__(self, document: Document, worker: ComputeWorker, overlays: OverlaySelection,
                 parent: QWidget | None = None) -> None:
        super().__init__(document, worker, overlays, parent)
        self.place = QComboBox(self)
        self.place.setObjectName("dcPlace")
        for words, _ in PLACES:
            self.place.addItem(words)
        self.place.currentIndexChanged.connect(self.refresh)
        # Its longest place name must not set the dock's minimum width (the docks beside it would
        # be squeezed at 1280×720): the box may be narrower than its text, elided.
        self.place.setSizeAdjustPolicy(QComboBox.SizeAdjustPolicy.AdjustToMinimumContentsLengthWithIcon)
        self.place.setMinimumContentsLength(10)
        self.layout().insertWidget(1, self.place)
        self.plot = self.graphics.addPlot(enableMenu=False)
        self.plot.showGrid(x=True, y=False, alpha=0.25)
        self.plot.getAxis("bottom").enableAutoSIPrefix(False)
        self.plot.setLabel("bottom", "Error at the converter input (magnitude)")
        self.bars = pg.BarGraphItem(x0=[], y=[], height=0.6, width=[], brush=pg.mkBrush(trace_style(1).colour))
        self.plot.addItem(self.bars)
        self.table = QTableWidget(0, 6, self)
        self.table.setObjectName("dcTable")
        self.table.setEditTriggers(QAbstractItemView.EditTrigger.NoEditTriggers)
        self.table.verticalHeader().setVisible(False)
        self.table.setHorizontalHeaderLabels(table_headers("V"))
        self.table.horizontalHeader().setStretchLastSection(True)
        self.layout().addWidget(self.table, 1)
        self.summary = QLabel(self)
        self.summary.setObjectName("dcSummary")
        self.summary.setTextFormat(Qt.TextFormat.PlainText)
        self.summary.setWordWrap(True)
        self.layout().addWidget(self.summary)
        self.bar_values = np.zeros(0)
        self.bar_labels: list[str] = []
        self._drawn: Any = None
        self.refresh()

    def key(self) -> tuple[str, str]:
        """The place shown: ``("chain", "")`` or ``(where, selected stage id)``."""
        where = PLACES[max(self.place.currentIndex(), 0)][1]
        return (where, "") if where == "chain" else (where, self.document.current_stage_id)

    def draw(self) -> None:
        computed = self.outcome.of_chain("dc") if self.outcome is not None else Computed(None, "")
        key = self.key()
        place = computed.value.places.get(key) if computed.ok else None
        if place is None or place.table is None:
            if self.outcome is not None:
                why = computed.why if not computed.ok else (place.why if place is not None else
                                                           "no stage is selected")
                self.note("DC budget", Computed(None, why))
            self._drawn = None
            self._show([], [], "V")
            self.table.setRowCount(0)
            self.summary.setText("")
            return
        if self._drawn == (id(computed.value), key):
            return  # the same budget: an edit's refresh before the new result arrives costs nothing
        self._drawn = (id(computed.value), key)
        table = place.table
        shown = [row for row in table.rows if row.value is not None][:BARS_SHOWN]
        self._show([f"{row.stage}: {row.source}" for row in shown], [abs(row.value) for row in shown], table.unit,
                   key[0])
        self._fill(table, key[0])
        self.summary.setText(place.summary)

    def _show(self, labels: list[str], values: list[float], unit: str, where: str = "chain") -> None:
        count = len(values)
        positions = np.arange(count)[::-1].astype(float)
        self.bar_values = np.asarray(values, dtype=float)
        self.bar_labels = labels
        self.bars.setOpts(x0=np.zeros(count), y=positions, width=self.bar_values, height=0.6)
        self.plot.getAxis("left").setTicks([[(float(p), label) for p, label in zip(positions, labels, strict=True)]])
        place = "the converter input" if where == "chain" else "the stage's output"
        self.plot.setLabel("bottom", f"Error at {place} ({unit}, magnitude)")
        if count:
            self.plot.setYRange(-0.6, count - 0.4, padding=0)
            self.plot.setXRange(0, float(self.bar_values.max()) * 1.05 or 1.0, padding=0)

    def _fill(self, table: Any, where: str) -> None:
        self.table.setHorizontalHeaderLabels(table_headers(table.unit, where))
        self.table.setRowCount(len(table.rows))
        for index, row in enumerate(table.rows):
            cells = [row.source, row.stage, row.kind,
                     "—" if row.value is None else f"{row.value:.4g}",
                     "—" if row.gain_error_pct is None else f"{row.gain_error_pct:.4g}",
                     "yes" if row.over_temperature else "no"]
            for column, text in enumerate(cells):
                item = QTableWidgetItem(text)
                if column in (3, 4):
                    item.setTextAlignment(Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter)
                self.table.setItem(index, column, item)
        self.table.resizeColumnsToContents()
