"""Small dialogs: sign-off, waiver, manual answer, comment, new part, stage template, About.

Each dialog only gathers text; the caller records it through the document and the review API.
They are plain ``QDialog``s that tests fill in and ``accept()`` without running ``exec()``.
"""

from __future__ import annotations

from PySide6.QtCore import Qt
from PySide6.QtWidgets import (
    QComboBox,
    QDialog,
    QDialogButtonBox,
    QFormLayout,
    QLabel,
    QLineEdit,
    QListWidget,
    QListWidgetItem,
    QPlainTextEdit,
    QVBoxLayout,
    QWidget,
)

from stagewise import __version__
from stagewise.model.project import PART_TYPES, Check
from stagewise.review.words import VERDICT_WORDS, VERDICTS

__all__ = [
    "CAUTIONS",
    "AboutDialog",
    "AnswerDialog",
    "CommentDialog",
    "FormDialog",
    "NewPartDialog",
    "SignoffDialog",
    "TemplateDialog",
    "WaiverDialog",
]

# DESIGN section 9, shown where the user meets the program.
CAUTIONS = (
    "Stagewise analyses small-signal linear models. It does not model large-signal behaviour "
    "beyond the swing and slew checks, and it does not assess electrical safety: insulation, "
    "creepage and clearance, leakage currents, protection against fault conditions. Front-ends "
    "that touch mains, patients or hazardous energy must follow the applicable standards (for "
    "example IEC 61010-1 for measurement equipment and IEC 60601-1 for medical equipment), local "
    "codes and the judgement of a qualified, where required licensed, engineer. Verify every "
    "design on hardware."
)


class FormDialog(QDialog):
    """A form with OK/Cancel; OK is enabled only while :meth:`complete` holds."""

    def __init__(self, title: str, intro: str, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.setWindowTitle(title)
        self.form = QFormLayout()
        self.buttons = QDialogButtonBox(QDialogButtonBox.StandardButton.Ok | QDialogButtonBox.StandardButton.Cancel)
        self.buttons.accepted.connect(self.accept)
        self.buttons.rejected.connect(self.reject)
        layout = QVBoxLayout(self)
        if intro:
            label = QLabel(intro)
            label.setWordWrap(True)
            layout.addWidget(label)
        layout.addLayout(self.form)
        layout.addWidget(self.buttons)
        self.setMinimumWidth(420)

    def complete(self) -> bool:
        return True

    def update_ok(self) -> None:
        self.buttons.button(QDialogButtonBox.StandardButton.Ok).setEnabled(self.complete())

    def accept(self) -> None:
        if self.complete():
            super().accept()


class SignoffDialog(FormDialog):
    """Reviewer's name, role, verdict and note for a stage."""

    def __init__(self, stage_name: str, name: str = "", role: str = "", parent: QWidget | None = None) -> None:
        super().__init__(f"Sign {stage_name}",
                         "Your verdict is bound to the stage as it is now; any later change to its "
                         "parts or check limits marks it out of date. It is recorded in the audit trail "
                         "and cannot be undone.", parent)
        self.name = QLineEdit(name)
        self.role = QLineEdit(role)
        self.role.setPlaceholderText("for instance: analog design reviewer")
        self.verdict = QComboBox()
        for verdict in VERDICTS:
            self.verdict.addItem(VERDICT_WORDS[verdict].capitalize(), verdict)
        self.note = QPlainTextEdit()
        self.note.setPlaceholderText("What you looked at; what must change (required when returning it for rework).")
        self.form.addRow("Name", self.name)
        self.form.addRow("Role", self.role)
        self.form.addRow("Verdict", self.verdict)
        self.form.addRow("Note", self.note)
        for signal in (self.name.textChanged, self.note.textChanged, self.verdict.currentIndexChanged):
            signal.connect(self.update_ok)
        self.update_ok()

    def complete(self) -> bool:
        if not self.name.text().strip():
            return False
        return not (self.verdict.currentData() == "rework" and not self.note.toPlainText().strip())

    def values(self) -> dict[str, str]:
        return {"name": self.name.text().strip(), "role": self.role.text().strip(),
                "verdict": str(self.verdict.currentData()), "note": self.note.toPlainText().strip()}


def _check_combo(checks: list[Check], selected: str, manual_only: bool = False,
                 choose: str = "") -> QComboBox:
    """The checks to choose from, ``selected`` chosen; with ``choose`` (a placeholder), nothing is
    chosen unless ``selected`` names a check, so the user picks one."""
    combo = QComboBox()
    for check in checks:
        if manual_only and not check.is_manual:
            continue
        combo.addItem(f"{check.id}: {check.text}", check.id)
    index = combo.findData(selected)
    if index >= 0:
        combo.setCurrentIndex(index)
    elif choose:
        combo.setPlaceholderText(choose)
        combo.setCurrentIndex(-1)
    return combo


class WaiverDialog(FormDialog):
    """Waive a check: who, role and a justification (required)."""

    def __init__(self, checks: list[Check], selected: str = "", name: str = "", role: str = "",
                 parent: QWidget | None = None) -> None:
        super().__init__("Waive a check",
                         "A waived check counts as waived, never as met. The justification is "
                         "required and recorded in the audit trail.", parent)
        # Nothing is chosen for the user unless the caller names a check (one that does not pass):
        # a met check is never offered as the one to waive.
        self.check = _check_combo(checks, selected, choose="Choose the check to waive")
        self.name = QLineEdit(name)
        self.role = QLineEdit(role)
        self.justification = QPlainTextEdit()
        self.justification.setPlaceholderText("Why this check need not be met for this design.")
        self.form.addRow("Check", self.check)
        self.form.addRow("Name", self.name)
        self.form.addRow("Role", self.role)
        self.form.addRow("Justification", self.justification)
        for signal in (self.name.textChanged, self.justification.textChanged, self.check.currentIndexChanged):
            signal.connect(self.update_ok)
        self.update_ok()

    def complete(self) -> bool:
        return bool(self.check.currentIndex() >= 0 and self.name.text().strip()
                    and self.justification.toPlainText().strip())

    def values(self) -> dict[str, str]:
        return {"check_id": str(self.check.currentData()), "by": self.name.text().strip(),
                "role": self.role.text().strip(), "justification": self.justification.toPlainText().strip()}


class AnswerDialog(FormDialog):
    """Record the answer to a manual check."""

    def __init__(self, checks: list[Check], selected: str = "", name: str = "", parent: QWidget | None = None) -> None:
        super().__init__("Answer a manual check", "The answer is recorded in the audit trail.", parent)
        self.check = _check_combo(checks, selected, manual_only=True)
        self.answer = QComboBox()
        for word, label in (("yes", "Yes: met"), ("no", "No: not met"), ("n/a", "Not applicable")):
            self.answer.addItem(label, word)
        self.name = QLineEdit(name)
        self.note = QLineEdit()
        self.form.addRow("Check", self.check)
        self.form.addRow("Answer", self.answer)
        self.form.addRow("Name", self.name)
        self.form.addRow("Note", self.note)
        self.name.textChanged.connect(self.update_ok)
        self.update_ok()

    def complete(self) -> bool:
        return bool(self.check.count() and self.name.text().strip())

    def values(self) -> dict[str, str]:
        return {"check_id": str(self.check.currentData()), "answer": str(self.answer.currentData()),
                "by": self.name.text().strip(), "note": self.note.text().strip()}


class CommentDialog(FormDialog):
    """A comment on the stage or on one of its checks."""

    def __init__(self, checks: list[Check], selected: str = "", name: str = "", parent: QWidget | None = None) -> None:
        super().__init__("Comment", "", parent)
        self.check = QComboBox()
        self.check.addItem("The whole stage", None)
        for check in checks:
            self.check.addItem(f"{check.id}: {check.text}", check.id)
        index = self.check.findData(selected) if selected else 0
        self.check.setCurrentIndex(max(index, 0))
        self.name = QLineEdit(name)
        self.text = QPlainTextEdit()
        self.form.addRow("About", self.check)
        self.form.addRow("Author", self.name)
        self.form.addRow("Comment", self.text)
        for signal in (self.name.textChanged, self.text.textChanged):
            signal.connect(self.update_ok)
        self.update_ok()

    def complete(self) -> bool:
        return bool(self.name.text().strip() and self.text.toPlainText().strip())

    def values(self) -> dict[str, str | None]:
        return {"check_id": self.check.currentData(), "author": self.name.text().strip(),
                "text": self.text.toPlainText().strip()}


class NewPartDialog(FormDialog):
    """A new part: type, reference, nodes and value (or op-amp model)."""

    def __init__(self, suggest_ref: object, models: list[str], parent: QWidget | None = None) -> None:
        super().__init__("Add a part", "Nodes are names local to the stage; 0 is the common reference.", parent)
        self._suggest = suggest_ref
        self.type = QComboBox()
        for part_type, (roles, meaning, _unit) in PART_TYPES.items():
            self.type.addItem(f"{part_type} ({meaning or 'op-amp'}; nodes {', '.join(roles)})", part_type)
        self.ref = QLineEdit()
        self.nodes = QLineEdit()
        self.value = QLineEdit()
        self.model = QComboBox()
        self.model.addItem("ideal")
        self.model.addItems(models)
        self.form.addRow("Type", self.type)
        self.form.addRow("Reference", self.ref)
        self.form.addRow("Nodes", self.nodes)
        self.form.addRow("Value", self.value)
        self.form.addRow("Op-amp model", self.model)
        self.type.currentIndexChanged.connect(self._type_changed)
        for signal in (self.ref.textChanged, self.nodes.textChanged, self.value.textChanged):
            signal.connect(self.update_ok)
        self._type_changed()

    def _type_changed(self) -> None:
        part_type = str(self.type.currentData())
        self.ref.setText(self._suggest(part_type))  # type: ignore[operator]
        self.nodes.setPlaceholderText(" ".join(PART_TYPES[part_type][0]))
        is_opamp = part_type == "opamp"
        self.value.setEnabled(not is_opamp)
        self.model.setEnabled(is_opamp)
        self.update_ok()

    def complete(self) -> bool:
        part_type = str(self.type.currentData())
        if not self.ref.text().strip() or len(self.nodes.text().split()) != len(PART_TYPES[part_type][0]):
            return False
        return part_type == "opamp" or bool(self.value.text().strip())

    def values(self) -> dict[str, object]:
        return {"type": str(self.type.currentData()), "ref": self.ref.text().strip(),
                "nodes": self.nodes.text().replace(",", " ").split(), "value": self.value.text().strip(),
                "model": self.model.currentText()}


class TemplateDialog(FormDialog):
    """Choose a stage template (from resources/templates) for a new stage."""

    def __init__(self, templates: list[tuple[str, str, str]], parent: QWidget | None = None) -> None:
        super().__init__("New stage from a template", "The stage is added at the end of the chain with the "
                         "template's default values; edit them in the parts table.", parent)
        self.list = QListWidget()
        for template_id, name, description in templates:
            item = QListWidgetItem(name)
            item.setData(Qt.ItemDataRole.UserRole, template_id)
            item.setToolTip(description)
            self.list.addItem(item)
        self.description = QLabel()
        self.description.setWordWrap(True)
        self.form.addRow(self.list)
        self.form.addRow(self.description)
        self.list.currentItemChanged.connect(self._selected)
        self.list.itemDoubleClicked.connect(self.accept)
        if self.list.count():
            self.list.setCurrentRow(0)
        self.update_ok()

    def _selected(self, item: QListWidgetItem | None) -> None:
        self.description.setText(item.toolTip() if item is not None else "")
        self.update_ok()

    def complete(self) -> bool:
        return self.list.currentItem() is not None

    def template_id(self) -> str:
        item = self.list.currentItem()
        return str(item.data(Qt.ItemDataRole.UserRole)) if item is not None else ""


class AboutDialog(QDialog):
    """Version, licence and the cautions."""

    def __init__(self, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.setWindowTitle("About Stagewise")
        text = QLabel(
            f"<h3>Stagewise {__version__}</h3>"
            "<p>Design review of analog signal chains: stages, loading, checks, sign-offs and "
            "review packets.</p>"
            "<p>Licence: MIT.</p>"
            f"<p><b>Cautions.</b> {CAUTIONS}</p>"
        )
        text.setWordWrap(True)
        text.setTextFormat(Qt.TextFormat.RichText)
        buttons = QDialogButtonBox(QDialogButtonBox.StandardButton.Close)
        buttons.rejected.connect(self.reject)
        buttons.accepted.connect(self.accept)
        layout = QVBoxLayout(self)
        layout.addWidget(text)
        layout.addWidget(buttons)
        self.setMinimumWidth(520)
        self.text = text
