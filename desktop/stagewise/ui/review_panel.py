"""The review panel of the selected stage: checks, sign-offs and comments.

Check states come from the worker (evaluated by ``stagewise.review.checks`` against the
analysis); sign-off states are read from ``stagewise.review.signoff`` each time the stage or its
records change, so a sign-off turns *out of date* the moment a part is edited. Every decision goes
through ``stagewise.review.actions``, which appends its audit event.
"""

from __future__ import annotations

from typing import Any

from PySide6.QtCore import Qt, Signal
from PySide6.QtGui import QBrush, QColor
from PySide6.QtWidgets import (
    QAbstractItemView,
    QGridLayout,
    QHeaderView,
    QLabel,
    QListWidget,
    QListWidgetItem,
    QPushButton,
    QTableWidget,
    QTableWidgetItem,
    QVBoxLayout,
    QWidget,
)

from stagewise.review.audit import check_records, trusted_check
from stagewise.review.checks import FINDING_WORDS
from stagewise.review.words import (
    ANSWER_WORDS,
    REPLACED_WORD,
    SIGNOFF_STATE_MEANINGS,
    WHERE_WORDS,
    CheckState,
    SignoffState,
)
from stagewise.ui.document import Document, EditRefused
from stagewise.ui.icons import icon
from stagewise.ui.subscriptions import Subscriptions
from stagewise.ui.worker import ComputeWorker, Outcome

__all__ = ["ReviewPanel"]

STATE_COLOURS = {
    str(CheckState.MET): "#00704f",
    str(CheckState.NOT_MET): "#b54a00",
    str(CheckState.NO_VALUE): "#8a4b00",
    str(CheckState.WAIVED): "#0060a0",
    str(CheckState.OPEN): "#606060",
    str(CheckState.NOT_APPLICABLE): "#606060",
}
SIGNOFF_COLOURS = {
    SignoffState.ACCEPTED: "#00704f",
    SignoffState.REWORK: "#b54a00",
    SignoffState.OUT_OF_DATE: "#8a4b00",
    SignoffState.UNRECORDED: "#b00020",
    SignoffState.NONE: "#505050",
}
CHECK_COLUMNS = ("Check", "State", "Value", "Limits", "What and why")
FINDING_COLOUR = "#8a1c00"


class ReviewPanel(QWidget):
    """Checks, sign-offs and comments of the current stage, with the actions that record decisions.

    ``sign``, ``waive``, ``answer``, ``comment`` and ``resolve`` are the widget-side entry points
    (the dialogs of the main window call them); each raises :class:`EditRefused` with a sentence
    when the review layer refuses.
    """

    message = Signal(str)
    signRequested = Signal()
    waiveRequested = Signal(str)
    answerRequested = Signal(str)
    commentRequested = Signal(str)

    def __init__(self, document: Document, worker: ComputeWorker, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.document = document
        self.worker = worker
        self.outcome: Outcome | None = worker.latest
        self.title = QLabel(self)
        self.title.setTextFormat(Qt.TextFormat.PlainText)
        font = self.title.font()
        font.setBold(True)
        font.setPointSizeF(font.pointSizeF() * 1.1)
        self.title.setFont(font)
        self.state = QLabel(self)
        self.state.setObjectName("signoffState")
        self.state.setTextFormat(Qt.TextFormat.PlainText)
        self.state.setWordWrap(True)
        self.totals = QLabel(self)
        self.totals.setTextFormat(Qt.TextFormat.PlainText)
        self.totals.setWordWrap(True)
        # What fails whether or not a check asks (instability, over-range, clipping, slew).
        self.findings = QLabel(self)
        self.findings.setObjectName("automaticFindings")
        self.findings.setTextFormat(Qt.TextFormat.PlainText)
        self.findings.setWordWrap(True)
        self.findings.setStyleSheet(f"color: {FINDING_COLOUR}; font-weight: bold;")
        self.findings.setVisible(False)
        self.checks = QTableWidget(0, len(CHECK_COLUMNS), self)
        self.checks.setHorizontalHeaderLabels(CHECK_COLUMNS)
        self.checks.verticalHeader().setVisible(False)
        self.checks.setEditTriggers(QAbstractItemView.EditTrigger.NoEditTriggers)
        self.checks.setSelectionBehavior(QAbstractItemView.SelectionBehavior.SelectRows)
        self.checks.setSelectionMode(QAbstractItemView.SelectionMode.SingleSelection)
        # One line per check: the full question, record and reason are in each row's tooltip.
        self.checks.setWordWrap(False)
        header = self.checks.horizontalHeader()
        header.setSectionResizeMode(QHeaderView.ResizeMode.ResizeToContents)
        header.setStretchLastSection(True)
        self.signoffs = QListWidget(self)
        self.signoffs.setWordWrap(True)
        self.comments = QListWidget(self)
        self.comments.setWordWrap(True)
        buttons = QGridLayout()
        self.sign_button = QPushButton(icon("sign"), "Sign…", self)
        self.waive_button = QPushButton(icon("waive"), "Waive…", self)
        self.answer_button = QPushButton(icon("check"), "Answer…", self)
        self.comment_button = QPushButton(icon("comment"), "Comment…", self)
        self.resolve_button = QPushButton("Resolve", self)
        for index, button in enumerate((self.sign_button, self.waive_button, self.answer_button,
                                        self.comment_button, self.resolve_button)):
            buttons.addWidget(button, index // 3, index % 3)
        self.sign_button.clicked.connect(self.signRequested)
        self.waive_button.clicked.connect(lambda: self.waiveRequested.emit(self.selected_check()))
        self.answer_button.clicked.connect(lambda: self.answerRequested.emit(self.selected_check()))
        self.comment_button.clicked.connect(lambda: self.commentRequested.emit(self.selected_check()))
        self.resolve_button.clicked.connect(self._resolve_selected)
        layout = QVBoxLayout(self)
        layout.setContentsMargins(4, 2, 4, 2)
        layout.addWidget(self.title)
        layout.addWidget(self.state)
        layout.addWidget(self.totals)
        layout.addWidget(self.findings)
        layout.addWidget(self.checks, 3)
        layout.addLayout(buttons)
        layout.addWidget(QLabel("Sign-offs", self))
        layout.addWidget(self.signoffs, 2)
        layout.addWidget(QLabel("Comments", self))
        layout.addWidget(self.comments, 1)
        self.subscriptions = Subscriptions()
        self.subscriptions.connect_all([
            (document.currentStageChanged, self.reload),
            (document.stageChanged, self._stage_changed),
            (document.reviewChanged, self._stage_changed),
            (document.projectReplaced, self.reload),
            (document.chainChanged, self.reload),
            (worker.outcomeReady, self._on_outcome),
        ])
        self.reload()

    def disconnect_all(self) -> None:
        """Stop listening to the document and the worker (the window calls this when it closes)."""
        self.subscriptions.close()

    def selected_check(self) -> str:
        row = self.checks.currentRow()
        item = self.checks.item(row, 0) if row >= 0 else None
        return str(item.data(Qt.ItemDataRole.UserRole)) if item is not None else ""

    # ----------------------------------------------------------------- model → widget
    def _on_outcome(self, outcome: Outcome) -> None:
        self.outcome = outcome
        self._fill_checks()

    def _stage_changed(self, stage_id: str) -> None:
        if stage_id == self.document.current_stage_id:
            self.reload()

    def reload(self, *_: object) -> None:
        from stagewise.review.signoff import signoff_state

        stage = self.document.current_stage
        self.signoffs.clear()
        self.comments.clear()
        enabled = stage is not None and not self.document.read_only
        for button in (self.sign_button, self.waive_button, self.answer_button, self.comment_button,
                       self.resolve_button):
            button.setEnabled(enabled)
        if stage is None:
            self.title.setText("No stage selected")
            self.state.setText("")
            self.checks.setRowCount(0)
            return
        self.title.setText(f"Review of {stage.name}")
        state = signoff_state(self.document.project, stage.id)
        colour = SIGNOFF_COLOURS[state.state]
        meaning = SIGNOFF_STATE_MEANINGS[state.state]
        self.state.setText(f"{str(state.state).capitalize()}: {meaning}.")
        self.state.setStyleSheet(f"color: {colour}; font-weight: bold;")
        self.state.setProperty("signoffState", str(state.state))
        for view in reversed(state.signoffs):
            signoff = view.signoff
            text = (f"{view.word.upper() if view.out_of_date else view.word}: {signoff.name}"
                    f"{', ' + signoff.role if signoff.role else ''}, {signoff.time}")
            if view.out_of_date:
                text += f" ({view.verdict_word}, given to an earlier design of the stage)"
            if view.replaced:
                text += f" ({REPLACED_WORD} by a later sign-off of the same reviewer)"
            if view.unrecorded:
                text += " (no audit event holds this record: written or edited outside the program)"
            if view.breaks_four_eyes:
                text += " (the reviewer last changed this stage; the project's four-eyes rule does not count it)"
            if signoff.note:
                text += f"\n{signoff.note}"
            item = QListWidgetItem(text)
            item.setForeground(QBrush(QColor(SIGNOFF_COLOURS[SignoffState.UNRECORDED] if view.unrecorded
                                             else "#8a4b00" if view.out_of_date else "#202020")))
            item.setData(Qt.ItemDataRole.UserRole, "out of date" if view.out_of_date else "current")
            self.signoffs.addItem(item)
        if not state.signoffs:
            self.signoffs.addItem(QListWidgetItem("No sign-offs yet."))
        for index, note in enumerate(stage.comments):
            about = f" on check {note.check}" if note.check else ""
            status = "resolved" if note.resolved else "open"
            item = QListWidgetItem(f"{note.author}{about}, {note.time} ({status}): {note.text}")
            item.setData(Qt.ItemDataRole.UserRole, index)
            if note.resolved:
                item.setForeground(QBrush(QColor("#707070")))
            self.comments.addItem(item)
        self._fill_checks()

    def _fill_checks(self) -> None:
        stage = self.document.current_stage
        if stage is None:
            return
        review = self.outcome.of_stage(stage.id, "review") if self.outcome is not None else None
        results: dict[str, Any] = {}
        findings: tuple[Any, ...] = ()
        if review is not None and review.ok:
            results = {result.check_id: result for result in review.value.results}
            previous = self.outcome is not None and self.outcome.is_previous(stage.id, "review")
            self.totals.setText(("Re-evaluating after the last edit; until then the states below are the "
                                 "previous ones. " if previous else "") + review.value.summary_tip)
            findings = review.value.findings
        else:
            self.totals.setText("Evaluating the checks…" if review is None or self.worker.is_busy
                                else f"Checks not evaluated: {review.why}")
        self.findings.setText("\n".join(f"{FINDING_WORDS.get(item.kind, item.kind).upper()}: {item.sentence}"
                                         for item in findings))
        self.findings.setVisible(bool(findings))
        self.checks.setRowCount(len(stage.checks))
        records = check_records(self.document.project)
        for row, check in enumerate(stage.checks):
            result = results.get(check.id)
            where = "manual" if check.is_manual else WHERE_WORDS.get(check.where, check.where)
            state = str(result.state) if result is not None else "…"
            record = ""
            _trusted, ignored = trusted_check(check, stage.id, records)
            if ignored is not None:
                record = result.why if result is not None and result.why else ignored
            elif check.waiver is not None:
                record = f"waived by {check.waiver.by}: {check.waiver.justification}"
            elif check.answer is not None:
                record = (f"{ANSWER_WORDS.get(check.answer.answer, check.answer.answer)} by {check.answer.by}"
                          f"{': ' + check.answer.note if check.answer.note else ''}")
            elif result is not None and result.why:
                record = result.why
            detail = check.text + (f" — {record}" if record else "")
            limits = f"{result.limits} {where}" if result is not None and result.limits else where
            if result is not None and result.reference:
                limits += f" ({result.reference})"
            cells = [check.id, state, result.value_text() if result is not None else "", limits, detail]
            for column, text in enumerate(cells):
                item = QTableWidgetItem(text)
                item.setData(Qt.ItemDataRole.UserRole, check.id)
                item.setToolTip(detail if column in (0, 4) else text)
                if column == 1:
                    item.setForeground(QBrush(QColor(STATE_COLOURS.get(state, "#202020"))))
                    font = item.font()
                    font.setBold(True)
                    item.setFont(font)
                self.checks.setItem(row, column, item)
        self.checks.resizeRowsToContents()

    def check_state(self, check_id: str) -> str:
        """The state word shown for a check ("" when the check is not listed)."""
        for row in range(self.checks.rowCount()):
            item = self.checks.item(row, 0)
            if item is not None and item.data(Qt.ItemDataRole.UserRole) == check_id:
                return self.checks.item(row, 1).text()
        return ""

    # ----------------------------------------------------------------- widget → model
    def _record(self, action: Any) -> Any:
        from stagewise.review.actions import ReviewError

        stage_id = self.document.current_stage_id
        try:
            return self.document.record_review(stage_id, action)
        except ReviewError as error:
            raise EditRefused(str(error)) from error

    def sign(self, name: str, role: str, verdict: str, note: str = "") -> Any:
        from stagewise.review import actions

        stage_id = self.document.current_stage_id
        return self._record(lambda project: actions.sign(project, stage_id, name, role, verdict, note))

    def waive(self, check_id: str, by: str, role: str, justification: str) -> Any:
        from stagewise.review import actions

        stage_id = self.document.current_stage_id
        return self._record(lambda project: actions.waive(project, stage_id, check_id, by, role, justification))

    def answer(self, check_id: str, answer: str, by: str, note: str = "") -> Any:
        from stagewise.review import actions

        stage_id = self.document.current_stage_id
        return self._record(lambda project: actions.answer(project, stage_id, check_id, answer, by, note))

    def comment(self, author: str, text: str, check_id: str | None = None) -> Any:
        from stagewise.review import actions

        stage_id = self.document.current_stage_id
        return self._record(lambda project: actions.comment(project, stage_id, author, text, check_id))

    def resolve(self, comment_index: int, by: str) -> Any:
        from stagewise.review import actions

        stage_id = self.document.current_stage_id
        return self._record(lambda project: actions.resolve(project, stage_id, comment_index, by))

    def _resolve_selected(self) -> None:
        item = self.comments.currentItem()
        if item is None or not isinstance(item.data(Qt.ItemDataRole.UserRole), int):
            self.message.emit("Select a comment to resolve.")
            return
        from stagewise.ui.settings import reviewer_identity

        name, _role = reviewer_identity()
        try:
            self.resolve(int(item.data(Qt.ItemDataRole.UserRole)), name)
        except EditRefused as error:
            self.message.emit(str(error))
