"""Semantic difference of two projects, part by part, and the sign-offs it makes stale.

Stages are matched by id and parts by ref within their stage, so a reordered file or a
reformatted value is not a change; a value typed differently but equal (``4k7`` and ``4700``)
is reported as retyped, with the same value. Values are shown as typed (``4k7 → 5k1``).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any, Literal

from stagewise.files.codec import encode_opamp
from stagewise.model.fingerprint import stage_fingerprint
from stagewise.model.project import Check, Part, Project, Stage
from stagewise.model.values import Quantity
from stagewise.review.words import VERDICT_WORDS, SignoffState

__all__ = ["Change", "ProjectDiff", "StaleSignoff", "diff_projects"]

ChangeKind = Literal["added", "removed", "changed", "moved"]


@dataclass(frozen=True, slots=True)
class Change:
    """One difference.

    ``stage_id`` is ``None`` for project-level changes; ``subject`` names what changed
    (``part R3``, ``check gain``, ``stage``, ``op-amp model generic-10M``, ``settings``);
    ``field`` the field within it; ``old`` and ``new`` the values as typed. ``behaviour`` is
    true when the change can alter what the circuit does (a part, a port, a model, a check
    limit), false for names, notes and review records.
    """

    kind: ChangeKind
    stage_id: str | None
    subject: str
    field: str | None = None
    old: str | None = None
    new: str | None = None
    behaviour: bool = True

    def sentence(self) -> str:
        """The change as one line: ``stage buf, part R3: value changed 4k7 → 5k1``."""
        pieces = []
        if self.stage_id is not None:
            pieces.append(f"stage {self.stage_id}")
        if self.subject != "stage" or self.stage_id is None:
            pieces.append(self.subject)
        head = ", ".join(pieces)
        if self.kind == "changed":
            field = f"{self.field} " if self.field else ""
            same = ""
            if self.old is not None and self.new is not None and _same_number(self.old, self.new):
                same = " (same value, typed differently)"
            if self.old is None and self.new is None:
                return f"{head}: {field}changed"
            return f"{head}: {field}changed {_shown(self.old)} → {_shown(self.new)}{same}"
        if self.kind == "moved":
            return f"{head}: moved from {self.old} to {self.new}"
        detail = self.new if self.kind == "added" else self.old
        return f"{head}: {self.kind}" + (f" ({detail})" if detail else "")

    def as_json(self) -> dict[str, Any]:
        return {"kind": self.kind, "stage": self.stage_id, "subject": self.subject, "field": self.field,
                "old": self.old, "new": self.new, "behaviour": self.behaviour}


def _shown(text: str | None) -> str:
    return "(none)" if text is None else text


def _same_number(old: str, new: str) -> bool:
    try:
        return Quantity.of(old).si == Quantity.of(new).si and old != new
    except ValueError:
        return False


@dataclass(frozen=True, slots=True)
class StaleSignoff:
    """A sign-off that was current in the old project and is stale in the new one."""

    stage_id: str
    name: str
    role: str
    verdict: str
    time: str

    def sentence(self) -> str:
        role = f", {self.role}" if self.role else ""
        return (f"{SignoffState.OUT_OF_DATE}: stage {self.stage_id}, {VERDICT_WORDS.get(self.verdict, self.verdict)} by {self.name}{role} "
                f"at {self.time}")

    def as_json(self) -> dict[str, Any]:
        return {"stage": self.stage_id, "name": self.name, "role": self.role, "verdict": self.verdict,
                "time": self.time}


@dataclass(frozen=True, slots=True)
class ProjectDiff:
    """What changed from an old project to a new one, and which sign-offs that makes stale."""

    changes: tuple[Change, ...]
    stale: tuple[StaleSignoff, ...]

    @property
    def empty(self) -> bool:
        return not self.changes

    def lines(self) -> list[str]:
        """The report as lines: every change, then the sign-offs made stale."""
        if self.empty:
            return ["no differences"]
        out = [change.sentence() for change in self.changes]
        if self.stale:
            out.append("")
            out.append(f"sign-offs made {SignoffState.OUT_OF_DATE} by these changes ({len(self.stale)}):")
            out.extend("  " + item.sentence() for item in self.stale)
        else:
            out.append("")
            out.append(f"no sign-off is made {SignoffState.OUT_OF_DATE} by these changes")
        return out

    def as_json(self) -> dict[str, Any]:
        return {"changes": [c.as_json() for c in self.changes], "stale": [s.as_json() for s in self.stale]}


def _typed(value: Any) -> str | None:
    """A value as it was typed in the file (``4k7``), or ``None`` when absent."""
    if value is None:
        return None
    if isinstance(value, Quantity):
        return str(value.raw)
    if isinstance(value, tuple):
        return "[" + ", ".join(_typed(item) or "null" for item in value) + "]"
    if isinstance(value, list):
        return "[" + ", ".join(_typed(item) or "null" for item in value) + "]"
    if isinstance(value, bool):
        return "true" if value else "false"
    return str(value)


def _differs(old: Any, new: Any) -> bool:
    return _typed(old) != _typed(new)


def _field_changes(stage_id: str | None, subject: str, old: Any, new: Any, fields: Sequence[str],
                   behaviour: bool = True) -> list[Change]:
    changes = []
    for name in fields:
        before, after = getattr(old, name), getattr(new, name)
        if _differs(before, after):
            changes.append(Change("changed", stage_id, subject, name, _typed(before), _typed(after), behaviour))
    return changes


def _part_summary(part: Part) -> str:
    value = part.model if part.type == "opamp" else _typed(part.value)
    return f"{part.type} {' '.join(part.nodes)} {value or ''}".strip()


def _check_summary(check: Check) -> str:
    return check.text


_PART_FIELDS = ("type", "nodes", "value", "tol", "control", "model")
_CHECK_FIELDS = ("text", "metric", "where", "at_hz", "min", "max")
_BLOCK_FIELDS = ("gain", "zeros_hz", "poles_hz", "zin_r_ohm", "zin_c_f", "zout_ohm")


def _stage_changes(old: Stage, new: Stage, new_print: str) -> list[Change]:
    sid = new.id
    changes = _field_changes(sid, "stage", old, new, ("name",), behaviour=False)
    changes += _field_changes(sid, "stage", old, new, ("kind", "drive", "bypass"))
    for port in ("in", "out"):
        if old.ports.get(port) != new.ports.get(port):
            changes.append(Change("changed", sid, "stage", f"{port} port", old.ports.get(port), new.ports.get(port)))
    changes += _field_changes(sid, "stage", old, new, _BLOCK_FIELDS)
    old_parts = {part.ref: part for part in old.parts}
    new_parts = {part.ref: part for part in new.parts}
    for part in old.parts:
        if part.ref not in new_parts:
            changes.append(Change("removed", sid, f"part {part.ref}", old=_part_summary(part)))
    for part in new.parts:
        if part.ref not in old_parts:
            changes.append(Change("added", sid, f"part {part.ref}", new=_part_summary(part)))
        else:
            changes += _field_changes(sid, f"part {part.ref}", old_parts[part.ref], part, _PART_FIELDS)
    old_checks = {check.id: check for check in old.checks}
    new_checks = {check.id: check for check in new.checks}
    for check in old.checks:
        if check.id not in new_checks:
            changes.append(Change("removed", sid, f"check {check.id}", old=_check_summary(check)))
    for check in new.checks:
        if check.id not in old_checks:
            changes.append(Change("added", sid, f"check {check.id}", new=_check_summary(check)))
            continue
        before = old_checks[check.id]
        for name in _CHECK_FIELDS:
            if _differs(getattr(before, name), getattr(check, name)):
                changes.append(Change("changed", sid, f"check {check.id}", name, _typed(getattr(before, name)),
                                      _typed(getattr(check, name)), behaviour=name != "text"))
        if _answer_text(before) != _answer_text(check):
            changes.append(Change("changed", sid, f"check {check.id}", "answer", _answer_text(before),
                                  _answer_text(check), behaviour=False))
        if _waiver_text(before) != _waiver_text(check):
            changes.append(Change("changed", sid, f"check {check.id}", "waiver", _waiver_text(before),
                                  _waiver_text(check), behaviour=False))
    if old.notes != new.notes:
        changes.append(Change("changed", sid, "stage", "notes", None, None, behaviour=False))
    for signoff in new.signoffs[len(old.signoffs):] if _prefix(old.signoffs, new.signoffs) else new.signoffs:
        stale = f", {SignoffState.OUT_OF_DATE}" if signoff.fingerprint != new_print else ""
        word = VERDICT_WORDS.get(signoff.verdict, signoff.verdict)
        changes.append(Change("added", sid, "sign-off", new=f"{word} by {signoff.name}{stale}",
                              behaviour=False))
    if len(new.comments) != len(old.comments) or any(a.resolved != b.resolved for a, b in zip(old.comments, new.comments,
                                                                                            strict=False)):
        changes.append(Change("changed", sid, "comments", None, _count(len(old.comments), "comment"),
                              f"{_count(len(new.comments), 'comment')}, "
                              f"{sum(not c.resolved for c in new.comments)} unresolved", behaviour=False))
    return changes


def _count(number: int, noun: str) -> str:
    return f"{number} {noun}" + ("" if number == 1 else "s")


def _prefix(old: Sequence[Any], new: Sequence[Any]) -> bool:
    return len(old) <= len(new) and list(new[:len(old)]) == list(old)


def _answer_text(check: Check) -> str | None:
    answer = check.answer
    return None if answer is None else f"{answer.answer} by {answer.by}"


def _waiver_text(check: Check) -> str | None:
    waiver = check.waiver
    return None if waiver is None else f"waived by {waiver.by}: {waiver.justification}"


def _longest_common_order(old: list[str], new: list[str]) -> set[str]:
    """Ids that keep their relative order (a longest common subsequence); the rest moved."""
    lengths = [[0] * (len(new) + 1) for _ in range(len(old) + 1)]
    for i in range(len(old) - 1, -1, -1):
        for j in range(len(new) - 1, -1, -1):
            lengths[i][j] = (lengths[i + 1][j + 1] + 1 if old[i] == new[j]
                             else max(lengths[i + 1][j], lengths[i][j + 1]))
    kept: set[str] = set()
    i = j = 0
    while i < len(old) and j < len(new):
        if old[i] == new[j]:
            kept.add(old[i])
            i += 1
            j += 1
        elif lengths[i + 1][j] >= lengths[i][j + 1]:
            i += 1
        else:
            j += 1
    return kept


def diff_projects(old: Project, new: Project) -> ProjectDiff:
    """Every difference from ``old`` to ``new`` and the sign-offs it makes stale.

    A sign-off is listed as made stale when it sits on a stage of ``new``, carries the
    fingerprint that stage had in ``old`` (it was current there) and no longer matches the
    stage's fingerprint in ``new``. Sign-offs already stale in ``old`` are not repeated.
    """
    changes: list[Change] = []
    for name in ("title", "revision"):
        if getattr(old, name) != getattr(new, name):
            changes.append(Change("changed", None, "project", name, getattr(old, name), getattr(new, name), False))
    changes += _field_changes(None, "settings", old.settings, new.settings,
                              ("f_min_hz", "f_max_hz", "points_per_decade", "temperature_c", "ref_hz",
                               "noise_band_hz", "seed", "mc_samples", "mc_distribution"))
    changes += _field_changes(None, "input", old.input, new.input, ("drive", "amplitude"))
    changes += _field_changes(None, "converter", old.converter, new.converter, ("fs_hz", "bits", "full_scale_vpp"))
    changes += _field_changes(None, "load", old.load, new.load, ("r_ohm", "c_f"))
    for name in old.opamp_models.keys() - new.opamp_models.keys():
        changes.append(Change("removed", None, f"op-amp model {name}"))
    for name, model in new.opamp_models.items():
        if name not in old.opamp_models:
            changes.append(Change("added", None, f"op-amp model {name}"))
            continue
        old_params, new_params = encode_opamp(old.opamp_models[name]), encode_opamp(model)
        for key in dict.fromkeys([*old_params, *new_params]):
            if old_params.get(key) != new_params.get(key):
                changes.append(Change("changed", None, f"op-amp model {name}", key, _typed(old_params.get(key)),
                                      _typed(new_params.get(key)), behaviour=key != "description"))
    old_ids = [stage.id for stage in old.stages]
    new_ids = [stage.id for stage in new.stages]
    for stage in old.stages:
        if stage.id not in new_ids:
            signed = f", {len(stage.signoffs)} sign-offs with it" if stage.signoffs else ""
            changes.append(Change("removed", stage.id, "stage", old=f"{stage.name}{signed}"))
    common_old = [sid for sid in old_ids if sid in new_ids]
    common_new = [sid for sid in new_ids if sid in old_ids]
    kept = _longest_common_order(common_old, common_new)
    for stage in new.stages:
        before = old.stage(stage.id)
        if before is None:
            changes.append(Change("added", stage.id, "stage", new=stage.name))
            continue
        if stage.id not in kept:
            changes.append(Change("moved", stage.id, "stage", "position", f"position {old_ids.index(stage.id) + 1}",
                                  f"position {new_ids.index(stage.id) + 1}"))
        changes += _stage_changes(before, stage, stage_fingerprint(stage, new))
    stale: list[StaleSignoff] = []
    for stage in new.stages:
        before = old.stage(stage.id)
        if before is None:
            continue
        old_print, new_print = stage_fingerprint(before, old), stage_fingerprint(stage, new)
        if old_print == new_print:
            continue
        for signoff in stage.signoffs:
            if signoff.fingerprint == old_print:
                stale.append(StaleSignoff(stage.id, signoff.name, signoff.role, signoff.verdict, signoff.time))
    return ProjectDiff(tuple(changes), tuple(stale))
