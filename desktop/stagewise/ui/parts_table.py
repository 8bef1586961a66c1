"""The parts of the selected stage, edited in place, and the stage's formula.

Values are typed in engineering notation (``4k7``, ``10n``, ``2.2u``); a text that is not a
value, or that would make the stage invalid, is refused with a sentence and the cell goes back
to the old value. Every accepted edit is an undoable command of the document.
"""

from __future__ import annotations

from collections.abc import Callable

from PySide6.QtCore import QAbstractItemModel, QModelIndex, QPersistentModelIndex, Qt, Signal
from PySide6.QtGui import QBrush, QColor
from PySide6.QtWidgets import (
    QAbstractItemView,
    QComboBox,
    QHeaderView,
    QLabel,
    QStyledItemDelegate,
    QStyleOptionViewItem,
    QTableWidget,
    QTableWidgetItem,
    QTextBrowser,
    QVBoxLayout,
    QWidget,
)

from stagewise.model.project import PART_TYPES, OpampModel, Stage
from stagewise.model.values import format_value
from stagewise.ui.document import BLOCK_FIELDS, Document, EditRefused
from stagewise.ui.subscriptions import Subscriptions
from stagewise.ui.worker import Computed, ComputeWorker

__all__ = ["FormulaView", "PartsTable"]

COLUMNS = ("Part", "Type", "Nodes", "Value", "Tolerance", "Model / meaning")
EDITABLE = {2: "nodes", 3: "value", 4: "tol", 5: "model"}
ROLE_REF = Qt.ItemDataRole.UserRole


def _root_text(root: object) -> str:
    if isinstance(root, tuple):
        return f"pair at {root[0].raw} Hz, Q {root[1].raw}"
    return f"{root.raw} Hz"  # type: ignore[attr-defined]


class _ModelCellDelegate(QStyledItemDelegate):
    """The Model cell's editor: an editable list of "ideal", the project's models and the op-amp
    library's (a library model chosen here is copied into the project by the table)."""

    def __init__(self, names: Callable[[], list[str]], parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self._names = names

    def createEditor(self, parent: QWidget, option: QStyleOptionViewItem,  # noqa: N802 - Qt's name
                     index: QModelIndex | QPersistentModelIndex) -> QWidget:
        combo = QComboBox(parent)
        combo.setEditable(True)
        combo.setObjectName("modelChoice")
        combo.addItems(self._names())
        return combo

    def setEditorData(self, editor: QWidget, index: QModelIndex | QPersistentModelIndex) -> None:  # noqa: N802
        if isinstance(editor, QComboBox):
            editor.setCurrentText(str(index.data() or ""))

    def setModelData(self, editor: QWidget, model: QAbstractItemModel,  # noqa: N802 - Qt's name
                     index: QModelIndex | QPersistentModelIndex) -> None:
        if isinstance(editor, QComboBox):
            model.setData(index, editor.currentText())


class PartsTable(QWidget):
    """Table of the current stage's parts (or a block's parameters); emits ``message`` on refusals."""

    message = Signal(str)

    def __init__(self, document: Document, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.document = document
        self.table = QTableWidget(0, len(COLUMNS), self)
        self.table.setHorizontalHeaderLabels(COLUMNS)
        self.table.verticalHeader().setVisible(False)
        self.table.setSelectionBehavior(QAbstractItemView.SelectionBehavior.SelectRows)
        self.table.setSelectionMode(QAbstractItemView.SelectionMode.SingleSelection)
        self.table.setEditTriggers(QAbstractItemView.EditTrigger.DoubleClicked
                                   | QAbstractItemView.EditTrigger.EditKeyPressed
                                   | QAbstractItemView.EditTrigger.AnyKeyPressed)
        self._model_delegate = _ModelCellDelegate(self._model_names, self.table)
        self.table.setItemDelegateForColumn(5, self._model_delegate)
        header = self.table.horizontalHeader()
        header.setSectionResizeMode(QHeaderView.ResizeMode.ResizeToContents)
        header.setStretchLastSection(True)
        self.caption = QLabel(self)
        self.caption.setTextFormat(Qt.TextFormat.PlainText)
        self.caption.setWordWrap(True)
        self.feedback = QLabel(self)
        self.feedback.setWordWrap(True)
        self.feedback.setTextFormat(Qt.TextFormat.PlainText)
        self.feedback.setObjectName("editFeedback")
        self.feedback.setStyleSheet("color: #9a2a00;")
        layout = QVBoxLayout(self)
        layout.setContentsMargins(4, 2, 4, 2)
        layout.addWidget(self.caption)
        layout.addWidget(self.table, 1)
        layout.addWidget(self.feedback)
        self._stage_id = ""
        self._is_block = False
        self.table.itemChanged.connect(self._item_changed)
        self.subscriptions = Subscriptions()
        self.subscriptions.connect_all([
            (document.currentStageChanged, self._stage_selected),
            (document.stageChanged, self._stage_changed),
            (document.projectReplaced, self.reload),
            (document.chainChanged, self.reload),
        ])
        self.reload()

    def disconnect_all(self) -> None:
        """Stop listening to the document and the worker (the window calls this when it closes)."""
        self.subscriptions.close()

    @property
    def stage_id(self) -> str:
        return self._stage_id

    def selected_ref(self) -> str:
        """The ref of the selected part row ("" when none)."""
        row = self.table.currentRow()
        item = self.table.item(row, 0) if row >= 0 else None
        return str(item.data(ROLE_REF) or "") if item is not None else ""

    # ----------------------------------------------------------------- model → widget
    def _stage_selected(self, _stage_id: str) -> None:
        self.feedback.clear()
        self.reload()

    def _stage_changed(self, stage_id: str) -> None:
        if stage_id == self._stage_id:
            self.reload()

    def reload(self, *_: object) -> None:
        """Show the current stage. When the rows stay the same parts (an edit of a value, a
        tolerance, nodes or a model), the cells are rewritten in place, so the current cell, the
        selection and the keyboard focus stay where the user left them."""
        stage = self.document.current_stage
        same_stage = stage is not None and stage.id == self._stage_id and stage.is_block == self._is_block
        self._stage_id = stage.id if stage is not None else ""
        row, column = self.table.currentRow(), self.table.currentColumn()
        was_blocked = self.table.blockSignals(True)
        try:
            if stage is None:
                self.table.setRowCount(0)
                self.caption.setText("No stage selected.")
                return
            rows_before = [str(self.table.item(r, 0).data(ROLE_REF)) if self.table.item(r, 0) else ""
                           for r in range(self.table.rowCount())]
            self._is_block = stage.is_block
            if stage.is_block:
                self._fill_block(stage)
            else:
                self._fill_parts(stage)
            rows_after = [str(self.table.item(r, 0).data(ROLE_REF)) if self.table.item(r, 0) else ""
                          for r in range(self.table.rowCount())]
            if same_stage and rows_before == rows_after and 0 <= row < self.table.rowCount() and column >= 0:
                self.table.setCurrentCell(row, column)
        finally:
            self.table.blockSignals(was_blocked)

    def _put(self, row: int, column: int, text: str) -> QTableWidgetItem:
        """The cell at (row, column) showing ``text``: the existing item when there is one (so an
        open editor and the current cell survive), a new one otherwise."""
        item = self.table.item(row, column)
        if item is None:
            item = QTableWidgetItem(text)
            self.table.setItem(row, column, item)
        elif item.text() != text:
            item.setText(text)
        return item

    def _fill_parts(self, stage: Stage) -> None:
        self.caption.setText(f"{stage.name}: {len(stage.parts)} parts. Double-click a cell to edit "
                             "(values such as 4k7, 10n, 2.2u; tolerance such as 1%).")
        if self.table.rowCount() != len(stage.parts):
            self.table.setRowCount(len(stage.parts))
        for row, part in enumerate(stage.parts):
            meaning = PART_TYPES.get(part.type, ((), "", ""))[1]
            cells = [
                part.ref,
                part.type,
                " ".join(part.nodes),
                "" if part.value is None else str(part.value.raw),
                "" if part.tol is None else str(part.tol.raw),
                part.model if part.type == "opamp" else meaning,
            ]
            for column, text in enumerate(cells):
                item = self._put(row, column, text)
                item.setData(ROLE_REF, part.ref)
                editable = column in EDITABLE and not (
                    (column == 3 and part.type == "opamp") or (column == 5 and part.type != "opamp")
                    or (column == 4 and part.type == "opamp"))
                flags = item.flags() | Qt.ItemFlag.ItemIsEditable
                item.setFlags(flags if editable else flags & ~Qt.ItemFlag.ItemIsEditable)
                item.setForeground(QBrush(QColor("#606060" if not editable and column >= 2 else "#202020")))
                if column == 3 and part.value is not None:
                    unit = PART_TYPES[part.type][2]
                    item.setToolTip(f"{part.ref} = {format_value(part.value.si, unit)}")
                elif column == 5 and part.type == "opamp":
                    item.setToolTip("Type a model of the project or of the op-amp library (a library model is "
                                    "copied into the project), or use Edit → Op-amp model… to compare them.")
                else:
                    item.setToolTip("")

    def _fill_block(self, stage: Stage) -> None:
        self.caption.setText(f"{stage.name}: behavioural block. Gain and impedances are editable.")
        rows: list[tuple[str, str, str, bool]] = []
        for field, label in BLOCK_FIELDS.items():
            quantity = getattr(stage, field)
            rows.append((field, label, "" if quantity is None else str(quantity.raw), True))
        for index, root in enumerate(stage.poles_hz, start=1):
            rows.append(("", f"pole {index}", _root_text(root), False))
        for index, root in enumerate(stage.zeros_hz, start=1):
            rows.append(("", f"zero {index}", _root_text(root), False))
        if self.table.rowCount() != len(rows):
            self.table.setRowCount(len(rows))
        for row, (field, label, text, editable) in enumerate(rows):
            for column, cell in enumerate([label, "block", "", text, "", ""]):
                item = self._put(row, column, cell)
                item.setData(ROLE_REF, field or f"{label}")
                flags = item.flags() | Qt.ItemFlag.ItemIsEditable
                item.setFlags(flags if editable and column == 3 else flags & ~Qt.ItemFlag.ItemIsEditable)

    # ----------------------------------------------------------------- widget → model
    def _item_changed(self, item: QTableWidgetItem) -> None:
        key = str(item.data(ROLE_REF) or "")
        column = item.column()
        try:
            if self._is_block:
                self.document.set_block_field(self._stage_id, key, item.text())
            elif column in EDITABLE and EDITABLE[column] == "model" and self._library_model(item.text()) is not None:
                self.document.use_opamp_model(self._stage_id, key, item.text().strip(),
                                              self._library_model(item.text()))
            elif column in EDITABLE:
                self.document.set_part_field(self._stage_id, key, EDITABLE[column], item.text())
            self.feedback.clear()
        except EditRefused as error:
            text = f"Not changed: {error}"
            self.feedback.setText(text)
            self.message.emit(text)
            self.reload()

    def _model_names(self) -> list[str]:
        """What the Model cell offers: "ideal", the project's models, then the library's others."""
        from stagewise.files.templates import TemplateError, load_opamp_library

        project = sorted(self.document.project.opamp_models)
        try:
            library = sorted(name for name in load_opamp_library() if name not in project)
        except TemplateError:
            library = []
        return ["ideal", *project, *library]

    def _library_model(self, text: str) -> OpampModel | None:
        """The op-amp library's model named ``text`` when the project has none of that name."""
        name = text.strip()
        if not name or name in self.document.project.opamp_models or name == "ideal":
            return None
        from stagewise.files.templates import TemplateError, load_opamp_library

        try:
            return load_opamp_library().get(name)
        except TemplateError:
            return None

    def edit_cell(self, ref: str, field: str, text: str) -> None:
        """Type ``text`` into the cell of ``ref``'s ``field`` as a user would (tests, scripts)."""
        column = {name: col for col, name in EDITABLE.items()}[field]
        for row in range(self.table.rowCount()):
            item = self.table.item(row, 0)
            if item is not None and item.data(ROLE_REF) == ref:
                self.table.item(row, column).setText(text)
                return
        raise KeyError(ref)

    def cell_text(self, ref: str, field: str) -> str:
        column = {name: col for col, name in EDITABLE.items()}[field]
        for row in range(self.table.rowCount()):
            item = self.table.item(row, 0)
            if item is not None and item.data(ROLE_REF) == ref:
                return self.table.item(row, column).text()
        raise KeyError(ref)


class FormulaView(QTextBrowser):
    """The selected stage's transfer function in its part symbols, with standard-form parameters.

    Computed in the worker's formula thread (sympy loads there, never at start-up).
    """

    def __init__(self, document: Document, worker: ComputeWorker, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.document = document
        self.worker = worker
        self.setOpenLinks(False)
        self._key = ""
        self.subscriptions = Subscriptions()
        self.subscriptions.connect_all([
            (document.currentStageChanged, self._request),
            (document.stageChanged, self._stage_changed),
            (document.projectReplaced, self._request),
            (worker.formulaReady, self._ready),
        ])
        self._request()

    def disconnect_all(self) -> None:
        """Stop listening to the document and the worker (the window calls this when it closes)."""
        self.subscriptions.close()

    def _stage_changed(self, stage_id: str) -> None:
        if stage_id == self.document.current_stage_id:
            self._request()

    def _request(self, *_: object) -> None:
        from stagewise.ui.analyses import stage_key

        stage = self.document.current_stage
        if stage is None:
            self.setHtml("<p>No stage selected.</p>")
            self._key = ""
            return
        self._key = stage_key(stage, self.document.project)
        cached = self.worker.request_formula(stage.id)
        if cached is None:
            self.setHtml(f"<p><i>Deriving the transfer function of {_escape(stage.name)}…</i></p>")
        else:
            self._show(cached)

    def _ready(self, key: str, computed: Computed) -> None:
        if key == self._key:
            self._show(computed)

    def _show(self, computed: Computed) -> None:
        stage = self.document.current_stage
        name = _escape(stage.name) if stage is not None else ""
        if computed.ok:
            self.setHtml(computed.value.html)
        else:
            self.setHtml(f"<p><b>{name}</b>: no formula — {_escape(computed.why)}</p>")


def _escape(text: str) -> str:
    return text.replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;")
