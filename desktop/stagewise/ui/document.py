"""The open project as a Qt object: the model, its undo stack, its file and its state.

Widgets never change the model themselves. They call the edit methods here, each of which
validates first (a refused edit raises :class:`EditRefused` and changes nothing) and then pushes
an undoable command. Every change emits exactly one signal naming what changed, and only when
something really changed, so widgets can refresh just their part.

Review decisions (sign-offs, waivers, answers, comments) go through ``stagewise.review`` and are
*not* undoable: they append to the audit trail, which is append-only by design.
"""

from __future__ import annotations

import contextlib
import copy
import hashlib
import re
from collections.abc import Callable
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path

from PySide6.QtCore import QObject, Signal
from PySide6.QtGui import QUndoCommand, QUndoStack

from stagewise.model.project import (
    PART_TYPES,
    VALUED_TYPES,
    Check,
    ManualAnswer,
    OpampModel,
    Part,
    Project,
    Stage,
    Waiver,
)
from stagewise.model.validate import validate, validate_stage
from stagewise.model.values import Quantity, ValueSyntaxError

__all__ = ["BLOCK_FIELDS", "BLOCK_STAGE_FIELDS", "PART_FIELDS", "PROJECT_FIELDS", "Document", "EditRefused",
           "SaveOutcome", "blank_stage"]

# Fields of a part that can be edited as text, with what they hold.
PART_FIELDS: dict[str, str] = {"value": "value", "tol": "tolerance", "nodes": "nodes", "model": "op-amp model"}
# Scalar fields of a block stage editable in place (attribute -> label).
BLOCK_FIELDS: dict[str, str] = {"gain": "gain", "zin_r_ohm": "input resistance",
                                "zin_c_f": "input capacitance", "zout_ohm": "output resistance"}
# Project-wide records the project and converter dialogs edit (attributes of Project).
PROJECT_FIELDS = ("title", "revision", "settings", "input", "converter", "load")
# Everything the block-stage editor sets (attributes of Stage).
BLOCK_STAGE_FIELDS = ("name", "gain", "zeros_hz", "poles_hz", "zin_r_ohm", "zin_c_f", "zout_ohm")
_ID_PATTERN = re.compile(r"[^a-z0-9_-]+")


class EditRefused(ValueError):
    """An edit that was not applied; the message says why in one sentence."""


@dataclass(frozen=True, slots=True)
class SaveOutcome:
    """What :meth:`Document.save_merging` did.

    ``saved`` is False when the user chose not to save over a conflict; ``merged_events`` counts
    the audit events written to the file outside the program that were merged in; ``conflicts``
    are the sentences shown; ``outside_copy`` is where the file's own version was kept.
    """

    saved: bool
    merged_events: int = 0
    conflicts: tuple[str, ...] = ()
    outside_copy: Path | None = None


def _sha256_of(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def _keep_outside_copy(path: Path) -> Path:
    """Copy the file as it is on disk to ``NAME.outside-<UTC time>.stagewise.json`` beside it."""
    stamp = datetime.now(UTC).strftime("%Y%m%dT%H%M%SZ")
    stem = path.name.removesuffix(".stagewise.json")
    copy_path = path.with_name(f"{stem}.outside-{stamp}.stagewise.json")
    number = 2
    while copy_path.exists():
        copy_path = path.with_name(f"{stem}.outside-{stamp}-{number}.stagewise.json")
        number += 1
    copy_path.write_bytes(path.read_bytes())
    return copy_path


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
        # The file as this document last read or wrote it: its SHA-256 and the project it held,
        # the common ancestor when the file changed on disk meanwhile (see save_merging).
        self._disk_sha256: str | None = None
        self._disk_project: Project | None = None
        self._remember_disk(modified=False)

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
        self._remember_disk(modified=modified)
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
        self._remember_disk(modified=False)
        if changed_path:
            self.pathChanged.emit()
        self._announce_modified()

    # ----------------------------------------------------------------- the file on disk
    def _remember_disk(self, *, modified: bool) -> None:
        """Note the file's SHA-256 and the project it holds (ours when unmodified, else read back)."""
        from stagewise.files.project_file import ProjectFileError, loads_project

        self._disk_sha256 = None
        self._disk_project = None
        if self._path is None:
            return
        try:
            data = self._path.read_bytes()
        except OSError:
            return
        self._disk_sha256 = hashlib.sha256(data).hexdigest()
        if not modified:
            self._disk_project = copy.deepcopy(self._project)
            return
        with contextlib.suppress(ProjectFileError):
            self._disk_project = loads_project(data, str(self._path))

    @property
    def disk_sha256(self) -> str | None:
        """SHA-256 of the file as this document last read or wrote it (``None``: no file yet)."""
        return self._disk_sha256

    def save_merging(self, path: str | Path, who: str,
                     ask: Callable[[list[str]], bool] | None = None) -> SaveOutcome:
        """Save to ``path`` without overwriting what was written to the file since it was read.

        When ``path`` is this document's file and its SHA-256 differs from the one remembered
        (a ``stagewise packet`` appended an event while the program held the file open, or
        someone wrote it regardless of the edit lock), the file is read and merged with this
        document three ways (:func:`stagewise.review.merge.merge_projects`, the file as last read
        being the ancestor): what was appended outside (audit events, review records, design
        edits of other parts) joins the document, our unsaved audit events are chained after
        the file's, and the result is saved. Where the two conflict (one value changed on both
        sides, or the file no longer loads), ``ask`` is called with the conflicts, one sentence
        each; when it returns True the file's version is kept beside it as
        ``NAME.outside-<UTC time>.stagewise.json`` and ours is saved, with each conflicting value
        ours and everything else the file gained merged in as above (when the merge verifies;
        else ours as it is); otherwise nothing is written. Without ``ask`` a conflict keeps both
        versions that way.

        Raises
        ------
        OSError, ValueError
            From :func:`stagewise.files.project_file.save_project` (nothing was replaced).
        """
        from stagewise.files.project_file import ProjectFileError, load_project, save_project
        from stagewise.review.merge import merge_projects

        target = Path(path)
        outcome = SaveOutcome(saved=True)
        changed = (target == self._path and self._disk_sha256 is not None and target.exists()
                   and _sha256_of(target) != self._disk_sha256)
        if changed:
            conflicts: list[str] = []
            theirs: Project | None = None
            try:
                theirs = load_project(target)
            except ProjectFileError as error:
                conflicts = [f"the file on disk no longer loads: {error}"]
            else:
                if self._disk_project is None:
                    conflicts = ["the file on disk changed, and the version this program read cannot be compared"]
                else:
                    result = merge_projects(self._disk_project, self._project, theirs, who=who, mode="rebase")
                    if result.project is not None:
                        self._adopt(result.project)
                        outcome = SaveOutcome(saved=True, merged_events=result.events_theirs)
                    else:
                        conflicts = [conflict.sentence() for conflict in result.conflicts]
            if conflicts:
                if ask is not None and not ask(conflicts):
                    return SaveOutcome(saved=False, conflicts=tuple(conflicts))
                kept = _keep_outside_copy(target)
                merged_events = 0
                if theirs is not None and self._disk_project is not None:
                    # Ours wins each conflicting value; what else was appended (a packet's event,
                    # another reviewer's records) still joins, so the saved file loses nothing.
                    settled = merge_projects(self._disk_project, self._project, theirs, who=who, mode="rebase",
                                             prefer_ours=True)
                    if settled.project is not None:
                        self._adopt(settled.project)
                        merged_events = settled.events_theirs
                outcome = SaveOutcome(saved=True, merged_events=merged_events, conflicts=tuple(conflicts),
                                      outside_copy=kept)
        save_project(target, self._project)
        return outcome

    def _adopt(self, merged: Project) -> None:
        """Take what a merge added. When only records and events differ, they are copied into the
        open project in place (the undo history stays valid); otherwise the project is replaced."""
        from stagewise.files.codec import encode

        def design(project: Project) -> dict[str, object]:
            document = encode(project)
            document.pop("audit", None)
            for stage in document.get("stages", []):
                stage.pop("signoffs", None)
                stage.pop("comments", None)
                for check in stage.get("checks", []):
                    check.pop("answer", None)
                    check.pop("waiver", None)
            return document

        if design(merged) == design(self._project):
            for stage in self._project.stages:
                source = merged.stage(stage.id)
                if source is None:
                    continue
                stage.signoffs = source.signoffs
                stage.comments = source.comments
                for check, other in zip(stage.checks, source.checks, strict=True):
                    check.answer, check.waiver = other.answer, other.waiver
                self.reviewChanged.emit(stage.id)
            self._project.audit = merged.audit
            self.auditRecorded.emit()
            return
        selected = self._current_stage_id
        self.replace_project(merged, self._path, modified=True)
        self.set_current_stage(selected)  # the user's selection stays where it was

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

    def add_part(self, stage_id: str, part: Part, models: dict[str, OpampModel] | None = None) -> None:
        """Append a part to a circuit stage (validated first).

        ``models`` are op-amp models the part needs that the project lacks (from the op-amp
        library); they are added with the part and removed again when it is undone.
        """
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
        new_models = {name: copy.deepcopy(model) for name, model in (models or {}).items()
                      if name not in self._project.opamp_models}
        candidate_project = copy.copy(self._project)
        candidate_project.opamp_models = {**self._project.opamp_models, **new_models}
        index = self._project.stages.index(stage)
        problems = validate_stage(candidate, candidate_project, f"stages[{index}]")
        if problems:
            raise EditRefused(_after_colon(problems[0]))
        position = len(stage.parts)

        def insert() -> None:
            self._project.opamp_models.update(copy.deepcopy(new_models))
            self._insert_part(stage_id, position, part)

        def take() -> None:
            self._take_part(stage_id, part.ref)
            for name in new_models:
                self._project.opamp_models.pop(name, None)

        self._push(f"add {part.ref} to {stage.name}", insert, take)

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

    # ----------------------------------------------------------------- project, block and check edits
    def set_project_fields(self, values: dict[str, object], text: str) -> None:
        """Replace project-wide records (title, revision, settings, input, converter, load) as one edit.

        Refused (nothing changes) when the result has a problem the project did not have before,
        such as a reference frequency outside the analysed range.
        """
        self._refuse_if_read_only()
        unknown = sorted(set(values) - set(PROJECT_FIELDS))
        if unknown:
            raise EditRefused(f"{', '.join(unknown)} cannot be set as a project field")
        old = {name: copy.deepcopy(getattr(self._project, name)) for name in values}
        if all(old[name] == values[name] for name in values):
            return
        candidate = copy.copy(self._project)
        for name, value in values.items():
            setattr(candidate, name, value)
        new_problems = [problem for problem in validate(candidate) if problem not in set(validate(self._project))]
        if new_problems:
            raise EditRefused(new_problems[0])
        new = copy.deepcopy(values)

        def put(chosen: dict[str, object]) -> Callable[[], None]:
            def apply() -> None:
                for name, value in chosen.items():
                    setattr(self._project, name, copy.deepcopy(value))
                self._chain_edited()
            return apply

        self._push(text, put(new), put(old))

    def set_block_stage(self, stage_id: str, values: dict[str, object]) -> None:
        """Set a block stage's name, gain, zeros, poles and impedances (see BLOCK_STAGE_FIELDS) as one edit."""
        self._refuse_if_read_only()
        stage = self._stage(stage_id)
        if not stage.is_block:
            raise EditRefused(f"{stage.name} is a circuit stage, not a behavioural block")
        unknown = sorted(set(values) - set(BLOCK_STAGE_FIELDS))
        if unknown:
            raise EditRefused(f"{', '.join(unknown)} cannot be set on a block stage")
        if "name" in values and not str(values["name"]).strip():
            raise EditRefused("the stage needs a name")
        old = {name: copy.deepcopy(getattr(stage, name)) for name in values}
        if all(old[name] == values[name] for name in values):
            return
        candidate = copy.copy(stage)
        for name, value in values.items():
            setattr(candidate, name, value)
        problems = self._stage_problems(candidate)
        if problems:
            raise EditRefused(_after_colon(problems[0]))
        new = copy.deepcopy(values)

        def put(chosen: dict[str, object]) -> Callable[[], None]:
            def apply() -> None:
                target = self._stage(stage_id)
                for name, value in chosen.items():
                    setattr(target, name, copy.deepcopy(value))
                self._stage_edited(stage_id)
                if "name" in chosen:
                    self.chainChanged.emit()
            return apply

        self._push(f"edit block {stage.name}", put(new), put(old))

    def set_checks(self, stage_id: str, checks: list[Check], text: str = "") -> None:
        """Replace a stage's checklist (checks added, edited, removed or reordered) as one edit.

        Only the definitions change: a check that keeps its id keeps the answer and waiver it has
        when the edit is done or undone (review records are never undone), so a waiver recorded
        after the edit survives its undo.
        """
        self._refuse_if_read_only()
        stage = self._stage(stage_id)
        ids = [check.id for check in checks]
        if any(not check_id.strip() for check_id in ids):
            raise EditRefused("every check needs an id")
        duplicates = sorted({check_id for check_id in ids if ids.count(check_id) > 1})
        if duplicates:
            raise EditRefused(f'two checks of {stage.name} have the id "{duplicates[0]}"')
        old = copy.deepcopy(stage.checks)
        if old == checks:
            return
        candidate = copy.copy(stage)
        candidate.checks = checks
        problems = self._stage_problems(candidate)
        if problems:
            raise EditRefused(_after_colon(problems[0]))
        new = copy.deepcopy(checks)
        # Answers and waivers of checks this edit takes away (on redo or undo), kept for when the
        # check comes back: review records are never undone.
        set_aside: dict[str, tuple[ManualAnswer | None, Waiver | None]] = {}

        def put(definitions: list[Check]) -> Callable[[], None]:
            def apply() -> None:
                target = self._stage(stage_id)
                records = {check.id: (check.answer, check.waiver) for check in target.checks}
                staying = {definition.id for definition in definitions}
                set_aside.update({check_id: record for check_id, record in records.items() if check_id not in staying})
                placed = []
                for definition in definitions:
                    check = copy.deepcopy(definition)
                    if check.id in records:
                        check.answer, check.waiver = records[check.id]
                    elif check.id in set_aside:
                        check.answer, check.waiver = set_aside.pop(check.id)
                    placed.append(check)
                target.checks = placed
                self._stage_edited(stage_id)
                self.reviewChanged.emit(stage_id)
            return apply

        self._push(text or f"edit the checks of {stage.name}", put(new), put(old))

    def use_opamp_model(self, stage_id: str, ref: str, name: str, model: OpampModel | None = None) -> None:
        """Give op-amp ``ref`` the model ``name``; ``model`` (from the library) is copied into the
        project first when the project has no model of that name. One undoable edit."""
        self._refuse_if_read_only()
        stage = self._stage(stage_id)
        part = stage.part(ref)
        if part is None or part.type != "opamp":
            raise EditRefused(f"{stage.name} has no op-amp {ref}")
        adding = model is not None and name not in self._project.opamp_models
        if part.model == name and not adding:
            return
        candidate_project = copy.copy(self._project)
        candidate_project.opamp_models = dict(self._project.opamp_models)
        if adding:
            candidate_project.opamp_models[name] = copy.deepcopy(model)  # type: ignore[arg-type]
        candidate_part = copy.copy(part)
        candidate_part.model = name
        candidate = copy.copy(stage)
        candidate.parts = [candidate_part if p is part else p for p in stage.parts]
        index = self._project.stages.index(stage)
        problems = validate_stage(candidate, candidate_project, f"stages[{index}]")
        if problems:
            raise EditRefused(_after_colon(problems[0]))
        old_name = part.model
        added = copy.deepcopy(model) if adding else None

        def forward() -> None:
            if added is not None:
                self._project.opamp_models[name] = copy.deepcopy(added)
            target = self._stage(stage_id).part(ref)
            assert target is not None
            target.model = name
            self._stage_edited(stage_id)

        def backward() -> None:
            target = self._stage(stage_id).part(ref)
            assert target is not None
            target.model = old_name
            if added is not None:
                self._project.opamp_models.pop(name, None)
            self._stage_edited(stage_id)

        copied = " (copied from the library)" if adding else ""
        self._push(f"{ref} model = {name}{copied}", forward, backward)

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

