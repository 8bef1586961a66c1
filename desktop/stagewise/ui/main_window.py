"""The main window: docks around the chain, actions, files, recovery and the edit lock.

Regions are dock widgets the user can rearrange; the arrangement is remembered with
``saveState``/``restoreState``. The window holds one :class:`~stagewise.ui.document.Document`
and one :class:`~stagewise.ui.worker.ComputeWorker`; widgets talk to those, never to each other.

Files: the title shows unsaved changes (``[*]``); closing asks before discarding them. While a
project has unsaved changes, a recovery copy ``NAME.stagewise.json.recovery`` is written beside
it (periodically and shortly after each edit) and removed on save or close; opening a file with a
recovery copy newer than itself offers to restore it. A project locked by someone else is offered
read-only, naming who holds it.
"""

from __future__ import annotations

import contextlib
import copy
import os
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from PySide6.QtCore import QByteArray, QEvent, QObject, QStandardPaths, Qt, QTimer, Signal
from PySide6.QtGui import QAction, QCloseEvent, QKeySequence
from PySide6.QtWidgets import (
    QApplication,
    QDockWidget,
    QFileDialog,
    QInputDialog,
    QMainWindow,
    QMenu,
    QMessageBox,
    QWidget,
)

from stagewise.model.project import Part, Project, Stage
from stagewise.model.values import Quantity, ValueSyntaxError
from stagewise.ui.chain_tree import ChainTree
from stagewise.ui.dc_view import DcView
from stagewise.ui.document import Document, EditRefused, blank_stage
from stagewise.ui.icons import icon
from stagewise.ui.measured_view import MeasurementView
from stagewise.ui.overlays import IN_CHAIN, ISOLATED, OverlaySelection
from stagewise.ui.parts_table import FormulaView, PartsTable
from stagewise.ui.plots import LoopGainView, NoiseView, PlotView, PoleZeroView, ResponseView, SpreadView, StepView
from stagewise.ui.review_panel import ReviewPanel
from stagewise.ui.settings import add_recent, app_settings, recent_files, remember_reviewer, reviewer_identity
from stagewise.ui.spread_progress import SpreadProgress
from stagewise.ui.worker import ComputeWorker

__all__ = ["RECOVERY_SUFFIX", "MainWindow", "demo_path", "empty_project", "recovery_path"]

RECOVERY_SUFFIX = ".recovery"
AUTOSAVE_INTERVAL_MS = 60_000
AUTOSAVE_AFTER_EDIT_MS = 2_000
LAYOUT_VERSION = 4  # 4: the loop-gain dock
FILE_FILTER = "Stagewise projects (*.stagewise.json);;All files (*)"


def demo_path() -> Path:
    """The bundled hydrophone demo, found relative to the package."""
    import stagewise

    return Path(stagewise.__file__).resolve().parents[2] / "projects" / "hydrophone.stagewise.json"


def recovery_path(path: Path | None) -> Path:
    """Where the recovery copy of ``path`` goes (a per-user folder for a project never saved)."""
    if path is not None:
        return path.with_name(path.name + RECOVERY_SUFFIX)
    folder = QStandardPaths.writableLocation(QStandardPaths.StandardLocation.AppDataLocation) or tempfile.gettempdir()
    Path(folder).mkdir(parents=True, exist_ok=True)
    return Path(folder) / f"untitled.stagewise.json{RECOVERY_SUFFIX}"


def empty_project() -> Project:
    """A new project: one RC stage that solves, saves and opens again (see :func:`blank_stage`)."""
    return Project(title="New chain", revision="A", stages=[blank_stage("First stage")])


class _FirstPaint(QObject):
    """Reports the first paint of a widget once (start-up timing)."""

    painted = Signal()

    def eventFilter(self, watched: QObject, event: QEvent) -> bool:  # noqa: N802 - Qt's name
        if event.type() == QEvent.Type.Paint:
            watched.removeEventFilter(self)
            self.painted.emit()
        return False


@dataclass(frozen=True)
class _ImportedStage:
    """A stage added from element cards and not yet saved: recorded as "import" at the next save."""

    stage: Stage  # as imported, before any later edit
    detail: dict[str, Any]


class MainWindow(QMainWindow):
    """The Stagewise main window.

    Parameters
    ----------
    project, path : the project to show and its file (``None`` for a new project).
    interactive : when False (screenshots), nothing asks the user anything.
    """

    def __init__(self, project: Project, path: str | Path | None = None, *, read_only: bool = False,
                 interactive: bool = True, parent: QWidget | None = None) -> None:
        from stagewise.ui.qt_guard import protect_singletons

        protect_singletons()
        super().__init__(parent)
        self.interactive = interactive
        self.document = Document(project, path, self)
        if read_only:
            self.document.replace_project(project, path, read_only=True)
        self.worker = ComputeWorker(self.document, parent=self)
        self.overlays = OverlaySelection(self)
        self.overlays.show_only_stage(self.document.current_stage_id)
        self._lock: Any = None
        self._recovery_written = False
        self._discard_chosen = False
        self._saved_snapshot = copy.deepcopy(project)
        self._pending_imports: list[_ImportedStage] = []
        self._packet_author: str | None = None
        self._previous_stage = self.document.current_stage_id
        self.first_paint = _FirstPaint(self)
        self.installEventFilter(self.first_paint)
        self.setWindowIcon(icon("stagewise"))
        self.setDockNestingEnabled(True)
        self.setDockOptions(QMainWindow.DockOption.AllowNestedDocks | QMainWindow.DockOption.AllowTabbedDocks
                            | QMainWindow.DockOption.AnimatedDocks)
        self._build_views()
        self._build_actions()
        self._build_menus()
        self._arrange_default()
        self._restore_layout()
        self._wire()
        self._autosave_timer = QTimer(self)
        self._autosave_timer.setInterval(AUTOSAVE_INTERVAL_MS)
        self._autosave_timer.timeout.connect(self._periodic)
        self._autosave_timer.start()
        self._edit_autosave = QTimer(self)
        self._edit_autosave.setSingleShot(True)
        self._edit_autosave.setInterval(AUTOSAVE_AFTER_EDIT_MS)
        self._edit_autosave.timeout.connect(self.write_recovery)
        self._update_title()
        self._update_actions()
        self.statusBar().showMessage("Ready.", 3000)
        # The running Monte Carlo's progress and its Cancel button (hidden while none runs).
        self.spread_progress = SpreadProgress(self.worker, self)
        self.statusBar().addPermanentWidget(self.spread_progress)
        # The first analysis starts once the window has painted (or shortly after, if it is not
        # shown), so that start-up paints first and computes second.
        self._first_request_done = False
        self.first_paint.painted.connect(self._first_request)

    def _first_request(self) -> None:
        if not self._first_request_done:
            self._first_request_done = True
            self.worker.request()

    # ----------------------------------------------------------------- construction
    def _dock(self, name: str, title: str, widget: QWidget) -> QDockWidget:
        dock = QDockWidget(title, self)
        dock.setObjectName(name)
        dock.setWidget(widget)
        dock.setFeatures(QDockWidget.DockWidgetFeature.DockWidgetMovable
                         | QDockWidget.DockWidgetFeature.DockWidgetFloatable
                         | QDockWidget.DockWidgetFeature.DockWidgetClosable)
        return dock

    def _build_views(self) -> None:
        document, worker, overlays = self.document, self.worker, self.overlays
        self.tree = ChainTree(document, worker, overlays)
        self.response_view = ResponseView(document, worker, overlays)
        self.step_view = StepView(document, worker, overlays)
        self.pole_zero_view = PoleZeroView(document, worker, overlays)
        self.noise_view = NoiseView(document, worker, overlays)
        self.dc_view = DcView(document, worker, overlays)
        self.spread_view = SpreadView(document, worker, overlays)
        self.loop_view = LoopGainView(document, worker, overlays)
        self.measurement_view = MeasurementView(document, worker, overlays)
        self.review_panel = ReviewPanel(document, worker)
        self.parts_table = PartsTable(document)
        self.formula_view = FormulaView(document, worker)
        self.docks = {
            "chain": self._dock("chainDock", "Chain", self.tree),
            "response": self._dock("responseDock", "Response (magnitude and phase)", self.response_view),
            "step": self._dock("stepDock", "Step", self.step_view),
            "poles": self._dock("polesDock", "Poles and zeros", self.pole_zero_view),
            "noise": self._dock("noiseDock", "Noise", self.noise_view),
            "dc": self._dock("dcDock", "DC accuracy", self.dc_view),
            "spread": self._dock("spreadDock", "Spread over tolerances", self.spread_view),
            "measured": self._dock("measuredDock", "Bench measurements", self.measurement_view),
            "loops": self._dock("loopsDock", "Loop gain", self.loop_view),
            "review": self._dock("reviewDock", "Review", self.review_panel),
            "parts": self._dock("partsDock", "Parts", self.parts_table),
            "formula": self._dock("formulaDock", "Formula", self.formula_view),
        }
        # No central widget: every region is a dock the user can move.
        placeholder = QWidget(self)
        placeholder.setMaximumSize(0, 0)
        self.setCentralWidget(placeholder)

    def plot_views(self) -> list[PlotView]:
        return [self.response_view, self.step_view, self.pole_zero_view, self.noise_view, self.dc_view,
                self.spread_view, self.measurement_view, self.loop_view]

    def _action(self, name: str, text: str, slot: Any, shortcut: Any = None, icon_name: str = "",
                tip: str = "") -> QAction:
        action = QAction(text, self)
        action.setObjectName(name)
        if icon_name:
            action.setIcon(icon(icon_name))
        if shortcut is not None:
            if isinstance(shortcut, QKeySequence.StandardKey):
                action.setShortcuts(shortcut)
            else:
                action.setShortcut(QKeySequence(shortcut))
        if tip:
            action.setStatusTip(tip)
            action.setToolTip(tip)
        action.triggered.connect(slot)
        self.addAction(action)
        return action

    def _build_actions(self) -> None:
        key = QKeySequence.StandardKey
        a = self._action
        self.actions_by_name: dict[str, QAction] = {}
        for action in [
            a("newProject", "&New project", self.new_project, key.New, "new", "Start a new chain"),
            a("openProject", "&Open…", self.open_dialog, key.Open, "open", "Open a project file"),
            a("saveProject", "&Save", self.save, key.Save, "save", "Save the project"),
            a("saveProjectAs", "Save &as…", self.save_as, key.SaveAs, "", "Save under another name"),
            a("importCards", "&Import element cards…", self.import_cards_dialog, "Ctrl+Shift+I", "cards",
              "Add a stage typed as element cards, one part per line"),
            a("attachMeasurement", "Attach &bench measurement…", self.attach_measurement_dialog, None, "",
              "Attach a measured response (Touchstone .s2p or CSV) to a stage or the chain"),
            a("exportPacket", "&Export review packet…", self.export_packet_dialog, "Ctrl+Shift+E", "packet",
              "Write the review packet as a PDF and record it in the audit trail"),
            a("printPacket", "&Print packet…", self.print_packet_dialog, key.Print, "print",
              "Send the review packet to a printer"),
            a("loadBaseline", "Compare with &baseline file…", self.load_baseline_dialog, None, "baseline",
              "Overlay the chain of another revision's file"),
            a("clearBaseline", "Stop comparing with baseline", self.clear_baseline, None, "", ""),
            a("closeWindow", "&Close", self.close, key.Close, "", ""),
            a("quit", "&Quit", self.close, key.Quit, "", ""),
            a("addPart", "Add &part…", self.add_part_dialog, "Ctrl+Shift+P", "add-part", "Add a part to the stage"),
            a("removePart", "Remove part", self.remove_selected_part, None, "remove", "Remove the selected part"),
            a("newStage", "New &empty stage", self.new_blank_stage, "Ctrl+Shift+N", "add-stage",
              "Add a stage at the end of the chain"),
            a("stageFromTemplate", "New stage from &template…", self.new_stage_from_template_dialog, "Ctrl+Shift+T",
              "add-stage", "Add a stage from a template"),
            a("duplicateStage", "&Duplicate stage", self.duplicate_stage, "Ctrl+Shift+D", "duplicate", ""),
            a("renameStage", "&Rename stage…", self.rename_stage_dialog, "F2", "", ""),
            a("moveStageUp", "Move stage &earlier", lambda: self.move_stage(-1), "Ctrl+Shift+Up", "up", ""),
            a("moveStageDown", "Move stage &later", lambda: self.move_stage(+1), "Ctrl+Shift+Down", "down", ""),
            a("bypassStage", "&Bypass stage", self.toggle_bypass, "Ctrl+Shift+B", "bypass",
              "Leave the stage out of the chain (it stays in the file)"),
            a("removeStage", "Remo&ve stage", self.remove_stage, None, "remove", ""),
            # Ctrl+Shift+S is the platform's "Save as"; signing has a key of its own.
            a("signStage", "&Sign stage…", self.sign_dialog, "Ctrl+Shift+G", "sign", "Record your verdict on the stage"),
            a("projectSettings", "&Project settings…", lambda: self._exec(self.project_dialog()), "Ctrl+Shift+J",
              "project", "Title, revision, input drive, frequency range, reference, noise band, temperature, seed"),
            a("converterSettings", "&Converter…", lambda: self._exec(self.converter_dialog()), None, "",
              "Sample rate, resolution and full scale of the converter the chain drives"),
            a("newBlockStage", "New &block stage…", lambda: self._exec(self.new_block_stage_dialog()), None,
              "block", "Add a behavioural block: gain, poles and zeros, input and output impedance"),
            a("editBlockStage", "Edit b&lock stage…", lambda: self._exec(self.block_stage_dialog()), None, "block",
              "Edit the selected behavioural block"),
            a("editChecks", "Edit &checks…", lambda: self._exec(self.check_editor_dialog()), "Ctrl+Shift+K", "check",
              "Add, edit or remove the stage's checks, or add checks from the library"),
            a("chooseOpamp", "Op-amp &model…", lambda: self._exec(self.opamp_dialog()), "Ctrl+Shift+M", "part",
              "Choose the selected op-amp's model, from the project or the library"),
            a("waiveCheck", "&Waive check…", lambda: self.waive_dialog(""), None, "waive", ""),
            a("answerCheck", "&Answer manual check…", lambda: self.answer_dialog(""), None, "check", ""),
            a("commentStage", "&Comment…", lambda: self.comment_dialog(""), None, "comment", ""),
            a("resetLayout", "Reset &layout", self.reset_layout, None, "", ""),
            a("cautions", "&Cautions", self.show_cautions, None, "", "What Stagewise does not assess"),
            a("about", "&About Stagewise", self.show_about, None, "about", ""),
        ]:
            self.actions_by_name[action.objectName()] = action
        self.actions_by_name["bypassStage"].setCheckable(True)
        # F2 renames the stage where the stage is chosen (the chain tree); in the parts table it
        # is the platform's key for editing the current cell.
        rename = self.actions_by_name["renameStage"]
        rename.setShortcutContext(Qt.ShortcutContext.WidgetWithChildrenShortcut)
        self.removeAction(rename)
        self.tree.addAction(rename)
        self.undo_action = self.document.undo_stack.createUndoAction(self, "&Undo")
        self.undo_action.setShortcuts(key.Undo)
        self.undo_action.setIcon(icon("undo"))
        self.redo_action = self.document.undo_stack.createRedoAction(self, "&Redo")
        self.redo_action.setShortcuts(key.Redo)
        self.redo_action.setIcon(icon("redo"))
        self.addAction(self.undo_action)
        self.addAction(self.redo_action)
        self.tree.context_actions = [self.actions_by_name[name] for name in (
            "renameStage", "duplicateStage", "bypassStage", "moveStageUp", "moveStageDown")] + [None] + [
            self.actions_by_name[name] for name in ("addPart", "removePart", "removeStage")]  # type: ignore[list-item]

    def _build_menus(self) -> None:
        bar = self.menuBar()
        names = self.actions_by_name
        file_menu = bar.addMenu("&File")
        for name in ("newProject", "openProject"):
            file_menu.addAction(names[name])
        self.recent_menu = QMenu("Open &recent", self)
        file_menu.addMenu(self.recent_menu)
        self._fill_recent()
        for name in ("saveProject", "saveProjectAs"):
            file_menu.addAction(names[name])
        file_menu.addSeparator()
        file_menu.addAction(names["importCards"])
        file_menu.addAction(names["attachMeasurement"])
        file_menu.addAction(names["exportPacket"])
        file_menu.addAction(names["printPacket"])
        file_menu.addSeparator()
        file_menu.addAction(names["loadBaseline"])
        file_menu.addAction(names["clearBaseline"])
        file_menu.addSeparator()
        file_menu.addAction(names["closeWindow"])
        file_menu.addAction(names["quit"])
        edit_menu = bar.addMenu("&Edit")
        edit_menu.addAction(self.undo_action)
        edit_menu.addAction(self.redo_action)
        edit_menu.addSeparator()
        edit_menu.addAction(names["addPart"])
        edit_menu.addAction(names["removePart"])
        edit_menu.addAction(names["chooseOpamp"])
        edit_menu.addSeparator()
        edit_menu.addAction(names["projectSettings"])
        edit_menu.addAction(names["converterSettings"])
        stage_menu = bar.addMenu("&Stage")
        for name in ("newStage", "stageFromTemplate", "newBlockStage", "editBlockStage", "duplicateStage",
                     "renameStage", "moveStageUp", "moveStageDown", "bypassStage", "removeStage"):
            stage_menu.addAction(names[name])
        review_menu = bar.addMenu("&Review")
        for name in ("editChecks", "signStage", "waiveCheck", "answerCheck", "commentStage"):
            review_menu.addAction(names[name])
        view_menu = bar.addMenu("&View")
        for dock in self.docks.values():
            view_menu.addAction(dock.toggleViewAction())
        view_menu.addSeparator()
        view_menu.addAction(names["resetLayout"])
        help_menu = bar.addMenu("&Help")
        help_menu.addAction(names["cautions"])
        help_menu.addAction(names["about"])
        toolbar = self.addToolBar("Main")
        toolbar.setObjectName("mainToolbar")
        toolbar.setMovable(False)
        for name in ("newProject", "openProject", "saveProject"):
            toolbar.addAction(names[name])
        toolbar.addSeparator()
        toolbar.addAction(self.undo_action)
        toolbar.addAction(self.redo_action)
        toolbar.addSeparator()
        for name in ("newStage", "addPart", "moveStageUp", "moveStageDown", "bypassStage", "duplicateStage"):
            toolbar.addAction(names[name])
        toolbar.addSeparator()
        toolbar.addAction(names["signStage"])
        toolbar.addAction(names["loadBaseline"])

    def _arrange_default(self) -> None:
        d = self.docks
        for dock in d.values():
            dock.setFloating(False)
            dock.show()
        self.addDockWidget(Qt.DockWidgetArea.LeftDockWidgetArea, d["chain"])
        self.splitDockWidget(d["chain"], d["response"], Qt.Orientation.Horizontal)
        self.splitDockWidget(d["response"], d["review"], Qt.Orientation.Horizontal)
        self.splitDockWidget(d["chain"], d["parts"], Qt.Orientation.Vertical)
        self.splitDockWidget(d["response"], d["step"], Qt.Orientation.Vertical)
        self.splitDockWidget(d["step"], d["poles"], Qt.Orientation.Horizontal)
        self.splitDockWidget(d["poles"], d["noise"], Qt.Orientation.Horizontal)
        self.tabifyDockWidget(d["noise"], d["dc"])
        self.tabifyDockWidget(d["dc"], d["spread"])
        self.tabifyDockWidget(d["spread"], d["measured"])
        self.tabifyDockWidget(d["measured"], d["loops"])
        d["noise"].raise_()
        self.splitDockWidget(d["review"], d["formula"], Qt.Orientation.Vertical)
        self._default_sizes()

    def _default_sizes(self) -> None:
        # Shares of the window: chain and parts on the left, plots in the middle, review on the right.
        d = self.docks
        width, height = max(self.width(), 1280), max(self.height(), 800)
        self.resizeDocks([d["chain"], d["response"], d["review"]],
                         [int(width * 0.37), int(width * 0.41), int(width * 0.22)], Qt.Orientation.Horizontal)
        third = int(width * 0.41 / 3)
        self.resizeDocks([d["step"], d["poles"], d["noise"]], [third, third, third], Qt.Orientation.Horizontal)
        self.resizeDocks([d["chain"], d["parts"]], [int(height * 0.5), int(height * 0.4)], Qt.Orientation.Vertical)
        self.resizeDocks([d["response"], d["step"]], [int(height * 0.56), int(height * 0.34)], Qt.Orientation.Vertical)
        self.resizeDocks([d["review"], d["formula"]], [int(height * 0.58), int(height * 0.32)], Qt.Orientation.Vertical)

    def showEvent(self, event: Any) -> None:  # noqa: N802 - Qt's name
        super().showEvent(event)
        # Should no paint event reach the window (some platforms), start computing anyway.
        QTimer.singleShot(1500, self._first_request)
        if not self._layout_restored and not self._sized:
            self._sized = True
            # After the first layout pass, when the docks know the window's real size.
            QTimer.singleShot(0, self._default_sizes)

    def _restore_layout(self) -> None:
        settings = app_settings()
        geometry = settings.value("window/geometry")
        state = settings.value("window/state")
        self._sized = False
        self._layout_restored = False
        if isinstance(geometry, QByteArray | bytes) and self.interactive:
            self.restoreGeometry(QByteArray(geometry))
        if isinstance(state, QByteArray | bytes) and self.interactive:
            self._layout_restored = bool(self.restoreState(QByteArray(state), LAYOUT_VERSION))

    def save_layout(self) -> None:
        settings = app_settings()
        settings.setValue("window/geometry", self.saveGeometry())
        settings.setValue("window/state", self.saveState(LAYOUT_VERSION))
        settings.sync()

    def reset_layout(self) -> None:
        self._arrange_default()
        self._default_sizes()

    def _wire(self) -> None:
        document = self.document
        document.modifiedChanged.connect(self._modified_changed)
        document.pathChanged.connect(self._update_title)
        document.modelEdited.connect(self._edited)
        document.auditRecorded.connect(self._edited)
        # A decision changes check states (answers, waivers): evaluate again, and autosave.
        document.reviewChanged.connect(lambda _stage_id: (self.worker.request(), self._edited()))
        document.currentStageChanged.connect(self._stage_selected)
        document.chainChanged.connect(self._update_actions)
        document.stageChanged.connect(lambda _stage_id: self._update_actions())
        for source in (self.tree, self.parts_table, self.review_panel):
            source.message.connect(self.show_message)
        self.review_panel.signRequested.connect(self.sign_dialog)
        self.review_panel.waiveRequested.connect(self.waive_dialog)
        self.review_panel.answerRequested.connect(self.answer_dialog)
        self.review_panel.commentRequested.connect(self.comment_dialog)
        self.worker.busyChanged.connect(self._busy_changed)

    # ----------------------------------------------------------------- state display
    def _update_title(self) -> None:
        read_only = " (read-only)" if self.document.read_only else ""
        self.setWindowTitle(f"{self.document.display_name()}[*]{read_only} — Stagewise")
        self.setWindowModified(self.document.is_modified)

    def _modified_changed(self, modified: bool) -> None:
        self.setWindowModified(modified)
        if modified:
            # The first edit after opening or saving is covered at once: on the next turn of the
            # event loop, so that the edit itself returns without waiting for the disk.
            QTimer.singleShot(0, self.write_recovery)
        else:
            self._edit_autosave.stop()

    def _edited(self) -> None:
        if self.document.is_modified:
            self._edit_autosave.start()

    def _busy_changed(self, busy: bool) -> None:
        if busy:
            self.statusBar().showMessage("Recomputing…")
        else:
            latest = self.worker.latest
            took = f" in {latest.elapsed_s * 1000:.0f} ms" if latest is not None else ""
            self.statusBar().showMessage(f"Analysis up to date{took}.", 4000)

    def _stage_selected(self, stage_id: str) -> None:
        # The plots follow the selection unless the user chose other traces for the stage.
        previous = self._previous_stage
        if previous and self.overlays.stage_shown(previous, ISOLATED) and self.overlays.stage_shown(previous, IN_CHAIN):
            self.overlays.show_only_stage(stage_id)
        elif not previous:
            self.overlays.show_only_stage(stage_id)
        self._previous_stage = stage_id
        self._update_actions()

    def _update_actions(self, *_: object) -> None:
        stage = self.document.current_stage
        editable = not self.document.read_only
        names = self.actions_by_name
        has_stage = stage is not None
        for name in ("duplicateStage", "renameStage", "removeStage", "bypassStage", "signStage", "commentStage",
                     "waiveCheck", "answerCheck", "editChecks"):
            names[name].setEnabled(has_stage and editable)
        names["editBlockStage"].setEnabled(has_stage and editable and stage.is_block)  # type: ignore[union-attr]
        names["chooseOpamp"].setEnabled(has_stage and editable and not stage.is_block)  # type: ignore[union-attr]
        for name in ("projectSettings", "converterSettings", "newBlockStage"):
            names[name].setEnabled(editable)
        names["addPart"].setEnabled(has_stage and editable and not stage.is_block)  # type: ignore[union-attr]
        names["removePart"].setEnabled(has_stage and editable and not stage.is_block)  # type: ignore[union-attr]
        for name in ("newStage", "stageFromTemplate", "importCards", "attachMeasurement", "exportPacket",
                     "printPacket"):
            names[name].setEnabled(editable)
        index = self.document.project.stages.index(stage) if stage is not None else -1
        names["moveStageUp"].setEnabled(editable and index > 0)
        names["moveStageDown"].setEnabled(editable and 0 <= index < len(self.document.project.stages) - 1)
        bypass = names["bypassStage"]
        bypass.blockSignals(True)
        bypass.setChecked(bool(stage is not None and stage.bypass))
        bypass.blockSignals(False)
        names["clearBaseline"].setEnabled(self.document.baseline is not None)

    def show_message(self, text: str) -> None:
        self.statusBar().showMessage(text, 8000)

    def _refuse(self, error: Exception) -> None:
        self.show_message(f"Not changed: {error}")
        if self.interactive:
            QMessageBox.information(self, "Stagewise", str(error))

    # ----------------------------------------------------------------- edits
    def _current_stage_id(self) -> str:
        return self.document.current_stage_id

    def add_part_dialog(self) -> None:
        from stagewise.ui.dialogs import NewPartDialog

        stage_id = self._current_stage_id()
        if not stage_id:
            return
        library = self._opamp_library()
        models = [*sorted(self.document.project.opamp_models),
                  *sorted(name for name in library if name not in self.document.project.opamp_models)]
        dialog = NewPartDialog(lambda part_type: self.document.unique_part_ref(stage_id, part_type), models, self)
        if dialog.exec() != NewPartDialog.DialogCode.Accepted:
            return
        self.add_part_from(dialog.values())

    def _opamp_library(self) -> dict[str, Any]:
        """The op-amp library's models (empty, with a message, when it cannot be read)."""
        from stagewise.files.templates import TemplateError, load_opamp_library

        try:
            return load_opamp_library()
        except TemplateError as error:
            self.show_message(f"The op-amp library cannot be read: {error}")
            return {}

    def add_part_from(self, values: dict[str, Any]) -> None:
        """Add a part from the new-part form's values; refusals are shown, nothing changes."""
        stage_id = self._current_stage_id()
        try:
            part_type = str(values["type"])
            value = None if part_type == "opamp" else Quantity.of(str(values["value"]))
            part = Part(ref=str(values["ref"]), type=part_type, nodes=list(values["nodes"]), value=value,
                        model=str(values["model"]) if part_type == "opamp" else None)
            # A model of the op-amp library is copied into the project with the part.
            library = self._opamp_library() if part.model and part.model not in self.document.project.opamp_models \
                else {}
            models = {part.model: library[part.model]} if part.model in library else None
            self.document.add_part(stage_id, part, models)
        except (EditRefused, ValueSyntaxError) as error:
            self._refuse(error)

    def remove_selected_part(self) -> None:
        ref = self.parts_table.selected_ref()
        if not ref:
            self.show_message("Select a part in the parts table first.")
            return
        try:
            self.document.remove_part(self._current_stage_id(), ref)
        except EditRefused as error:
            self._refuse(error)

    def new_blank_stage(self) -> None:
        try:
            self.document.add_stage(self.document.blank_stage())
        except EditRefused as error:
            self._refuse(error)

    def new_stage_from_template_dialog(self) -> None:
        from stagewise.files.templates import TemplateError, load_templates
        from stagewise.ui.dialogs import TemplateDialog

        try:
            templates = load_templates()
        except TemplateError as error:
            self._refuse(error)
            return
        dialog = TemplateDialog([(key, t.name, t.description) for key, t in sorted(templates.items())], self)
        if dialog.exec() != TemplateDialog.DialogCode.Accepted:
            return
        self.add_stage_from_template(dialog.template_id())

    def add_stage_from_template(self, template_id: str) -> None:
        """Append a stage built from a template (its op-amp models copied into the project)."""
        from stagewise.files.templates import TemplateError, instantiate_template, load_template

        try:
            template = load_template(template_id)
            scratch = copy.deepcopy(self.document.project)
            stage = instantiate_template(scratch, template)
            models = {name: model for name, model in scratch.opamp_models.items()
                      if name not in self.document.project.opamp_models}
            self.document.add_stage(stage, models=models)
        except (EditRefused, TemplateError) as error:
            self._refuse(error)

    # ----------------------------------------------------------------- authoring dialogs
    def _exec(self, dialog: Any) -> None:
        if dialog is not None:
            dialog.exec()

    def project_dialog(self) -> Any:
        """The project settings dialog; OK is one undoable edit."""
        from stagewise.ui.authoring import ProjectDialog

        return ProjectDialog(self.document.project,
                             lambda values: self.document.set_project_fields(values, "edit the project settings"),
                             self)

    def converter_dialog(self) -> Any:
        """The converter dialog; OK is one undoable edit."""
        from stagewise.ui.authoring import ConverterDialog

        return ConverterDialog(self.document.project.converter,
                               lambda values: self.document.set_project_fields(values, "edit the converter"), self)

    def block_stage_dialog(self) -> Any:
        """The editor of the selected block stage (None when the stage is a circuit)."""
        from stagewise.ui.authoring import BlockStageDialog

        stage = self.document.current_stage
        if stage is None or not stage.is_block:
            self.show_message("Select a behavioural block stage first.")
            return None
        return BlockStageDialog(stage, lambda values: self.document.set_block_stage(stage.id, values), self)

    def new_block_stage_dialog(self) -> Any:
        """A block editor for a new stage, added after the selected one when OK is pressed."""
        from stagewise.model.project import BLOCK_KIND, Stage
        from stagewise.model.values import Quantity
        from stagewise.ui.authoring import BlockStageDialog

        draft = Stage(id=self.document.unique_stage_id("block"), name="Block", kind=BLOCK_KIND,
                      gain=Quantity(1, 1.0), poles_hz=[Quantity("1M", 1e6)])
        current = self.document.current_stage
        index = self.document.project.stages.index(current) + 1 if current is not None else None

        def add(values: dict[str, object]) -> None:
            stage = copy.deepcopy(draft)
            for name, value in values.items():
                setattr(stage, name, value)
            stage.id = self.document.unique_stage_id(str(values.get("name") or "block"))
            self.document.add_stage(stage, index)

        return BlockStageDialog(draft, add, self)

    def check_editor_dialog(self) -> Any:
        """The check editor of the selected stage, with the check library."""
        from stagewise.review.templates import CheckTemplateError, check_templates
        from stagewise.ui.authoring import CheckEditorDialog

        stage = self.document.current_stage
        if stage is None:
            return None
        try:
            library = check_templates()
        except CheckTemplateError as error:
            self.show_message(f"The check library cannot be read: {error}")
            library = {}
        stage_id = stage.id
        return CheckEditorDialog(stage, library, lambda checks: self.document.set_checks(stage_id, checks), self)

    def opamp_dialog(self, ref: str = "") -> Any:
        """The op-amp model picker for ``ref`` (default: the selected part, else the stage's first op-amp)."""
        from stagewise.ui.authoring import OpampLibraryDialog

        stage = self.document.current_stage
        if stage is None or stage.is_block:
            return None
        opamps = [part for part in stage.parts if part.type == "opamp"]
        chosen = stage.part(ref or self.parts_table.selected_ref())
        part = chosen if chosen is not None and chosen.type == "opamp" else (opamps[0] if opamps else None)
        if part is None:
            self.show_message(f"{stage.name} has no op-amp.")
            return None
        library = self._opamp_library()
        stage_id, part_ref = stage.id, part.ref

        def use(choice: tuple[str, Any]) -> None:
            self.document.use_opamp_model(stage_id, part_ref, choice[0], choice[1])

        return OpampLibraryDialog(library, self.document.project.opamp_models, part.model or "ideal", use,
                                  part_ref, self)

    def duplicate_stage(self) -> None:
        try:
            self.document.duplicate_stage(self._current_stage_id())
        except EditRefused as error:
            self._refuse(error)

    def rename_stage_dialog(self) -> None:
        stage = self.document.current_stage
        if stage is None:
            return
        name, accepted = QInputDialog.getText(self, "Rename stage", "Name", text=stage.name)
        if accepted:
            try:
                self.document.rename_stage(stage.id, name)
            except EditRefused as error:
                self._refuse(error)

    def move_stage(self, step: int) -> None:
        stage = self.document.current_stage
        if stage is None:
            return
        index = self.document.project.stages.index(stage)
        try:
            self.document.move_stage(stage.id, index + step)
        except EditRefused as error:
            self._refuse(error)

    def toggle_bypass(self) -> None:
        stage = self.document.current_stage
        if stage is None:
            return
        try:
            self.document.set_bypass(stage.id, not stage.bypass)
        except EditRefused as error:
            self._refuse(error)
        self._update_actions()

    def remove_stage(self) -> None:
        stage = self.document.current_stage
        if stage is None:
            return
        try:
            self.document.remove_stage(stage.id)
        except EditRefused as error:
            self._refuse(error)

    # ----------------------------------------------------------------- review dialogs
    def _run_review(self, action: Any) -> bool:
        try:
            action()
        except EditRefused as error:
            self._refuse(error)
            return False
        return True

    def sign_dialog(self) -> None:
        from stagewise.ui.dialogs import SignoffDialog

        stage = self.document.current_stage
        if stage is None:
            return
        name, role = reviewer_identity()
        dialog = SignoffDialog(stage.name, name, role, self)
        if dialog.exec() != SignoffDialog.DialogCode.Accepted:
            return
        values = dialog.values()
        remember_reviewer(values["name"], values["role"])
        if self._run_review(lambda: self.review_panel.sign(**values)):
            self.show_message(f"Sign-off recorded for {stage.name}.")

    def waive_dialog(self, check_id: str) -> None:
        from stagewise.ui.dialogs import WaiverDialog

        stage = self.document.current_stage
        if stage is None or not stage.checks:
            self.show_message("This stage has no checks to waive.")
            return
        name, role = reviewer_identity()
        dialog = WaiverDialog(stage.checks, check_id or self._first_failing_check(stage.id), name, role, self)
        if dialog.exec() != WaiverDialog.DialogCode.Accepted:
            return
        values = dialog.values()
        remember_reviewer(values["by"], values["role"])
        self._run_review(lambda: self.review_panel.waive(**values))

    def _first_failing_check(self, stage_id: str) -> str:
        """The first check of the stage that does not pass (not met, no value, open), or ""."""
        from stagewise.review.words import CheckState

        latest = self.worker.latest
        review = latest.of_stage(stage_id, "review") if latest is not None else None
        if review is None or not review.ok:
            return ""
        failing = {str(CheckState.NOT_MET), str(CheckState.NO_VALUE), str(CheckState.OPEN)}
        return next((check_id for check_id, state in review.value.check_states.items() if state in failing), "")

    def answer_dialog(self, check_id: str) -> None:
        from stagewise.ui.dialogs import AnswerDialog

        stage = self.document.current_stage
        if stage is None or not any(check.is_manual for check in stage.checks):
            self.show_message("This stage has no manual checks.")
            return
        name, _role = reviewer_identity()
        dialog = AnswerDialog(stage.checks, check_id, name, self)
        if dialog.exec() != AnswerDialog.DialogCode.Accepted:
            return
        self._run_review(lambda: self.review_panel.answer(**dialog.values()))

    def comment_dialog(self, check_id: str) -> None:
        from stagewise.ui.dialogs import CommentDialog

        stage = self.document.current_stage
        if stage is None:
            return
        name, _role = reviewer_identity()
        dialog = CommentDialog(stage.checks, check_id, name, self)
        if dialog.exec() != CommentDialog.DialogCode.Accepted:
            return
        values = dialog.values()
        self._run_review(lambda: self.review_panel.comment(str(values["author"]), str(values["text"]),
                                                           values["check_id"]))

    def show_cautions(self) -> None:
        from stagewise.ui.dialogs import CAUTIONS

        QMessageBox.information(self, "Cautions", CAUTIONS)

    def attach_file(self, path: Path) -> None:
        """At start-up on ``path``: take the edit lock (read-only when held), offer recovery."""
        try:
            read_only, lock = self.take_lock(path)
        except EditRefused:
            read_only, lock = True, None
        self._lock = lock
        if read_only:
            self.document.replace_project(self.document.project, path, read_only=True)
        else:  # read-only: someone else holds the file, and the recovery copy is theirs
            self.offer_recovery(path)
        add_recent(path)
        self._fill_recent()
        self._update_title()
        self._update_actions()

    def show_about(self) -> None:
        from stagewise.ui.dialogs import AboutDialog

        AboutDialog(self).exec()

    # ----------------------------------------------------------------- packet
    def packet_source(self) -> Path | None:
        """The saved, unchanged project file a packet is printed from, or ``None`` (the user was told why).

        With unsaved changes the user is asked to save first: the packet names the fingerprint of
        the file, so it must show exactly what the file holds.
        """
        from stagewise.files.project_file import ProjectFileError, load_project
        from stagewise.ui.exchange_dialogs import SAVE_BEFORE_PACKET

        document = self.document
        if document.read_only:
            self._tell("The project is open read-only, so a printed packet could not be recorded in its audit "
                       "trail; save a copy under another name first.")
            return None
        if document.is_modified or document.path is None:
            answer = QMessageBox.StandardButton.Cancel
            if self.interactive:
                answer = QMessageBox.question(
                    self, "Save before printing", SAVE_BEFORE_PACKET,
                    QMessageBox.StandardButton.Save | QMessageBox.StandardButton.Cancel,
                    QMessageBox.StandardButton.Save)
            if answer != QMessageBox.StandardButton.Save or not self.save():
                self.show_message(f"No packet printed. {SAVE_BEFORE_PACKET}")
                return None
        path = document.path
        assert path is not None
        try:
            on_disk = load_project(path)
        except ProjectFileError as error:
            self._tell(f"No packet printed: {error}")
            return None
        if on_disk != document.project:
            self._tell(f"No packet printed: {path.name} on disk is not the project shown (another program "
                       "changed it); save the project or open the file again.")
            return None
        return path

    def packet_author(self) -> str | None:
        """Who prints the packet (asked once per session, starting from the reviewer name last used)."""
        if self._packet_author is None:
            name, role = reviewer_identity()
            if self.interactive:
                text, accepted = QInputDialog.getText(
                    self, "Who prints the packet", "Your name, recorded in the audit trail with the packet:",
                    text=name)
                if not accepted or not text.strip():
                    return None
                name = text.strip()
                remember_reviewer(name, role)
            self._packet_author = name or "unknown user"
        return self._packet_author

    def export_packet_dialog(self) -> None:
        source = self.packet_source()
        if source is None:
            return
        stem = source.name.removesuffix(".stagewise.json").removesuffix(".json")
        suggested = source.with_name(f"{stem}-rev{self.document.project.revision or 'x'}-packet.pdf")
        chosen, _filter = QFileDialog.getSaveFileName(self, "Export review packet", str(suggested),
                                                      "PDF documents (*.pdf)")
        if not chosen:
            return
        if not chosen.lower().endswith(".pdf"):
            chosen += ".pdf"
        self.export_packet(Path(chosen))

    def export_packet(self, output: Path) -> Any:
        """Write the packet to ``output`` and record it in the audit trail (saved with the next save).

        Returns the ``PacketResult``, or ``None`` when nothing was written (refused or cancelled).
        """
        from stagewise.report.packet import PacketCancelled, build_packet

        source = self.packet_source()
        who = self.packet_author() if source is not None else None
        if source is None or who is None:
            return None
        project = self.document.project
        progress = self._packet_progress("Export review packet")
        try:
            result = build_packet(project, source, output, progress, analysis=self.worker.analysis_of(project))
        except PacketCancelled:
            self.show_message("Export cancelled; no packet was written.")
            return None
        except (OSError, RuntimeError) as error:
            self._tell(f"The packet was not written: {error}")
            return None
        finally:
            progress.close()
        self._record_packet(result.sha256, result.file_sha256, who, f"Wrote {output.name} ({result.pages} pages)")
        return result

    def print_packet_dialog(self) -> Any:
        """Ask for a printer, then send it the packet (a print to a PDF file is recorded too)."""
        from PySide6.QtPrintSupport import QPrintDialog, QPrinter
        from PySide6.QtWidgets import QDialog

        source = self.packet_source()
        who = self.packet_author() if source is not None else None
        if source is None or who is None:
            return None
        printer = QPrinter(QPrinter.PrinterMode.HighResolution)
        dialog = QPrintDialog(printer, self)
        if dialog.exec() != QDialog.DialogCode.Accepted:
            return None
        return self.print_packet(printer, source, who)

    def print_packet(self, printer: Any, source: Path, who: str) -> Any:
        from stagewise.report.packet import PacketCancelled, print_packet

        project = self.document.project
        progress = self._packet_progress("Print packet")
        try:
            result = print_packet(project, source, printer, progress, analysis=self.worker.analysis_of(project))
        except PacketCancelled:
            self.show_message("Printing cancelled; the printer may have received some pages.")
            return None
        except (OSError, RuntimeError) as error:
            self._tell(f"The packet was not printed: {error}")
            return None
        finally:
            progress.close()
        # A packet printed into a PDF file has a fingerprint to record; paper has none.
        pdf = Path(result.path) if result.path else None
        if pdf is not None and pdf.is_file():
            import hashlib

            digest = hashlib.sha256(pdf.read_bytes()).hexdigest()
            self._record_packet(digest, result.file_sha256, who, f"Printed {result.pages} pages to {pdf.name}")
        else:
            self.show_message(f"Sent {result.pages} pages to the printer. A paper print has no fingerprint, "
                              "so it is not recorded in the audit trail.")
        return result

    def _packet_progress(self, title: str) -> Any:
        from stagewise.ui.exchange_dialogs import PacketProgress

        return PacketProgress(title, self)

    def _record_packet(self, packet_sha256: str | None, file_sha256: str, who: str, done: str) -> None:
        from stagewise.review.actions import ReviewError, record_packet

        if packet_sha256 is None:
            return
        saved_before = not self.document.is_modified and self.document.path is not None
        try:
            self.document.record_event(
                lambda project: record_packet(project, packet_sha256, who, file_sha256=file_sha256))
        except (ReviewError, EditRefused) as error:
            self._tell(f"{done}, but it could not be recorded in the audit trail: {error}")
            return
        # The project was saved for the packet; write the record at once, as the command line
        # does, so that closing without saving cannot lose it.
        if saved_before and self.document.path is not None and self.save_to(self.document.path):
            self.show_message(f"{done}, SHA-256 {packet_sha256[:12]}…; recorded in the audit trail and saved.")
            return
        self.show_message(f"{done}, SHA-256 {packet_sha256[:12]}…; recorded in the audit trail, "
                          "which is written with the next save.")

    def _tell(self, sentence: str) -> None:
        self.show_message(sentence)
        if self.interactive:
            QMessageBox.information(self, "Stagewise", sentence)

    # ----------------------------------------------------------------- element cards
    def import_cards_dialog(self) -> None:
        dialog = self.card_import_dialog()
        if dialog.exec() == dialog.DialogCode.Accepted:
            self.add_imported_stage(dialog)

    def card_import_dialog(self) -> Any:
        """The import dialog, building stages against the project as it is when Import is pressed."""
        from stagewise.files.cards import stage_from_cards
        from stagewise.ui.exchange_dialogs import CardImportDialog

        def build(text: str, name: str, in_node: str, out_node: str, notes: list[str]) -> Stage:
            return stage_from_cards(text, name, in_node, out_node, self.document.project, notes=notes)

        return CardImportDialog(build, self, [(stage.id, stage.name) for stage in self.document.project.stages])

    def add_imported_stage(self, dialog: Any) -> bool:
        """Append the stage an accepted import dialog built (undoable); its import is recorded at save."""
        stage = dialog.stage
        if stage is None:
            return False
        try:
            self.document.add_stage(stage, dialog.place.currentData())
        except EditRefused as error:
            self._refuse(error)
            return False
        added = self.document.current_stage
        assert added is not None
        detail = {"stage": added.id, "name": added.name, "parts": len(added.parts), **dialog.source()}
        self._pending_imports.append(_ImportedStage(copy.deepcopy(added), detail))
        notes = "".join(f" Note: {note}." for note in dialog.notes)
        self.show_message(f"Imported stage {added.name} ({len(added.parts)} parts); Undo removes it.{notes}")
        return True

    def _record_imports(self, project: Project, who: str) -> Project:
        """Append an "import" event for each imported stage this save writes for the first time.

        Returns the last saved state with those stages in it as imported, so that the
        part-change record of this save lists only what changed after the import (the stage's
        arrival is the import event, not a second "stage added").
        """
        from stagewise.review.audit import append_event

        before = self._saved_snapshot
        arrived = [entry for entry in self._pending_imports
                   if project.stage(entry.stage.id) is not None and before.stage(entry.stage.id) is None]
        if not arrived:
            return before
        before = copy.deepcopy(before)
        order = [stage.id for stage in project.stages]
        for entry in arrived:
            try:
                append_event(project, who, "import", dict(entry.detail))
            except ValueError as error:
                self.show_message(f"The import of {entry.stage.name} was not recorded: {error}")
                continue
            self._pending_imports.remove(entry)
            # Keep the saved order of the other stages, so nothing reads as moved.
            earlier = set(order[:order.index(entry.stage.id)])
            position = max((index + 1 for index, stage in enumerate(before.stages) if stage.id in earlier), default=0)
            before.stages.insert(position, copy.deepcopy(entry.stage))
        return before

    # ----------------------------------------------------------------- bench measurements
    def attach_measurement_dialog(self) -> None:
        folder = str(Path(self.document.path).parent) if self.document.path else ""
        path, _filter = QFileDialog.getOpenFileName(self, "Bench measurement", folder,
                                                    "Measurements (*.s2p *.csv *.txt);;All files (*)")
        if not path:
            return
        project = self.document.project
        places: list[tuple[str, str, str | None]] = [("Whole chain (drive to last output)", "chain", None)]
        for stage in project.stages:
            places.append((f"{stage.name} — alone", "isolated", stage.id))
            if not stage.bypass:
                places.append((f"{stage.name} — in chain", "in_chain", stage.id))
        current = next((index for index, (_, where, stage_id) in enumerate(places)
                        if stage_id == self.document.current_stage_id and where == "isolated"), 0)
        from PySide6.QtWidgets import QDialog

        from stagewise.ui.measurement_dialog import MeasurementDialog

        dialog = MeasurementDialog(Path(path).name, places, current, self)
        if dialog.exec() != QDialog.DialogCode.Accepted:
            return
        chosen = dialog.values()
        self.attach_measurement_file(path, str(chosen["where"]), chosen["stage_id"], str(chosen["instrument"]),
                                     setup=str(chosen["setup"]), note=str(chosen["note"]))

    def attach_measurement_file(self, path: str | Path, where: str, stage_id: str | None,
                                instrument: str = "", *, setup: str = "", note: str = "") -> bool:
        """Read a measurement file and attach it (recorded in the audit trail, saved with the next save)."""
        from stagewise.files.measurements import MeasurementError, read_measurement
        from stagewise.review.measurements import attach_measurement

        project = self.document.project
        stage = project.stage(stage_id) if stage_id else None
        try:
            data = read_measurement(path, drive=stage.drive if stage is not None else project.input.drive)
        except MeasurementError as error:
            self._refuse(error)
            return False
        name, _role = reviewer_identity()
        try:
            measurement = self.document.record_event(lambda target: attach_measurement(
                target, data, where, stage_id, name or "unknown user", instrument=instrument, setup=setup,
                note=note))
        except (ValueError, EditRefused) as error:
            self._refuse(error)
            return False
        self.tree.rebuild()
        self.worker.request()
        self.show_message(f"Attached bench measurement {measurement.id} ({data.points} points); it is recorded "
                          "in the audit trail and written with the next save.")
        return True

    # ----------------------------------------------------------------- files
    def _fill_recent(self) -> None:
        self.recent_menu.clear()
        files = recent_files()
        for path in files:
            action = self.recent_menu.addAction(Path(path).name)
            action.setToolTip(path)
            action.setStatusTip(path)
            action.triggered.connect(lambda _checked=False, chosen=path: self.open_path(chosen))
        self.recent_menu.setEnabled(bool(files))

    def confirm_discard(self) -> bool:
        """True when there are no unsaved changes, or the user saved or chose to discard them."""
        if not self.document.is_modified or not self.interactive:
            return True
        answer = QMessageBox.question(
            self, "Unsaved changes",
            f"{self.document.display_name()} has unsaved changes. Save them first?",
            QMessageBox.StandardButton.Save | QMessageBox.StandardButton.Discard | QMessageBox.StandardButton.Cancel,
            QMessageBox.StandardButton.Save)
        if answer == QMessageBox.StandardButton.Save:
            return self.save()
        self._discard_chosen = answer == QMessageBox.StandardButton.Discard
        return self._discard_chosen

    def new_project(self) -> None:
        if not self.confirm_discard():
            return
        self._leave_current_file()
        project = empty_project()
        self._saved_snapshot = copy.deepcopy(project)
        self.document.replace_project(project, None)
        self._after_switch()

    def open_dialog(self) -> None:
        folder = str(self.document.path.parent) if self.document.path is not None else str(Path.cwd())
        path, _filter = QFileDialog.getOpenFileName(self, "Open project", folder, FILE_FILTER)
        if path:
            self.open_path(path)

    def open_path(self, path: str | Path) -> bool:
        """Open a project file (asking about unsaved changes, a recovery copy and a held lock)."""
        from stagewise.files.project_file import ProjectFileError, load_project

        if not self.confirm_discard():
            return False
        path = Path(path)
        try:
            project = load_project(path)
        except ProjectFileError as error:
            self._refuse(error)
            return False
        try:
            read_only, lock = self.take_lock(path)
        except EditRefused as error:
            self.show_message(str(error))
            return False
        if lock is not None and lock is self._lock:
            self._lock = None  # opening the file this window holds again: keep its lock
        self._leave_current_file()
        self._lock = lock
        self._saved_snapshot = copy.deepcopy(project)
        self.document.replace_project(project, path, read_only=read_only)
        self.document.set_baseline(None)
        add_recent(path)
        self._fill_recent()
        if not read_only:  # read-only: someone else holds the file, and the recovery copy is theirs
            self.offer_recovery(path)
        self._after_switch()
        return True

    def _after_switch(self) -> None:
        self._pending_imports.clear()
        self.overlays.show_only_stage(self.document.current_stage_id)
        self._previous_stage = self.document.current_stage_id
        self._update_title()
        self._update_actions()

    def take_lock(self, path: Path) -> tuple[bool, Any]:
        """Lock ``path`` for editing; when someone else holds it, offer read-only (returns it)."""
        from stagewise.files.lock import LockError, acquire_lock

        try:
            return False, acquire_lock(path)
        except LockError as error:
            holder = error.state.describe() if error.state is not None else str(error)
            if error.state is not None and error.state.mine:
                held = self._lock is not None and self._lock.path == error.state.path
                return False, self._lock if held else None
            if not self.interactive:
                return True, None
            box = QMessageBox(QMessageBox.Icon.Warning, "Project in use",
                              f"{path.name} is open for editing by {holder}.\n\n"
                              "Open it read-only? You can save a copy under another name.",
                              QMessageBox.StandardButton.Open | QMessageBox.StandardButton.Cancel, self)
            box.button(QMessageBox.StandardButton.Open).setText("Open read-only")
            if box.exec() == QMessageBox.StandardButton.Open:
                return True, None
            raise EditRefused(f"{path.name} was not opened: it is in use by {holder}") from error
        except OSError as error:
            self.show_message(f"{path.name}: no edit lock ({error.strerror}); opened read-only.")
            return True, None

    def _release_lock(self) -> None:
        if self._lock is not None:
            with contextlib.suppress(OSError, ValueError):
                self._lock.release()
            self._lock = None

    def _leave_current_file(self) -> None:
        """Forget the current file: the recovery copy this window wrote (its changes were saved or
        discarded; a copy written by someone else, or left by a crash, stays) and the lock."""
        if self._recovery_written:
            self.remove_recovery()
        self._release_lock()

    def save(self) -> bool:
        if self.document.path is None or self.document.read_only:
            return self.save_as()
        return self.save_to(self.document.path)

    def save_as(self) -> bool:
        start = str(self.document.path) if self.document.path is not None else str(
            Path.cwd() / self.document.display_name())
        path, _filter = QFileDialog.getSaveFileName(self, "Save project as", start, FILE_FILTER)
        if not path:
            return False
        if not path.endswith(".stagewise.json"):
            path += ".stagewise.json"
        return self.save_to(Path(path))

    def save_to(self, path: Path) -> bool:
        """Write the project atomically; record behaviour changes since the last save in the audit trail."""
        from stagewise.review.actions import ReviewError, record_part_changes

        project = self.document.project
        name, _role = reviewer_identity()
        try:
            before = self._record_imports(project, name or "unknown user")
            record_part_changes(before, project, name or "unknown user")
        except ReviewError as error:
            self.show_message(f"Saved without a change record: {error}")
        try:
            # Merges what was written to the file since it was read (a packet printed from the
            # command line), or asks; never overwrites it (Document.save_merging).
            outcome = self.document.save_merging(path, name or "unknown user", self._ask_outside_conflicts)
        except OSError as error:
            self._refuse(EditRefused(f"{path}: not saved ({error.strerror or error}); the old file is unchanged"))
            return False
        except ValueError as error:  # SaveRefused: what would be written does not load again
            self._refuse(EditRefused(str(error)))
            return False
        if not outcome.saved:
            self.show_message(f"Not saved: {path.name} changed on disk and conflicts with your edits.")
            return False
        project = self.document.project
        old_path = self.document.path
        if old_path != path:  # a new name, or the first save of a new project: lock the file written
            self.remove_recovery()
            self._release_lock()
            with contextlib.suppress(Exception):
                from stagewise.files.lock import acquire_lock

                self._lock = acquire_lock(path)
        self._saved_snapshot = copy.deepcopy(project)
        self.document.mark_saved(path)
        self.remove_recovery()
        add_recent(path)
        self._fill_recent()
        self._update_title()
        self._update_actions()
        merged = (f" {outcome.merged_events} audit event(s) written to the file meanwhile were merged in."
                  if outcome.merged_events else "")
        kept = (f" {len(outcome.conflicts)} value(s) changed on both sides keep your version; the file's own "
                f"version is kept whole as {outcome.outside_copy.name}." if outcome.outside_copy else "")
        self.show_message(f"Saved {path}.{merged}{kept}")
        return True

    def _ask_outside_conflicts(self, conflicts: list[str]) -> bool:
        """The file changed on disk and conflicts with our edits: save ours and keep theirs beside it?"""
        if not self.interactive:
            return True
        shown = "\n".join(f"• {line}" for line in conflicts[:8]) + ("\n…" if len(conflicts) > 8 else "")
        answer = QMessageBox.question(
            self, "File changed on disk",
            f"The file was changed outside the program since you opened it, and it conflicts with your "
            f"edits:\n\n{shown}\n\nSave your version? The file's version is kept beside it as a copy.",
            QMessageBox.StandardButton.Save | QMessageBox.StandardButton.Cancel)
        return answer == QMessageBox.StandardButton.Save

    def load_baseline_dialog(self) -> None:
        folder = str(self.document.path.parent) if self.document.path is not None else str(Path.cwd())
        path, _filter = QFileDialog.getOpenFileName(self, "Baseline revision", folder, FILE_FILTER)
        if path:
            self.load_baseline(path)

    def load_baseline(self, path: str | Path) -> bool:
        """Overlay the whole chain of another revision's file."""
        from stagewise.files.project_file import ProjectFileError, load_project

        try:
            baseline = load_project(path)
        except ProjectFileError as error:
            self._refuse(error)
            return False
        self.document.set_baseline(baseline, path)
        self.overlays.set_baseline(True)
        self._update_actions()
        return True

    def clear_baseline(self) -> None:
        self.document.set_baseline(None)
        self._update_actions()

    # ----------------------------------------------------------------- recovery
    def _periodic(self) -> None:
        """Every minute: the recovery copy, and the lock's time (so a long session never looks stale)."""
        self.write_recovery()
        if self._lock is not None:
            from stagewise.files.lock import LockError

            try:
                self._lock.refresh()
            except (LockError, OSError) as error:
                self._lock = None
                self.show_message(f"The edit lock was lost: {error}")

    def recovery_file(self) -> Path:
        return recovery_path(self.document.path)

    def write_recovery(self) -> Path | None:
        """Write the unsaved state to the recovery file (atomically); nothing when saved."""
        from stagewise.files.codec import dumps

        if not self.document.is_modified:
            return None
        target = self.recovery_file()
        try:
            from stagewise.files.atomic import remove_leftover_temporaries

            remove_leftover_temporaries(target)  # what a killed autosave left behind
            handle, temporary = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent)
            with os.fdopen(handle, "w", encoding="utf-8", newline="\n") as stream:
                stream.write(dumps(self.document.project))
            os.replace(temporary, target)
            self._recovery_written = True
        except OSError as error:
            self.show_message(f"Autosave failed: {error.strerror or error}.")
            return None
        except ValueError as error:  # a number that is not finite: never written
            self.show_message(f"Autosave failed: {error}.")
            return None
        return target

    def remove_recovery(self) -> None:
        """Delete the recovery copy: its changes were saved or deliberately discarded."""
        with contextlib.suppress(OSError):
            self.recovery_file().unlink()
        self._recovery_written = False

    def offer_recovery(self, path: Path) -> bool:
        """If a recovery copy newer than ``path`` exists, offer to restore it (True when restored)."""
        from stagewise.files.project_file import ProjectFileError, loads_project

        recovery = recovery_path(path)
        if not recovery.is_file() or not self.interactive:
            return False
        try:
            newer = recovery.stat().st_mtime >= path.stat().st_mtime
            text = recovery.read_text(encoding="utf-8")
        except OSError:
            return False
        if not newer:
            return False
        answer = QMessageBox.question(
            self, "Recover unsaved changes",
            f"A recovery copy of {path.name} from an earlier session holds changes that were never saved.\n\n"
            "Restore those changes? (Discard deletes the recovery copy.)",
            QMessageBox.StandardButton.Yes | QMessageBox.StandardButton.Discard | QMessageBox.StandardButton.Cancel,
            QMessageBox.StandardButton.Yes)
        if answer == QMessageBox.StandardButton.Discard:
            with contextlib.suppress(OSError):
                recovery.unlink()
            return False
        if answer != QMessageBox.StandardButton.Yes:
            return False
        try:
            project = loads_project(text, str(recovery))
        except ProjectFileError as error:
            self._refuse(EditRefused(f"the recovery copy cannot be read: {error}"))
            return False
        self.document.replace_project(project, path, read_only=self.document.read_only, modified=True)
        self.show_message("Recovered the unsaved changes; save to keep them.")
        return True

    # ----------------------------------------------------------------- closing
    def closeEvent(self, event: QCloseEvent) -> None:  # noqa: N802 - Qt's name
        if not self.confirm_discard():
            event.ignore()
            return
        self.save_layout()
        self.shutdown()
        event.accept()

    def shutdown(self) -> None:
        """Stop timers and the worker, disconnect the views, drop the recovery copy and the lock."""
        self._autosave_timer.stop()
        self._edit_autosave.stop()
        self.worker.close()
        for view in [*self.plot_views(), self.tree, self.parts_table, self.formula_view, self.review_panel]:
            view.disconnect_all()
        # Keep a recovery copy only while it holds changes nobody saved or discarded; never delete
        # one this window did not write (a copy from a crash stays for the next start).
        if self._discard_chosen or (self._recovery_written and not self.document.is_modified):
            self.remove_recovery()
        self._release_lock()

    def wait_until_idle(self, timeout_s: float = 60.0, formula: bool = True) -> bool:
        """Process events until the worker (and the formula thread) finished (screenshots, tests)."""
        import time

        deadline = time.monotonic() + timeout_s
        app = QApplication.instance()
        while time.monotonic() < deadline:
            app.processEvents()  # type: ignore[union-attr]
            busy = self.worker.is_busy or self.worker.spread_busy or (formula and self.worker.formula_busy())
            if not busy and self.worker.latest is not None and self.worker.latest.phase == 3:
                app.processEvents()  # type: ignore[union-attr]
                return True
            time.sleep(0.01)
        return False

