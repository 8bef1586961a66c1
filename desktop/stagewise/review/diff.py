"""Semantic difference of two projects and what it does to the review.

Part and setting changes; the sign-offs they put out of date; the review records (sign-offs,
waivers, answers, comments, resolutions) added and removed, matched by identity (one edited in
place is listed as removed and added, both marked edited); and, with a
metric provider for each project (:func:`check_moves`), every check whose state moves.

Stages are matched by id and parts by ref within their stage, so a reordered file or a
reformatted value is not a change; a value typed differently but equal (``4k7`` and ``4700``)
is reported as retyped, with the same value. Values are shown as typed (``4k7 → 5k1``).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, replace
from typing import Any, Literal

from stagewise.files.codec import encode_opamp
from stagewise.model.fingerprint import stage_fingerprint
from stagewise.model.project import Check, Part, Project, Stage
from stagewise.model.values import Quantity
from stagewise.review.checks import MetricProvider, evaluate_project
from stagewise.review.words import ANSWER_WORDS, VERDICT_WORDS, VERDICTS, WHERE_WORDS, SignoffState, current_verdict

__all__ = ["Change", "CheckMove", "ProjectDiff", "RecordChange", "StaleSignoff", "check_moves", "diff_projects"]

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
class RecordChange:
    """A review record added to or removed from the file (sign-off, waiver, answer, comment,
    resolution), matched by identity: who, when, on which stage and check, and what."""

    kind: str
    stage_id: str | None  # None: a record of the whole chain (a bench measurement of the chain)
    check_id: str | None
    who: str
    time: str
    summary: str

    def sentence(self) -> str:
        where = (f"stage {self.stage_id}" if self.stage_id is not None else "the whole chain") \
            + (f", check {self.check_id}" if self.check_id else "")
        return f"{where}: {self.kind} by {self.who} at {self.time}: {self.summary}"

    def as_json(self) -> dict[str, Any]:
        return {"kind": self.kind, "stage": self.stage_id, "check": self.check_id, "who": self.who,
                "time": self.time, "summary": self.summary}


@dataclass(frozen=True, slots=True)
class CheckMove:
    """A check whose state differs between the two projects (``None``: the check is absent there)."""

    stage_id: str
    check_id: str
    text: str
    old_state: str | None
    new_state: str | None
    old_value: float | None
    new_value: float | None
    old_text: str
    new_text: str
    rework: tuple[str, ...] = ()

    def sentence(self) -> str:
        old = f"{self.old_state} ({self.old_text})" if self.old_text else str(self.old_state or "absent")
        new = f"{self.new_state} ({self.new_text})" if self.new_text else str(self.new_state or "absent")
        line = f"stage {self.stage_id}, check {self.check_id}: {old} → {new}"
        for item in self.rework:
            line += f"; the stage stands {SignoffState.REWORK} by {item}"
        return line

    def as_json(self) -> dict[str, Any]:
        return {"stage": self.stage_id, "check": self.check_id, "text": self.text, "old_state": self.old_state,
                "new_state": self.new_state, "old_value": self.old_value, "new_value": self.new_value,
                "rework_signoffs": list(self.rework)}


@dataclass(frozen=True, slots=True)
class ProjectDiff:
    """What changed from an old project to a new one and what it does to the review: the
    sign-offs it puts out of date, the review records added and removed, and (when computed,
    :func:`check_moves`) the checks whose state moves."""

    changes: tuple[Change, ...]
    stale: tuple[StaleSignoff, ...]
    records_added: tuple[RecordChange, ...] = ()
    records_removed: tuple[RecordChange, ...] = ()
    checks: tuple[CheckMove, ...] = ()

    @property
    def empty(self) -> bool:
        return not (self.changes or self.records_added or self.records_removed or self.checks)

    def lines(self) -> list[str]:
        """The report as lines: every change, the checks that move, the sign-offs made out of
        date, then the records added and removed."""
        if self.empty:
            return ["no differences"]
        out = [change.sentence() for change in self.changes]
        if self.checks:
            out += ["", f"checks whose state moves ({len(self.checks)}):"]
            out.extend("  " + move.sentence() for move in self.checks)
        if self.changes:
            out.append("")
            if self.stale:
                out.append(f"sign-offs made {SignoffState.OUT_OF_DATE} by these changes ({len(self.stale)}):")
                out.extend("  " + item.sentence() for item in self.stale)
            else:
                out.append(f"no sign-off is made {SignoffState.OUT_OF_DATE} by these changes")
        for title, records in (("review records added", self.records_added),
                               ("review records removed", self.records_removed)):
            if records:
                out += ["", f"{title} ({len(records)}):"]
                out.extend("  " + record.sentence() for record in records)
        return out

    def as_json(self) -> dict[str, Any]:
        """The ``diff --json`` document."""
        def group(test: Any) -> list[dict[str, Any]]:
            return [c.as_json() for c in self.changes if test(c)]

        return {
            "parts": group(lambda c: c.subject.startswith("part ")),
            "settings": group(lambda c: c.stage_id is None and not c.subject.startswith("op-amp model")),
            "models": group(lambda c: c.subject.startswith("op-amp model")),
            "stages": group(lambda c: c.stage_id is not None and not c.subject.startswith("part ")),
            "checks": [move.as_json() for move in self.checks],
            "signoffs_stale": [s.as_json() for s in self.stale],
            "records_added": [r.as_json() for r in self.records_added],
            "records_removed": [r.as_json() for r in self.records_removed],
        }


def _records(project: Project) -> dict[tuple[Any, ...], tuple[RecordChange, Any]]:
    """Every review record of ``project`` keyed by its identity, with the record itself (to tell an
    edited one: the same identity, other content)."""
    found: dict[tuple[Any, ...], tuple[RecordChange, Any]] = {}
    for stage in project.stages:
        for signoff in stage.signoffs:
            word = VERDICT_WORDS.get(current_verdict(signoff.verdict), signoff.verdict)
            found[("signoff", stage.id, signoff.name, signoff.time, current_verdict(signoff.verdict))] = (RecordChange(
                "sign-off", stage.id, None, signoff.name, signoff.time,
                word + (f", {signoff.role}" if signoff.role else "") + (f": {signoff.note}" if signoff.note else "")),
                (signoff.role, signoff.fingerprint, signoff.note))
        for check in stage.checks:
            if check.waiver is not None:
                waiver = check.waiver
                found[("waiver", stage.id, check.id, waiver.by, waiver.time)] = (RecordChange(
                    "waiver", stage.id, check.id, waiver.by, waiver.time, waiver.justification), waiver)
            if check.answer is not None:
                answer = check.answer
                found[("answer", stage.id, check.id, answer.by, answer.time, answer.answer)] = (RecordChange(
                    "answer", stage.id, check.id, answer.by, answer.time,
                    ANSWER_WORDS.get(answer.answer, answer.answer) + (f": {answer.note}" if answer.note else "")), answer)
        for comment in stage.comments:
            found[("comment", stage.id, comment.author, comment.time, comment.text)] = (RecordChange(
                "comment", stage.id, comment.check, comment.author, comment.time, comment.text), comment.check)
            if comment.resolved:
                found[("resolution", stage.id, comment.author, comment.time, comment.text)] = (RecordChange(
                    "resolution", stage.id, comment.check, comment.author, comment.time, f"resolved: {comment.text}"), None)
    for measurement in project.measurements:
        found[("measurement", measurement.id, measurement.sha256, measurement.by, measurement.time)] = (RecordChange(
            "bench measurement", measurement.stage, None, measurement.by, measurement.time,
            f"{measurement.id} ({WHERE_WORDS.get(measurement.where, measurement.where)}) from {measurement.file}, "
            f"SHA-256 {measurement.sha256[:12]}…"), measurement)
    return found


def check_moves(old: Project, new: Project, old_provider: MetricProvider,
                new_provider: MetricProvider) -> tuple[CheckMove, ...]:
    """Every check whose state differs between ``old`` and ``new``, each evaluated with its own
    project's metric provider (a check present on one side only moves from or to absent)."""
    from stagewise.review.signoff import signoff_states

    standing = signoff_states(new)
    before = {(r.stage_id, r.check_id): r for r in evaluate_project(old, old_provider)}
    after = {(r.stage_id, r.check_id): r for r in evaluate_project(new, new_provider)}
    moves = []
    for key in dict.fromkeys([*before, *after]):
        was, now = before.get(key), after.get(key)
        old_state = str(was.state) if was is not None else None
        new_state = str(now.state) if now is not None else None
        if old_state == new_state:
            continue
        shown = now if now is not None else was
        assert shown is not None
        moves.append(CheckMove(key[0], key[1], shown.text, old_state, new_state,
                               _finite(was.value) if was is not None else None,
                               _finite(now.value) if now is not None else None,
                               was.value_text() if was is not None else "",
                               now.value_text() if now is not None else "",
                               _rework(standing.get(key[0]))))
    return tuple(moves)


def _rework(state: Any) -> tuple[str, ...]:
    """The standing "returned for rework" sign-offs of a stage, each as "name: note": the
    requests a moved check may answer."""
    if state is None:
        return ()
    return tuple(f"{view.signoff.name}" + (f' ("{view.signoff.note}")' if view.signoff.note else "")
                 for view in state.signoffs
                 if not (view.replaced or view.out_of_date or view.unrecorded)
                 and current_verdict(view.signoff.verdict) == VERDICTS[1])


def _finite(value: float | None) -> float | None:
    return value if value is not None and math.isfinite(value) else None


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


_PART_FIELDS = ("type", "nodes", "value", "tol", "tc_ppm_per_c", "control", "model")
_CHECK_FIELDS = ("text", "metric", "where", "at_hz", "min", "max")
_BLOCK_FIELDS = ("gain", "zeros_hz", "poles_hz", "zin_r_ohm", "zin_c_f", "zout_ohm", "offset_v", "gain_error")


def _stage_changes(old: Stage, new: Stage) -> list[Change]:
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
    if old.notes != new.notes:
        changes.append(Change("changed", sid, "stage", "notes", None, None, behaviour=False))
    return changes


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
                               "noise_band_hz", "seed", "mc_samples", "mc_distribution", "temp_range_c",
                               "supply_variation_v", "four_eyes"))
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
            count = len(stage.signoffs)
            signed = f", {count} sign-off{'s' if count != 1 else ''} with it" if count else ""
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
        changes += _stage_changes(before, stage)
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
    old_records, new_records = _records(old), _records(new)
    # A record with the same identity and other content (a note edited, a fingerprint refreshed)
    # is the old one removed and the new one added, both said to be edited.
    edited = {key for key in old_records.keys() & new_records.keys() if old_records[key][1] != new_records[key][1]}

    def listed(records: dict[tuple[Any, ...], tuple[RecordChange, Any]], other: dict[tuple[Any, ...], Any]
               ) -> tuple[RecordChange, ...]:
        return tuple(replace(record, summary=f"{record.summary} (edited)") if key in edited else record
                     for key, (record, _) in records.items() if key not in other or key in edited)

    added, removed = listed(new_records, old_records), listed(old_records, new_records)
    return ProjectDiff(tuple(changes), tuple(stale), added, removed)
