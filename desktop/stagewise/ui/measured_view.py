"""The deviation view: every ticked bench measurement against its prediction, with the spread band."""

from __future__ import annotations

from typing import Any

from PySide6.QtCore import Qt
from PySide6.QtWidgets import QLabel, QWidget

from stagewise.ui.measured_plots import draw_deviation, measurement_summary
from stagewise.ui.overlays import OverlaySelection
from stagewise.ui.palette import measurement_style
from stagewise.ui.plots import PlotView

__all__ = ["MeasurementView"]


class MeasurementView(PlotView):
    """Deviation of every ticked measurement from its prediction, with the spread band."""

    def __init__(self, document: Any, worker: Any, overlays: OverlaySelection, parent: QWidget | None = None) -> None:
        super().__init__(document, worker, overlays, parent)
        self.plot_db = self.graphics.addPlot(row=0, col=0)
        self.plot_deg = self.graphics.addPlot(row=1, col=0)
        for plot in (self.plot_db, self.plot_deg):
            plot.setLogMode(x=True, y=False)
            plot.getAxis("bottom").enableAutoSIPrefix(False)
            plot.getAxis("left").enableAutoSIPrefix(False)
            plot.getAxis("left").setWidth(64)
            plot.showGrid(x=True, y=True, alpha=0.25)
        self.plot_db.setLabel("left", "Deviation", units="dB")
        self.plot_deg.setLabel("left", "Deviation", units="°")
        self.plot_deg.setLabel("bottom", "Frequency (Hz)")
        self.plot_deg.setXLink(self.plot_db)
        self.summary = QLabel(self)
        self.summary.setObjectName("measurementSummary")
        self.summary.setTextFormat(Qt.TextFormat.PlainText)
        self.summary.setWordWrap(True)
        self.layout().addWidget(self.summary)
        self.shown: list[Any] = []
        self.refresh()

    def draw(self) -> None:
        self.plot_db.clear()
        self.plot_deg.clear()
        self.shown = []
        if self.outcome is None:
            self.summary.setText("")
            return
        computed = self.outcome.of_chain("measurements")
        if not computed.ok:
            self.note("Bench measurements", computed)
            self.summary.setText("")
            return
        comparisons = list(computed.value)
        if not comparisons:
            self.summary.setText("No bench measurement is attached. Attach one with "
                                 "'stagewise measure FILE DATA --stage ID' or --chain.")
            return
        styled = [(comparison, measurement_style(index)) for index, comparison in enumerate(comparisons)
                  if self.overlays.measurement_shown(comparison.measurement.id)]
        draw_deviation(self.plot_db, self.plot_deg, styled)
        self.shown = [comparison for comparison, _ in styled]
        lines = []
        for index, comparison in enumerate(comparisons):
            style = measurement_style(index)
            lines.append(f"{style.colour_name.capitalize()} {style.symbol_name}s: {measurement_summary(comparison)}")
        lines.append("Deviation: measured minus predicted at each measured frequency. Shaded: the Monte Carlo "
                     "envelope of the prediction there; a point inside it lies within the predicted spread.")
        self.summary.setText("\n".join(lines))
