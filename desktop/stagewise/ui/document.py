"""The open project as a Qt object: the model, its undo stack, its file and its state.

Widgets never change the model themselves. They call the edit methods here, each of which
validates first (a refused edit raises :class:`EditRefused` and changes nothing) and then pushes
an undoable command. Every change emits exactly one signal naming what changed, and only when
something really changed, so widgets can refresh just their part.

Review decisions (sign-offs, waivers, answers, comments) go through ``stagewise.review`` and are
*not* undoable: they append to the audit trail, which is append-only by design.
"""

from __future__ import annotations

import copy
import re
from collections.abc import Callable
from pathlib import Path

from PySide6.QtCore import QObject, Signal
from PySide6.QtGui import QUndoCommand, QUndoStack

from stagewise.model.project import (
    PART_TYPES,
    VALUED_TYPES,
    OpampModel,
    Part,
    Project,
    Stage,
)
from stagewise.model.validate import validate_stage
from stagewise.model.values import Quantity, ValueSyntaxError

__all__ = ["BLOCK_FIELDS", "PART_FIELDS", "Document", "EditRefused", "blank_stage"]

# Fields of a part that can be edited as text, with what they hold.
PART_FIELDS: dict[str, str] = {"value": "value", "tol": "tolerance", "nodes": "nodes", "model": "op-amp model"}
# Scalar fields of a block stage editable in place (attribute -> label).
BLOCK_FIELDS: dict[str, str] = {"gain": "gain", "zin_r_ohm": "input resistance",
                                "zin_c_f": "input capacitance", "zout_ohm": "output resistance"}
_ID_PATTERN = re.compile(r"[^a-z0-9_-]+")


class EditRefused(ValueError):
    """An edit that was not applied; the message says why in one sentence."""


class _Command(QUndoCommand):
    """An undoable edit made of two callables that each emit their own change signal."""

    def __init__(self, text: str, forward: Callable[[], None], backward: Callable[[], None]) -> None:
        super().__init__(text)
        self._forward = forward
        self._backward = backward

    def redo(self) -> None:
        self._forward()

    def undo(self) -> None:
        self._backward()


class Document(QObject):
    """The open project, its undo stack, its path and whether it has unsaved changes.

    Signals
    -------
    projectReplaced : a different project was loaded (new, open, recover); refresh everything.
    chainChanged : stages were added, removed, moved, renamed or bypassed.
    stageChanged(str) : the parts or values of one stage changed (its id).
    reviewChanged(str) : review records of one stage changed (its id).
    currentStageChanged(str) : the selected stage ("" for none).
    modelEdited : anything that changes the analysis (the worker listens).
    pathChanged, modifiedChanged(bool), baselineChanged.
    auditRecorded : a project-wide audit event was appended (it is saved with the project).
    """

    projectReplaced = Signal()
    chainChanged = Signal()
    stageChanged = Signal(str)
    reviewChanged = Signal(str)
    currentStageChanged = Signal(str)
    modelEdited = Signal()
    pathChanged = Signal()
    modifiedChanged = Signal(bool)
    baselineChanged = Signal()
    auditRecorded = Signal()

    def __init__(self, project: Project, path: str | Path | None = None, parent: QObject | None = None) -> None:
        super().__init__(parent)
        self._project = project
        self._path: Path | None = Path(path) if path is not None else None
        self._read_only = False
        self._review_unsaved = False
        self._current_stage_id = project.stages[0].id if project.stages else ""
        self._baseline: Project | None = None
        self._baseline_path: Path | None = None
        self._was_modified = False
        self.undo_stack = QUndoStack(self)
        self.undo_stack.cleanChanged.connect(self._announce_modified)
        self.undo_stack.indexChanged.connect(self._announce_modified)

    # ----------------------------------------------------------------- state
    @property
    def project(self) -> Project:
        return self._project

    @property
    def path(self) -> Path | None:
        return self._path

    @property
    def read_only(self) -> bool:
        return self._read_only

    @property
    def is_modified(self) -> bool:
        return self._review_unsaved or not self.undo_stack.isClean()

    @property
    def current_stage_id(self) -> str:
        return self._current_stage_id

    @property
    def current_stage(self) -> Stage | None:
        return self._project.stage(self._current_stage_id) if self._current_stage_id else None

    @property
    def baseline(self) -> Project | None:
        """A project loaded from another revision's file, drawn as a reference overlay."""
        return self._baseline

    @property
    def baseline_path(self) -> Path | None:
        return self._baseline_path

    def display_name(self) -> str:
        """The file name shown in the title (``untitled`` before the first save)."""
        return self._path.name if self._path is not None else "untitled.stagewise.json"

    def set_current_stage(self, stage_id: str) -> None:
        if stage_id != self._current_stage_id and (stage_id == "" or self._project.stage(stage_id) is not None):
            self._current_stage_id = stage_id
            self.currentStageChanged.emit(stage_id)

    def replace_project(self, project: Project, path: str | Path | None, *, read_only: bool = False,
                        modified: bool = False) -> None:
        """Show a different project (new, open, recover); the undo history starts afresh."""
        self._project = project
        self._path = Path(path) if path is not None else None
        self._read_only = read_only
        self.undo_stack.clear()
        self.undo_stack.setClean()
        self._review_unsaved = modified
        self._current_stage_id = project.stages[0].id if project.stages else ""
        self.projectReplaced.emit()
        self.pathChanged.emit()
        self.currentStageChanged.emit(self._current_stage_id)
        self.modelEdited.emit()
        self._announce_modified()

    def mark_saved(self, path: str | Path) -> None:
        """The project was written to ``path``: the current state is the clean one."""
        new_path = Path(path)
        changed_path = new_path != self._path
        self._path = new_path
        self._read_only = False
        self._review_unsaved = False
        self.undo_stack.setClean()
        if changed_path:
            self.pathChanged.emit()
        self._announce_modified()

    def set_baseline(self, project: Project | None, path: str | Path | None = None) -> None:
        self._baseline = project
        self._baseline_path = Path(path) if path is not None else None
        self.baselineChanged.emit()
        self.modelEdited.emit()

    def _announce_modified(self, *_: object) -> None:
        modified = self.is_modified
        if modified != self._was_modified:
            self._was_modified = modified
            self.modifiedChanged.emit(modified)

    # ----------------------------------------------------------------- helpers
    def _stage(self, stage_id: str) -> Stage:
        stage = self._project.stage(stage_id)
        if stage is None:
            raise EditRefused(f'there is no stage "{stage_id}"')
        return stage

    def _refuse_if_read_only(self) -> None:
        if self._read_only:
            raise EditRefused("the project is open read-only; save a copy under another name to edit it")

    def _stage_problems(self, candidate: Stage) -> list[str]:
        index = next((i for i, stage in enumerate(self._project.stages) if stage.id == candidate.id), 0)
        return validate_stage(candidate, self._project, f"stages[{index}]")

    def _push(self, text: str, forward: Callable[[], None], backward: Callable[[], None]) -> None:
        self.undo_stack.push(_Command(text, forward, backward))

    def _stage_edited(self, stage_id: str) -> None:
        self.stageChanged.emit(stage_id)
        self.modelEdited.emit()

    def _chain_edited(self) -> None:
        self.chainChanged.emit()
        self.modelEdited.emit()

    def unique_stage_id(self, base: str) -> str:
        """A stage id not yet used, derived from ``base`` (lower case, letters, digits, - and _)."""
        stem = _ID_PATTERN.sub("-", base.strip().lower()).strip("-") or "stage"
        taken = {stage.id for stage in self._project.stages}
        if stem not in taken:
            return stem
        number = 2
        while f"{stem}-{number}" in taken:
            number += 1
        return f"{stem}-{number}"

    def unique_part_ref(self, stage_id: str, part_type: str) -> str:
        """The next free reference for a part type in a stage (R4, C2, U2, E1, ...)."""
        letter = {"R": "R", "C": "C", "L": "L", "opamp": "U", "vcvs": "E", "vccs": "G", "ccvs": "H",
                  "cccs": "F"}.get(part_type, "X")
        taken = {part.ref for part in self._stage(stage_id).parts}
        number = 1
        while f"{letter}{number}" in taken:
            number += 1
        return f"{letter}{number}"

    # ----------------------------------------------------------------- part edits
    def set_part_field(self, stage_id: str, ref: str, field: str, text: str) -> None:
        """Set a part's value, tolerance, nodes or op-amp model from the text typed.

        Raises
        ------
        EditRefused
            When the text is not a value or the result would not be a valid stage; the part
            keeps its old value.
        """
        self._refuse_if_read_only()
        stage = self._stage(stage_id)
        part = stage.part(ref)
        if part is None:
            raise EditRefused(f'stage "{stage.name}" has no part {ref}')
        if field not in PART_FIELDS:
            raise EditRefused(f"{field} is not an editable field of a part")
        text = text.strip()
        new_value: object
        if field in ("value", "tol"):
            if field == "value" and part.type not in VALUED_TYPES:
                raise EditRefused(f"{ref} is an op-amp; it takes a model, not a value")
            if text == "" and field == "tol":
                new_value = None
            else:
                try:
                    new_value = Quantity.of(text)
                except ValueSyntaxError as error:
                    raise EditRefused(f"{ref} {PART_FIELDS[field]}: {error}") from error
                if field == "tol" and not 0 <= new_value.si < 1:  # type: ignore[attr-defined]
                    raise EditRefused(f'{ref} tolerance: "{text}" must be between 0 and 100 %')
        elif field == "nodes":
            new_value = text.replace(",", " ").split()
        else:
            new_value = text or None
        old_value = getattr(part, field)
        if _same(old_value, new_value):
            return
        candidate_part = copy.copy(part)
        setattr(candidate_part, field, new_value)
        candidate = copy.copy(stage)
        candidate.parts = [candidate_part if p is part else p for p in stage.parts]
        problems = self._stage_problems(candidate)
        if problems:
            raise EditRefused(_after_colon(problems[0]))

        def put(value: object) -> Callable[[], None]:
            def apply() -> None:
                target = self._stage(stage_id).part(ref)
                assert target is not None
                setattr(target, field, value)
                self._stage_edited(stage_id)
            return apply

        shown = text if text else "none"
        self._push(f"{ref} {PART_FIELDS[field]} = {shown}", put(new_value), put(old_value))

    def set_block_field(self, stage_id: str, field: str, text: str) -> None:
        """Set a scalar of a block stage (gain, input R or C, output resistance) from text."""
        self._refuse_if_read_only()
        stage = self._stage(stage_id)
        if not stage.is_block or field not in BLOCK_FIELDS:
            raise EditRefused(f"{field} is not an editable field of stage {stage.name}")
        text = text.strip()
        if text == "" and field != "gain":
            new_value: Quantity | None = None
        else:
            try:
                new_value = Quantity.of(text)
            except ValueSyntaxError as error:
                raise EditRefused(f"{BLOCK_FIELDS[field]}: {error}") from error
            if field != "gain" and new_value.si < 0:
                raise EditRefused(f'{BLOCK_FIELDS[field]}: "{text}" must not be negative')
        old_value = getattr(stage, field)
        if _same(old_value, new_value):
            return

        def put(value: Quantity | None) -> Callable[[], None]:
            def apply() -> None:
                setattr(self._stage(stage_id), field, value)
                self._stage_edited(stage_id)
            return apply

        self._push(f"{stage.name}: {BLOCK_FIELDS[field]} = {text or 'none'}", put(new_value), put(old_value))

    def add_part(self, stage_id: str, part: Part) -> None:
        """Append a part to a circuit stage (validated first)."""
        self._refuse_if_read_only()
        stage = self._stage(stage_id)
        if stage.is_block:
            raise EditRefused(f"{stage.name} is a behavioural block; it has no parts")
        if part.type not in PART_TYPES:
            raise EditRefused(f'"{part.type}" is not a part type')
        if stage.part(part.ref) is not None:
            raise EditRefused(f"{stage.name} already has a part {part.ref}")
        candidate = copy.copy(stage)
        candidate.parts = [*stage.parts, part]
        problems = self._stage_problems(candidate)
        if problems:
            raise EditRefused(_after_colon(problems[0]))
        index = len(stage.parts)
        self._push(f"add {part.ref} to {stage.name}", lambda: self._insert_part(stage_id, index, part),
                   lambda: self._take_part(stage_id, part.ref))

    def remove_part(self, stage_id: str, ref: str) -> None:
        """Remove a part. The stage may become unsolvable; the views then say why."""
        self._refuse_if_read_only()
        stage = self._stage(stage_id)
        part = stage.part(ref)
        if part is None:
            raise EditRefused(f"{stage.name} has no part {ref}")
        index = stage.parts.index(part)
        self._push(f"remove {ref} from {stage.name}", lambda: self._take_part(stage_id, ref),
                   lambda: self._insert_part(stage_id, index, part))

    def _insert_part(self, stage_id: str, index: int, part: Part) -> None:
        self._stage(stage_id).parts.insert(index, part)
        self._stage_edited(stage_id)

    def _take_part(self, stage_id: str, ref: str) -> None:
        stage = self._stage(stage_id)
        stage.parts = [part for part in stage.parts if part.ref != ref]
        self._stage_edited(stage_id)

    # ----------------------------------------------------------------- stage edits
    def add_stage(self, stage: Stage, index: int | None = None, models: dict[str, OpampModel] | None = None) -> None:
        """Insert a stage (at the end by default); its id is made unique if needed.

        ``models`` are op-amp models the stage needs that the project lacks (from a template);
        they are added with the stage and removed again when it is undone.
        """
        self._refuse_if_read_only()
        stage = copy.deepcopy(stage)
        stage.id = self.unique_stage_id(stage.id or stage.name)
        position = len(self._project.stages) if index is None else max(0, min(index, len(self._project.stages)))
        new_models = {name: model for name, model in (models or {}).items() if name not in self._project.opamp_models}

        def insert() -> None:
            self._project.opamp_models.update(new_models)
            self._project.stages.insert(position, stage)
            self._chain_edited()
            self.set_current_stage(stage.id)

        def take() -> None:
            for name in new_models:
                self._project.opamp_models.pop(name, None)
            self._project.stages.remove(stage)
            if self._current_stage_id == stage.id:
                self.set_current_stage(self._project.stages[0].id if self._project.stages else "")
            self._chain_edited()

        self._push(f"add stage {stage.name}", insert, take)

    def blank_stage(self, name: str = "New stage") -> Stage:
        """A new stage for this project (see :func:`blank_stage`), with an unused id."""
        stage = blank_stage(name)
        stage.id = self.unique_stage_id(name)
        return stage

    def duplicate_stage(self, stage_id: str) -> None:
        """Insert a copy after the stage: same parts and checks, no sign-offs, comments or answers."""
        source = self._stage(stage_id)
        twin = copy.deepcopy(source)
        twin.id = self.unique_stage_id(source.id)
        twin.name = f"{source.name} (copy)"
        twin.signoffs = []
        twin.comments = []
        for check in twin.checks:
            check.answer = None
            check.waiver = None
        self.add_stage(twin, self._project.stages.index(source) + 1)

    def remove_stage(self, stage_id: str) -> None:
        self._refuse_if_read_only()
        stage = self._stage(stage_id)
        index = self._project.stages.index(stage)

        def take() -> None:
            self._project.stages.remove(stage)
            if self._current_stage_id == stage.id:
                remaining = self._project.stages
                self.set_current_stage(remaining[min(index, len(remaining) - 1)].id if remaining else "")
            self._chain_edited()

        def insert() -> None:
            self._project.stages.insert(index, stage)
            self._chain_edited()

        self._push(f"remove stage {stage.name}", take, insert)

    def move_stage(self, stage_id: str, new_index: int) -> None:
        """Move a stage to ``new_index`` in the chain."""
        self._refuse_if_read_only()
        stage = self._stage(stage_id)
        old_index = self._project.stages.index(stage)
        new_index = max(0, min(new_index, len(self._project.stages) - 1))
        if new_index == old_index:
            return

        def place(index: int) -> Callable[[], None]:
            def apply() -> None:
                self._project.stages.remove(stage)
                self._project.stages.insert(index, stage)
                self._chain_edited()
            return apply

        self._push(f"move stage {stage.name}", place(new_index), place(old_index))

    def rename_stage(self, stage_id: str, name: str) -> None:
        self._refuse_if_read_only()
        stage = self._stage(stage_id)
        name = name.strip()
        if not name:
            raise EditRefused("a stage needs a name")
        old = stage.name
        if name == old:
            return

        def put(value: str) -> Callable[[], None]:
            def apply() -> None:
                self._stage(stage_id).name = value
                self.chainChanged.emit()
            return apply

        self._push(f"rename {old} to {name}", put(name), put(old))

    def set_bypass(self, stage_id: str, bypass: bool) -> None:
        """Leave a stage out of the chain (it stays in the file) or put it back."""
        self._refuse_if_read_only()
        stage = self._stage(stage_id)
        if stage.bypass == bypass:
            return

        def put(value: bool) -> Callable[[], None]:
            def apply() -> None:
                self._stage(stage_id).bypass = value
                self._chain_edited()
            return apply

        self._push(f"{'bypass' if bypass else 'restore'} {stage.name}", put(bypass), put(not bypass))

    # ----------------------------------------------------------------- review
    def record_review(self, stage_id: str, action: Callable[[Project], object]) -> object:
        """Run a review-layer action on the project (it appends its audit event) and announce it.

        Not undoable: review decisions are recorded in the append-only audit trail.
        """
        self._refuse_if_read_only()
        result = action(self._project)
        self._review_unsaved = True
        self.reviewChanged.emit(stage_id)
        self._announce_modified()
        return result

    def record_event(self, action: Callable[[Project], object]) -> object:
        """Run an action that appends a project-wide audit event (a printed packet) and announce it.

        Not undoable, like review decisions: the event waits in the project, which now has
        unsaved changes, and is written with the next save.
        """
        self._refuse_if_read_only()
        result = action(self._project)
        self._review_unsaved = True
        self.auditRecorded.emit()
        self._announce_modified()
        return result


def blank_stage(name: str = "New stage") -> Stage:
    """A new circuit stage that solves, saves and loads again from the start: an RC low-pass,
    1 kΩ in series and 10 nF to node 0 (a corner near 15.9 kHz).

    An empty stage would have no input or output node; the two parts give both and a path to
    the reference node, so every view has something true to show until the user replaces them.
    """
    stage_id = _ID_PATTERN.sub("-", name.strip().lower()).strip("-") or "stage"
    return Stage(id=stage_id, name=name,
                 parts=[Part(ref="R1", type="R", nodes=["in", "out"], value=Quantity.of("1k")),
                        Part(ref="C1", type="C", nodes=["out", "0"], value=Quantity.of("10n"))])


def _same(old: object, new: object) -> bool:
    if isinstance(old, Quantity) and isinstance(new, Quantity):
        return old.raw == new.raw and old.si == new.si
    return old == new


def _after_colon(problem: str) -> str:
    """A validation problem without its JSON path prefix (the user sees the stage already)."""
    head, separator, tail = problem.partition(": ")
    return tail if separator and head.startswith("stages[") else problem

