"""The status bar's progress of the Monte Carlo spread, with its Cancel button.

Shown while the spread of the newest edit runs, once it has run for :data:`SHOW_AFTER_MS` (a
spread of a second or less finishes without a bar flashing by), hidden otherwise. Cancel asks
the worker to stop at the next chunk of samples; the spread view then says the spread was not
computed, cancelled by the user, and every other result stays. The widget then stays, saying
so, with a "Run again" button (the same project analysed afresh) until the next edit.
"""

from __future__ import annotations

from PySide6.QtCore import QTimer
from PySide6.QtWidgets import QHBoxLayout, QLabel, QProgressBar, QPushButton, QWidget

from stagewise.ui.worker import ComputeWorker

__all__ = ["SHOW_AFTER_MS", "SpreadProgress"]

# How long the spread runs before its progress is shown (milliseconds).
SHOW_AFTER_MS = 1000
# The bar counts thousandths of the run's work.
STEPS = 1000
CANCEL_TIP = ("Stop the Monte Carlo spread; its results are then not shown (every other result "
              "stays). Run it again from here, or edit the project.")


class SpreadProgress(QWidget):
    """Label, bar and Cancel button of the running Monte Carlo (a permanent status-bar widget)."""

    def __init__(self, worker: ComputeWorker, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.setObjectName("spreadProgress")
        self.worker = worker
        layout = QHBoxLayout(self)
        layout.setContentsMargins(0, 0, 0, 0)
        self.label = QLabel("Spread over tolerances", self)
        self.bar = QProgressBar(self)
        self.bar.setRange(0, STEPS)
        self.bar.setFixedWidth(160)
        self.bar.setFormat("%p %")
        self.bar.setAccessibleName("Progress of the spread over tolerances")
        self.cancel_button = QPushButton("Cancel", self)
        self.cancel_button.setObjectName("cancelSpread")
        self.cancel_button.setToolTip(CANCEL_TIP)
        layout.addWidget(self.label)
        layout.addWidget(self.bar)
        layout.addWidget(self.cancel_button)
        self._reveal = QTimer(self)
        self._reveal.setSingleShot(True)
        self._reveal.timeout.connect(self._show_if_running)
        self._running = False
        self._cancelled = False
        self.cancel_button.clicked.connect(self._button)
        worker.spreadProgress.connect(self._progress)
        worker.spreadBusyChanged.connect(self._spread_busy)
        worker.busyChanged.connect(self._new_edit)
        self.hide()

    def _progress(self, done: int, total: int) -> None:
        if not self.worker.spread_running:
            return  # a late report of a run that has ended
        self.bar.setValue(STEPS * done // total if total > 0 else 0)
        if not self._running:
            self._running = True
            self._cancelled = False
            self.label.setText("Spread over tolerances")
            self.bar.show()
            self.cancel_button.setEnabled(True)
            self.cancel_button.setText("Cancel")
            self.cancel_button.setToolTip(CANCEL_TIP)
            self._reveal.start(SHOW_AFTER_MS)

    def _show_if_running(self) -> None:
        if self._running and self.worker.spread_running:
            self.show()

    def _spread_busy(self, busy: bool) -> None:
        if not busy:
            cancelled = self._cancelled
            self._stop()
            if cancelled:  # say so, and offer the run again (no edit needed)
                self._cancelled = True
                self.label.setText("Spread cancelled")
                self.bar.hide()
                self.cancel_button.setEnabled(True)
                self.cancel_button.setText("Run again")
                self.cancel_button.setToolTip("Run the Monte Carlo spread of the project as it is now.")
                self.show()

    def _new_edit(self, busy: bool) -> None:
        if busy:  # a newer edit: the running spread is dropped, a new one follows later
            self._cancelled = False
            self._stop()

    def _button(self) -> None:
        if self._cancelled:
            self.run_again()
        else:
            self.cancel()

    def run_again(self) -> None:
        """Analyse the project as it is now, the spread included (after a cancel)."""
        self._cancelled = False
        self._stop()
        self.worker.request()

    def _stop(self) -> None:
        self._running = False
        self._reveal.stop()
        self.hide()

    def cancel(self) -> None:
        """Stop the running spread (the Cancel button)."""
        self.worker.cancel_spread()
        self._cancelled = True
        self.cancel_button.setEnabled(False)
        self.cancel_button.setText("Cancelling…")
