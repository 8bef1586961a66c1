"""The form that attaches a bench measurement: where it was taken, the instrument, the set-up, a note.

The same four things ``stagewise measure`` takes as ``--stage``/``--in-chain``/``--chain``,
``--instrument``, ``--setup`` and ``--note``; they are kept with the measurement and printed in
its packet section.
"""

from __future__ import annotations

from PySide6.QtWidgets import QComboBox, QLineEdit, QWidget

from stagewise.ui.dialogs import FormDialog

__all__ = ["MeasurementDialog"]


class MeasurementDialog(FormDialog):
    """Place, instrument, set-up and note of a measurement file about to be attached.

    ``places`` are ``(label, where, stage_id)``; ``current`` is the index chosen first.
    """

    def __init__(self, file_name: str, places: list[tuple[str, str, str | None]], current: int = 0,
                 parent: QWidget | None = None) -> None:
        super().__init__(f"Attach {file_name}",
                         "The measurement is bound to the circuit as it is now: when the stage changes it "
                         "is shown out of date until the board is measured again. Attaching it is recorded "
                         "in the audit trail.", parent)
        self.places = places
        self.place = QComboBox()
        for label, _where, _stage in places:
            self.place.addItem(label)
        self.place.setCurrentIndex(current)
        self.instrument = QLineEdit()
        self.instrument.setPlaceholderText("for instance: gain-phase analyser, 10 Hz RBW, 8 averages")
        self.setup = QLineEdit()
        self.setup.setPlaceholderText("probes, source level, where the signal was injected and read")
        self.note = QLineEdit()
        self.form.addRow("Measured on", self.place)
        self.form.addRow("Instrument", self.instrument)
        self.form.addRow("Set-up", self.setup)
        self.form.addRow("Note", self.note)

    def values(self) -> dict[str, str | None]:
        """``where``, ``stage_id``, ``instrument``, ``setup`` and ``note`` as entered."""
        _label, where, stage_id = self.places[self.place.currentIndex()]
        return {"where": where, "stage_id": stage_id, "instrument": self.instrument.text().strip(),
                "setup": self.setup.text().strip(), "note": self.note.text().strip()}
