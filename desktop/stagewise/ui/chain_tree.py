"""The chain as a tree: the project, its stages in chain order, each with its parts and checks.

Two tick columns choose what the plots overlay: a stage alone and a stage in chain; the project
row's "in chain" box is the whole chain, and a baseline row appears when one is loaded. Stage
names are edited in place (an undoable rename). Selecting any row selects its stage.
"""

from __future__ import annotations

from PySide6.QtCore import QSize, Qt, Signal
from PySide6.QtGui import QAction, QBrush, QColor, QFont
from PySide6.QtWidgets import QAbstractItemView, QHeaderView, QMenu, QTreeWidget, QTreeWidgetItem, QWidget

from stagewise.model.project import PART_TYPES, Part, Stage
from stagewise.review.words import WHERE_WORDS, CheckState
from stagewise.ui.document import Document, EditRefused
from stagewise.ui.icons import icon
from stagewise.ui.overlays import FROM_INPUT, IN_CHAIN, ISOLATED, OverlaySelection
from stagewise.ui.palette import STATE_MARKS
from stagewise.ui.subscriptions import Subscriptions
from stagewise.ui.worker import ComputeWorker, Outcome

__all__ = ["ChainTree", "describe_part"]

ROLE_KIND = Qt.ItemDataRole.UserRole
ROLE_STAGE = Qt.ItemDataRole.UserRole + 1
ROLE_KEY = Qt.ItemDataRole.UserRole + 2
COLUMN_NAME, COLUMN_ALONE, COLUMN_IN_CHAIN, COLUMN_STATE = range(4)
COLUMN_FROM_INPUT = 4  # after the review column, so the columns before it keep their places


def describe_part(part: Part) -> str:
    """One line for a part: ``R1  3.3k  in–out``."""
    value = str(part.value.raw) if part.value is not None else (part.model or "")
    return f"{part.ref}  {value}  {'–'.join(part.nodes)}"


class ChainTree(QTreeWidget):
    """Tree view of the chain; emits ``message`` with a sentence when an edit is refused."""

    message = Signal(str)

    def __init__(self, document: Document, worker: ComputeWorker, overlays: OverlaySelection,
                 parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.document = document
        self.worker = worker
        self.overlays = overlays
        self.outcome: Outcome | None = worker.latest
        self.context_actions: list[QAction] = []
        self.setColumnCount(5)
        # "In chain" on two lines: the tick column is as wide as its longest word, not the phrase.
        self.setHeaderLabels(["Chain", "Alone", "In\nchain", "Review", "Input"])
        self.setHeaderHidden(False)
        header = self.header()
        header.setStretchLastSection(False)
        header.setSectionResizeMode(COLUMN_NAME, QHeaderView.ResizeMode.Stretch)
        header.setMinimumSectionSize(24)
        self.setIndentation(12)
        # The project row heads the tree and stays open: no expander column before it, which
        # gives every name that width back.
        self.setRootIsDecorated(False)
        self.itemCollapsed.connect(self._keep_project_open)
        # Tick columns as wide as their header word, the review column as wide as its longest
        # short state ("accepted ✓ 10/10 met"); names take the rest and are elided in the middle,
        # with the whole name as a tooltip, so the columns fit a 1280×720 screen.
        metrics = self.fontMetrics()
        for column in (COLUMN_ALONE, COLUMN_IN_CHAIN, COLUMN_FROM_INPUT):
            header.setSectionResizeMode(column, QHeaderView.ResizeMode.Fixed)
            header.resizeSection(column, max(metrics.horizontalAdvance(line)
                                             for line in self.headerItem().text(column).split("\n")) + 14)
        header.setSectionResizeMode(COLUMN_STATE, QHeaderView.ResizeMode.Fixed)
        header.resizeSection(COLUMN_STATE, max(metrics.horizontalAdvance(f"{word} {glyph} 10/10")
                                               for word, glyph, _ in STATE_MARKS.values()) + 12)
        self.setTextElideMode(Qt.TextElideMode.ElideMiddle)
        self.headerItem().setToolTip(COLUMN_ALONE, "Overlay the stage alone (ideal drive, unloaded)")
        self.headerItem().setToolTip(COLUMN_IN_CHAIN, "Overlay the stage where it sits in the chain")
        self.headerItem().setToolTip(COLUMN_STATE, "Sign-off state, and checks met of all (3/4: three of four "
                                     "checks met; waived ones counted apart)")
        self.headerItem().setToolTip(COLUMN_FROM_INPUT, "Overlay the chain's drive to this stage's output "
                                     "(everything before and after it in place)")
        self.setSelectionMode(QAbstractItemView.SelectionMode.SingleSelection)
        self.setEditTriggers(QAbstractItemView.EditTrigger.DoubleClicked | QAbstractItemView.EditTrigger.EditKeyPressed)
        self.setContextMenuPolicy(Qt.ContextMenuPolicy.CustomContextMenu)
        self.customContextMenuRequested.connect(self._context_menu)
        self.setUniformRowHeights(True)
        self.itemChanged.connect(self._item_changed)
        self.currentItemChanged.connect(self._current_changed)
        self._stage_items: dict[str, QTreeWidgetItem] = {}
        self._building = False
        self.subscriptions = Subscriptions()
        self.subscriptions.connect_all([
            (document.projectReplaced, self.rebuild),
            (document.chainChanged, self.rebuild),
            (document.stageChanged, self._stage_changed),
            (document.reviewChanged, self._stage_changed),
            (document.currentStageChanged, self._select_stage),
            (document.baselineChanged, self.rebuild),
            (overlays.changed, self._sync_ticks),
            (worker.outcomeReady, self._on_outcome),
        ])
        self.rebuild()

    def _keep_project_open(self, item: QTreeWidgetItem) -> None:
        if item.data(0, ROLE_KIND) == "project":
            item.setExpanded(True)

    def disconnect_all(self) -> None:
        """Stop listening to the document and the worker (the window calls this when it closes)."""
        self.subscriptions.close()

    def sizeHint(self) -> QSize:  # noqa: N802 - Qt's name
        """Wide enough for the tick and review columns and about 18 characters of names."""
        hint = super().sizeHint()
        header = self.header()
        columns = sum(header.sectionSize(column) for column in range(1, self.columnCount()))
        return QSize(columns + self.fontMetrics().horizontalAdvance("M" * 12) + 40, hint.height())

    # ----------------------------------------------------------------- model → widget
    def rebuild(self, *_: object) -> None:
        """Copy the model in (signals blocked so that nothing writes back)."""
        expanded = {stage_id for stage_id, item in self._stage_items.items() if item.isExpanded()}
        first_build = not self._stage_items
        self._building = True
        self.blockSignals(True)
        try:
            self.clear()
            self._stage_items = {}
            project = self.document.project
            root = QTreeWidgetItem([project.title or "Untitled project", "", "", ""])
            root.setData(0, ROLE_KIND, "project")
            root.setIcon(0, icon("project"))
            root.setToolTip(COLUMN_IN_CHAIN, "Show the whole chain (drive to last output)")
            font = QFont(root.font(0))
            font.setBold(True)
            root.setFont(0, font)
            self.addTopLevelItem(root)
            if self.document.baseline is not None:
                baseline = self.document.baseline
                path = self.document.baseline_path
                label = f"Baseline: {baseline.title} rev {baseline.revision or '?'}"
                item = QTreeWidgetItem([label, "", "", ""])
                item.setData(0, ROLE_KIND, "baseline")
                item.setIcon(0, icon("baseline"))
                item.setToolTip(0, str(path) if path else label)
                root.addChild(item)
            for index, stage in enumerate(project.stages, start=1):
                root.addChild(self._stage_item(index, stage, stage.id in expanded or first_build and index == 1))
            for measurement in project.measurements:
                where = WHERE_WORDS.get(measurement.where, measurement.where)
                if measurement.stage is not None:
                    where = f"{measurement.stage}, {where}"
                item = QTreeWidgetItem([f"Measured: {measurement.id} ({where})", "", "", ""])
                item.setData(0, ROLE_KIND, "measurement")
                item.setData(0, ROLE_KEY, measurement.id)
                item.setToolTip(0, f"{measurement.file}, SHA-256 {measurement.sha256}; tick to overlay it on the "
                                   "predicted trace of its place")
                root.addChild(item)
            root.setExpanded(True)
            self._sync_ticks()
            self._fill_states()
        finally:
            self.blockSignals(False)
            self._building = False
        self._select_stage(self.document.current_stage_id)

    def _stage_item(self, index: int, stage: Stage, expanded: bool) -> QTreeWidgetItem:
        item = QTreeWidgetItem([stage.name, "", "", ""])
        item.setData(0, ROLE_KIND, "stage")
        item.setData(0, ROLE_STAGE, stage.id)
        item.setFlags(item.flags() | Qt.ItemFlag.ItemIsEditable)
        item.setIcon(0, icon("block" if stage.is_block else "stage"))
        tip = f"Stage {index}: {stage.name} (id {stage.id})"
        if stage.bypass:
            tip += ", bypassed: left out of the chain"
            font = QFont(item.font(0))
            font.setItalic(True)
            item.setFont(0, font)
            item.setForeground(0, QBrush(QColor("#707070")))
            item.setText(0, f"{stage.name} (bypassed)")
        item.setToolTip(0, f"{item.text(0)}\n{tip}")
        self._stage_items[stage.id] = item
        self._fill_children(item, stage)
        item.setExpanded(expanded)
        return item

    def _fill_children(self, item: QTreeWidgetItem, stage: Stage) -> None:
        for child in item.takeChildren():
            del child
        if stage.is_block:
            child = QTreeWidgetItem(["behavioural block (gain, poles, zeros)", "", "", ""])
            child.setData(0, ROLE_KIND, "block")
            child.setData(0, ROLE_STAGE, stage.id)
            item.addChild(child)
        for part in stage.parts:
            child = QTreeWidgetItem([describe_part(part), "", "", ""])
            child.setData(0, ROLE_KIND, "part")
            child.setData(0, ROLE_STAGE, stage.id)
            child.setData(0, ROLE_KEY, part.ref)
            child.setIcon(0, icon("part"))
            meaning = PART_TYPES.get(part.type, ("", part.type, ""))[1] or "op-amp"
            child.setToolTip(0, f"{describe_part(part)}\n{part.ref}: {part.type} ({meaning}) between "
                                f"{', '.join(part.nodes)}")
            item.addChild(child)
        for check in stage.checks:
            child = QTreeWidgetItem([f"check {check.id}: {check.text}", "", "", ""])
            child.setData(0, ROLE_KIND, "check")
            child.setData(0, ROLE_STAGE, stage.id)
            child.setData(0, ROLE_KEY, check.id)
            child.setIcon(0, icon("check"))
            child.setToolTip(0, f"check {check.id}: {check.text}")
            item.addChild(child)

    def _stage_changed(self, stage_id: str) -> None:
        item = self._stage_items.get(stage_id)
        stage = self.document.project.stage(stage_id)
        if item is None or stage is None:
            self.rebuild()
            return
        self.blockSignals(True)
        try:
            self._fill_children(item, stage)
            self._fill_states()
        finally:
            self.blockSignals(False)

    def _on_outcome(self, outcome: Outcome) -> None:
        self.outcome = outcome
        self.blockSignals(True)
        try:
            self._fill_states()
        finally:
            self.blockSignals(False)

    def _fill_states(self) -> None:
        """Sign-off state (read now, so an edit shows an out-of-date sign-off at once) and check totals
        from the latest analysis; the words come from stagewise.review."""
        from stagewise.review.signoff import signoff_state

        outcome = self.outcome
        for stage_id, item in self._stage_items.items():
            if self.document.project.stage(stage_id) is None:
                continue
            state = signoff_state(self.document.project, stage_id).state
            words = [str(state)]
            tips = [f"Sign-off: {state}"]
            review = outcome.of_stage(stage_id, "review") if outcome is not None else None
            if review is not None and review.ok:
                words.append(review.value.summary)
                tips.append(review.value.summary_tip)
                states = review.value.check_states
                for index in range(item.childCount()):
                    child = item.child(index)
                    if child.data(0, ROLE_KIND) == "check":
                        child.setText(COLUMN_STATE, states.get(child.data(0, ROLE_KEY)) or "")
            # A short word and a shape, readable without colour; the colour from our palette.
            word, glyph, colour = STATE_MARKS.get(str(state), (str(state), "•", "#505050"))
            short = [f"{word} {glyph}"]
            if review is not None and review.ok and "/" in review.value.summary:
                # The count of met checks and of waived ones; the whole sentence is the tooltip.
                checks, _, findings = review.value.summary.partition("; ")
                counts = checks.split(", ")
                # "3/4" (checks met of all, as the column's tooltip says), not "3/4 met": the
                # names need the width more.
                met = counts[0].removesuffix(f" {CheckState.MET}")
                text = ", ".join([met, *[part for part in counts[1:] if "waived" in part]])
                if findings and findings.split()[0].isdigit():
                    text += f" ⚑{findings.split()[0]}"  # automatic findings (the tooltip names them)
                short.append(text)
            item.setText(COLUMN_STATE, " ".join(short))
            item.setToolTip(COLUMN_STATE, "\n".join(tips))
            item.setForeground(COLUMN_STATE, QBrush(QColor(colour)))
        # The review column as wide as its widest text now, so the names get the rest.
        metrics = self.fontMetrics()
        widest = max([metrics.horizontalAdvance(item.text(COLUMN_STATE)) for item in self._stage_items.values()]
                     + [metrics.horizontalAdvance(self.headerItem().text(COLUMN_STATE))])
        if self.header().sectionSize(COLUMN_STATE) != widest + 14:
            self.header().resizeSection(COLUMN_STATE, widest + 14)

    def _sync_ticks(self) -> None:
        was_blocked = self.blockSignals(True)
        try:
            root = self.topLevelItem(0)
            if root is None:
                return
            root.setCheckState(COLUMN_IN_CHAIN, _tick(self.overlays.chain_shown()))
            for index in range(root.childCount()):
                child = root.child(index)
                kind = child.data(0, ROLE_KIND)
                if kind == "baseline":
                    child.setCheckState(COLUMN_IN_CHAIN, _tick(self.overlays.baseline_shown()))
                elif kind == "measurement":
                    child.setCheckState(COLUMN_IN_CHAIN, _tick(self.overlays.measurement_shown(child.data(0, ROLE_KEY))))
                elif kind == "stage":
                    stage_id = child.data(0, ROLE_STAGE)
                    child.setCheckState(COLUMN_ALONE, _tick(self.overlays.stage_shown(stage_id, ISOLATED)))
                    stage = self.document.project.stage(stage_id)
                    if stage is not None and not stage.bypass:
                        child.setCheckState(COLUMN_IN_CHAIN, _tick(self.overlays.stage_shown(stage_id, IN_CHAIN)))
                        child.setCheckState(COLUMN_FROM_INPUT,
                                            _tick(self.overlays.stage_shown(stage_id, FROM_INPUT)))
        finally:
            self.blockSignals(was_blocked)

    def _select_stage(self, stage_id: str) -> None:
        item = self._stage_items.get(stage_id)
        current = self.currentItem()
        if item is None or (current is not None and current.data(0, ROLE_STAGE) == stage_id):
            return
        was_blocked = self.blockSignals(True)
        try:
            self.setCurrentItem(item)
        finally:
            self.blockSignals(was_blocked)

    # ----------------------------------------------------------------- widget → model
    def _current_changed(self, current: QTreeWidgetItem | None, _previous: QTreeWidgetItem | None) -> None:
        if current is None:
            return
        stage_id = current.data(0, ROLE_STAGE)
        if stage_id:
            self.document.set_current_stage(stage_id)

    def _item_changed(self, item: QTreeWidgetItem, column: int) -> None:
        if self._building:
            return
        kind = item.data(0, ROLE_KIND)
        checked = item.checkState(column) == Qt.CheckState.Checked
        if kind == "project" and column == COLUMN_IN_CHAIN:
            self.overlays.set_chain(checked)
        elif kind == "baseline" and column == COLUMN_IN_CHAIN:
            self.overlays.set_baseline(checked)
        elif kind == "measurement" and column == COLUMN_IN_CHAIN:
            self.overlays.set_measurement(item.data(0, ROLE_KEY), checked)
        elif kind == "stage" and column in (COLUMN_ALONE, COLUMN_IN_CHAIN, COLUMN_FROM_INPUT):
            view = {COLUMN_ALONE: ISOLATED, COLUMN_IN_CHAIN: IN_CHAIN}.get(column, FROM_INPUT)
            self.overlays.set_stage(item.data(0, ROLE_STAGE), view, checked)
        elif kind == "stage" and column == COLUMN_NAME:
            stage_id = item.data(0, ROLE_STAGE)
            try:
                self.document.rename_stage(stage_id, item.text(0))
            except EditRefused as error:
                self.message.emit(str(error))
                self.rebuild()

    def _context_menu(self, position: object) -> None:
        if not self.context_actions:
            return
        menu = QMenu(self)
        for action in self.context_actions:
            if action is None:
                menu.addSeparator()
            else:
                menu.addAction(action)
        menu.exec(self.viewport().mapToGlobal(position))  # type: ignore[arg-type]


def _tick(shown: bool) -> Qt.CheckState:
    return Qt.CheckState.Checked if shown else Qt.CheckState.Unchecked
