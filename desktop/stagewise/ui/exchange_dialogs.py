"""Dialogs for what goes in and out of the program: the packet's progress and element-card import.

Like the other dialogs they only gather text and show state; the main window builds the stage
(through :func:`stagewise.files.cards.stage_from_cards`, handed in as a callable) and records
everything through the document. Tests drive them without ``exec()``.
"""

from __future__ import annotations

import hashlib
from collections.abc import Callable
from pathlib import Path

from PySide6.QtCore import Qt
from PySide6.QtGui import QFontDatabase, QTextCursor
from PySide6.QtWidgets import (
    QApplication,
    QComboBox,
    QDialog,
    QDialogButtonBox,
    QFileDialog,
    QFormLayout,
    QHBoxLayout,
    QLabel,
    QLineEdit,
    QPlainTextEdit,
    QProgressDialog,
    QPushButton,
    QVBoxLayout,
    QWidget,
)

from stagewise.files.cards import CardError
from stagewise.model.project import Stage

__all__ = ["MAX_CARDS_BYTES", "SAVE_BEFORE_PACKET", "CardImportDialog", "PacketProgress"]

# An element-card deck is a few hundred lines at most; a larger file is surely something else.
MAX_CARDS_BYTES = 2 * 1024 * 1024

SAVE_BEFORE_PACKET = ("The packet names the SHA-256 fingerprint of the saved project file it was printed from, "
                      "so save your changes before printing it.")

StageBuilder = Callable[[str, str, str, str, list[str]], Stage]
"""``build(text, name, in_node, out_node) -> Stage``; raises CardError."""


class PacketProgress:
    """The progress callback of ``build_packet``/``print_packet``, shown in a cancellable dialog.

    The dialog is window-modal (no edit can change the project while its pages are painted);
    painting runs on the GUI thread, so each call lets Qt process events, which is what makes
    the Cancel button work.
    """

    def __init__(self, title: str, parent: QWidget | None = None) -> None:
        self.dialog = QProgressDialog("Preparing the review packet…", "Cancel", 0, 1, parent)
        self.dialog.setWindowTitle(title)
        self.dialog.setWindowModality(Qt.WindowModality.WindowModal)
        self.dialog.setMinimumDuration(0)
        self.dialog.setAutoClose(False)
        self.dialog.setAutoReset(False)
        self.dialog.setValue(0)

    @property
    def cancelled(self) -> bool:
        return self.dialog.wasCanceled()

    def __call__(self, done: int, total: int, label: str) -> bool:
        if self.dialog.wasCanceled():
            return False
        self.dialog.setMaximum(max(total, 1))
        self.dialog.setValue(max(0, min(done, total)))
        self.dialog.setLabelText(f"Review packet: {label}…")
        QApplication.processEvents()
        return not self.dialog.wasCanceled()

    def close(self) -> None:
        self.dialog.reset()
        self.dialog.close()
        self.dialog.deleteLater()


class CardImportDialog(QDialog):
    """Element-card text (pasted or read from a file), the new stage's name and its port nodes.

    On Import, ``build`` makes the stage; when the deck cannot be read the one-sentence reason
    (with its line number) is shown here, the cursor goes to that line and the dialog stays open
    with the text as typed. After ``accept``, :attr:`stage` holds the new stage and
    :meth:`source` says where the cards came from (for the audit trail).
    """

    def __init__(self, build: StageBuilder, parent: QWidget | None = None,
                 stages: list[tuple[str, str]] | None = None) -> None:
        super().__init__(parent)
        self.setWindowTitle("Import element cards")
        self._build = build
        self.stage: Stage | None = None
        self.notes: list[str] = []
        self._file_name = ""
        self._file_text = ""
        self._file_sha256 = ""
        intro = QLabel(
            "One part per line. R, C, L: ref, two nodes, value. E (voltage gain) and G "
            "(transconductance): ref, out+, out−, in+, in−, value. U (op-amp): ref, in+, in−, out, "
            "model (\"ideal\" or a model already in this project). Node 0 is the common reference; "
            "lines starting with * and text after ; are comments. Values follow the netlist "
            "convention, case-insensitive: MEG is mega, M is milli (1M = 1 m), N nano, U micro, "
            "P pico, F femto. Undo removes the stage.")
        intro.setWordWrap(True)
        self.text = QPlainTextEdit()
        self.text.setFont(QFontDatabase.systemFont(QFontDatabase.SystemFont.FixedFont))
        self.text.setPlaceholderText("* input low-pass\nR1 in out 2k2\nC1 out 0 47n")
        self.text.setLineWrapMode(QPlainTextEdit.LineWrapMode.NoWrap)
        self.read_button = QPushButton("Read from file…")
        self.read_button.clicked.connect(lambda: self.read_file())
        self.file_label = QLabel("")
        self.file_label.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        file_row = QHBoxLayout()
        file_row.addWidget(self.read_button)
        file_row.addWidget(self.file_label, 1)
        self.name = QLineEdit("Imported stage")
        self.in_node = QLineEdit("in")
        self.out_node = QLineEdit("out")
        form = QFormLayout()
        form.addRow("Stage name", self.name)
        form.addRow("Input node", self.in_node)
        form.addRow("Output node", self.out_node)
        self.place = QComboBox()
        self.place.addItem("At the end of the chain", None)
        for index, (stage_id, stage_name) in enumerate(stages or [], start=1):
            self.place.addItem(f"After {stage_name} ({stage_id})", index)
        form.addRow("Place", self.place)
        self.problem = QLabel("")
        self.problem.setWordWrap(True)
        self.problem.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        self.problem.setStyleSheet("color: #a4262c;")
        self.problem.hide()
        self.buttons = QDialogButtonBox(QDialogButtonBox.StandardButton.Ok | QDialogButtonBox.StandardButton.Cancel)
        self.buttons.button(QDialogButtonBox.StandardButton.Ok).setText("Import")
        self.buttons.accepted.connect(self.accept)
        self.buttons.rejected.connect(self.reject)
        layout = QVBoxLayout(self)
        layout.addWidget(intro)
        layout.addWidget(self.text, 1)
        layout.addLayout(file_row)
        layout.addLayout(form)
        layout.addWidget(self.problem)
        layout.addWidget(self.buttons)
        self.resize(620, 520)

    def show_problem(self, text: str) -> None:
        self.problem.setText(text)
        self.problem.show()

    def read_file(self, path: str | Path | None = None) -> bool:
        """Put a card file's text in the box (asks for the file when ``path`` is None)."""
        if path is None:
            chosen, _filter = QFileDialog.getOpenFileName(self, "Read element cards", "",
                                                          "Element cards (*.cir *.net *.txt);;All files (*)")
            if not chosen:
                return False
            path = chosen
        path = Path(path)
        try:
            size = path.stat().st_size
            if size > MAX_CARDS_BYTES:
                self.show_problem(f"{path.name}: {size} bytes is too large for an element-card file.")
                return False
            data = path.read_bytes()
        except OSError as error:
            self.show_problem(f"{path.name} cannot be read ({error.strerror or error}); the text above is unchanged.")
            return False
        try:
            text = data.decode("utf-8")
        except UnicodeDecodeError as error:
            self.show_problem(f"{path.name} is not UTF-8 text (byte {error.start}); the text above is unchanged.")
            return False
        self.text.setPlainText(text)
        # What the box holds now, to tell later whether the user changed the file's text.
        self._file_name, self._file_text = path.name, self.text.toPlainText()
        self._file_sha256 = hashlib.sha256(data).hexdigest()
        self.file_label.setText(path.name)
        self.problem.hide()
        return True

    def source(self) -> dict[str, str]:
        """Where the imported cards came from: the file (name, SHA-256 of its bytes) or pasted text."""
        text = self.text.toPlainText()
        if self._file_name and text == self._file_text:
            return {"cards_file": self._file_name, "cards_sha256": self._file_sha256}
        return {"cards_file": "pasted text", "cards_sha256": hashlib.sha256(text.encode("utf-8")).hexdigest()}

    def accept(self) -> None:
        try:
            notes: list[str] = []
            stage = self._build(self.text.toPlainText(), self.name.text(), self.in_node.text().strip(),
                                self.out_node.text().strip(), notes)
        except CardError as error:
            self.show_problem(f"Not imported: {str(error).rstrip('.')}.")
            if error.line is not None:
                block = self.text.document().findBlockByNumber(error.line - 1)
                if block.isValid():
                    cursor = QTextCursor(block)
                    cursor.select(QTextCursor.SelectionType.LineUnderCursor)
                    self.text.setTextCursor(cursor)
            self.text.setFocus()
            return
        self.stage = stage
        self.notes = notes
        self.problem.hide()
        super().accept()
