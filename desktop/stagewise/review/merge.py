"""Three-way merge of two edited copies of one project (``stagewise merge``, the desktop program's save).

The copies are compared with the common ancestor (``base``) as JSON documents in the file's own
shape (:func:`stagewise.files.codec.encode`):

- **Design edits part by part.** Objects merge key by key; lists of things with an identity
  merge item by item (stages by ``id``, parts by ``ref``, checks by ``id``, measurements by
  ``id``); everything else is a value. A value changed on one side takes that side's change; a
  value changed on both sides to different values is a :class:`Conflict` naming its JSON path
  (``stages[1].parts[0].value``) and both values; an item removed on one side and changed on the
  other is a conflict too. The order of stages (the chain) is taken from the side that changed
  it; both sides reordering differently is a conflict.
- **Review records by identity.** Sign-offs (reviewer, time, verdict, fingerprint) and comments
  (author, time, text) are appended records: both sides' records are kept, base's first, then
  ours', then theirs'. A check holds one answer and one waiver: two different new ones on the two
  sides are a conflict (two reviewers disagreeing is for people to settle).
- **The audit trails as a history.** The events both trails share (their common prefix) stay
  as they are. When only one side added events, the result holds that side's trail. When both
  did, ``mode="fork"`` keeps both chains verbatim, ours then theirs (theirs' first event links to
  the last shared event, a second branch), and appends a ``merge`` event whose ``detail.heads``
  names the hashes of both heads and ``detail.base`` the last shared event, so
  :func:`stagewise.review.audit.verify_trail` checks both branches and the merge.
  ``mode="rebase"`` (the desktop program folding in what was appended to the file while it had
  it open) keeps theirs verbatim and re-appends our unsaved events after them, with new seq,
  prev and hash: ours were never written anywhere, so nothing recorded is rewritten.

With ``prefer_ours`` (the desktop program saving over a file that changed and conflicts, once
the user said so) each conflicting value takes ours and everything else of theirs still joins
(their audit events and records above all); the conflicts are returned beside the project.

The merged document must load (validation included) and its trail and records must verify;
otherwise the result is refused with the reason, as a conflict. Nothing here writes a file.
"""

from __future__ import annotations

import json
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any, Final, Literal

from stagewise.files.codec import ProjectFileError, encode
from stagewise.model.project import AuditEvent, Project
from stagewise.review.audit import (
    GENESIS_PREV,
    MERGE_EVENT,
    append_event,
    check_records,
    event_hash,
    now_utc,
    verify_trail,
)

__all__ = ["Conflict", "MergeResult", "merge_projects"]

_MISSING: Final[Any] = object()

# Lists whose items have an identity, by the key that holds the list (else a list is a value):
# design items by id or ref, and the appended review records by who, when and what (both
# sides' records are kept, an identical one once).
_KEYED_LISTS: Final[dict[str, Callable[[dict[str, Any]], Any]]] = {
    "stages": lambda item: item.get("id"),
    "parts": lambda item: item.get("ref"),
    "checks": lambda item: item.get("id"),
    "measurements": lambda item: item.get("id"),
    "signoffs": lambda item: (item.get("name"), item.get("time"), item.get("verdict"), item.get("fingerprint")),
    "comments": lambda item: (item.get("author"), item.get("time"), item.get("text")),
}


@dataclass(frozen=True, slots=True)
class Conflict:
    """Both copies changed one value differently (or the result cannot stand).

    ``path`` is the JSON path in the file (indices as in ours, else as in theirs); ``ours``,
    ``theirs`` and ``base`` are the values as JSON text (``(absent)`` for a missing one).
    """

    path: str
    ours: str
    theirs: str
    base: str
    why: str = "changed differently on both sides"

    def sentence(self) -> str:
        if not self.path:
            return self.why
        return f"{self.path}: {self.why}: ours {self.ours}, theirs {self.theirs} (base {self.base})"

    def as_json(self) -> dict[str, Any]:
        return {"path": self.path, "ours": self.ours, "theirs": self.theirs, "base": self.base, "why": self.why}


@dataclass(frozen=True, slots=True)
class MergeResult:
    """The merged project (``None`` when there are conflicts, unless ours were preferred) and every
    conflict found."""

    project: Project | None
    conflicts: tuple[Conflict, ...]
    events_ours: int = 0
    events_theirs: int = 0


def _shown(value: Any) -> str:
    if value is _MISSING:
        return "(absent)"
    text = json.dumps(value, ensure_ascii=False, sort_keys=True)
    return text if len(text) <= 120 else text[:117] + "…"


class _Merger:
    def __init__(self) -> None:
        self.conflicts: list[Conflict] = []

    def conflict(self, path: str, base: Any, ours: Any, theirs: Any, why: str | None = None) -> Any:
        self.conflicts.append(Conflict(path, _shown(ours), _shown(theirs), _shown(base),
                                       why or "changed differently on both sides"))
        return ours

    def value(self, path: str, key: str, base: Any, ours: Any, theirs: Any) -> Any:
        if ours == theirs:
            return ours
        if ours == base:
            return theirs
        if theirs == base:
            return ours
        if isinstance(ours, dict) and isinstance(theirs, dict) and (base is _MISSING or isinstance(base, dict)):
            return self.object(path, {} if base is _MISSING else base, ours, theirs)
        if isinstance(ours, list) and isinstance(theirs, list) and (base is _MISSING or isinstance(base, list)):
            if key in _KEYED_LISTS:
                return self.keyed(path, _KEYED_LISTS[key], [] if base is _MISSING else base, ours, theirs)
        return self.conflict(path, base, ours, theirs)

    def object(self, path: str, base: dict[str, Any], ours: dict[str, Any], theirs: dict[str, Any]) -> dict[str, Any]:
        merged: dict[str, Any] = {}
        for key in dict.fromkeys([*ours, *theirs, *base]):
            child = f"{path}.{key}" if path else key
            result = self.value(child, key, base.get(key, _MISSING), ours.get(key, _MISSING),
                                theirs.get(key, _MISSING))
            if result is not _MISSING:
                merged[key] = result
        return merged

    def keyed(self, path: str, identity: Callable[[dict[str, Any]], Any], base: list[Any], ours: list[Any],
              theirs: list[Any]) -> list[Any]:
        if not all(isinstance(item, dict) for item in (*base, *ours, *theirs)):
            self.conflict(path, base, ours, theirs)
            return ours
        by_base = {identity(item): item for item in base}
        by_ours = {identity(item): (index, item) for index, item in enumerate(ours)}
        by_theirs = {identity(item): (index, item) for index, item in enumerate(theirs)}
        merged: dict[Any, Any] = {}
        for key in dict.fromkeys([*by_base, *by_ours, *by_theirs]):
            index = by_ours[key][0] if key in by_ours else by_theirs[key][0] if key in by_theirs else None
            child = f"{path}[{index}]" if index is not None else f"{path}[{key}]"
            old = by_base.get(key, _MISSING)
            mine = by_ours[key][1] if key in by_ours else _MISSING
            other = by_theirs[key][1] if key in by_theirs else _MISSING
            if mine is _MISSING or other is _MISSING:
                present = other if mine is _MISSING else mine
                if old is _MISSING:
                    merged[key] = present  # added on one side
                elif present != old:
                    self.conflict(child, old, mine, other, "removed on one side and changed on the other")
                    merged[key] = present
                continue  # removed on one side, unchanged on the other: removed
            merged[key] = self.value(child, "", old, mine, other)
        order = self.order(path, identity, base, ours, theirs, set(merged))
        return [merged[key] for key in order]

    def order(self, path: str, identity: Callable[[dict[str, Any]], Any], base: list[Any], ours: list[Any],
              theirs: list[Any], kept: set[Any]) -> list[Any]:
        base_ids = [identity(item) for item in base]
        our_ids = [identity(item) for item in ours]
        their_ids = [identity(item) for item in theirs]
        shared = [key for key in base_ids if key in kept and key in our_ids and key in their_ids]
        our_order = [key for key in our_ids if key in shared]
        their_order = [key for key in their_ids if key in shared]
        if our_order == shared:
            result = their_order
        elif their_order == shared or their_order == our_order:
            result = our_order
        else:
            self.conflict(f"{path} (order)", base_ids, our_ids, their_ids, "reordered differently on both sides")
            result = our_order
        # Items new on one side (or kept by one side only) go after the item before them on
        # that side; theirs after ours where both added after the same item.
        from_ours: set[Any] = set()
        for side in (our_ids, their_ids):
            for position, key in enumerate(side):
                if key in kept and key not in result:
                    before = next((k for k in reversed(side[:position]) if k in result), None)
                    place = 0 if before is None else result.index(before) + 1
                    if side is their_ids:
                        while place < len(result) and result[place] in from_ours:
                            place += 1
                    else:
                        from_ours.add(key)
                    result.insert(place, key)
        return result


def _common_prefix(ours: Sequence[AuditEvent], theirs: Sequence[AuditEvent]) -> int:
    count = 0
    for mine, other in zip(ours, theirs, strict=False):
        if mine.hash != other.hash:
            break
        count += 1
    return count


def _copy(event: AuditEvent) -> AuditEvent:
    return AuditEvent(event.seq, event.time, event.who, event.what, json.loads(json.dumps(event.detail)),
                      event.prev, event.hash)


def _merge_trails(ours: Sequence[AuditEvent], theirs: Sequence[AuditEvent], mode: Literal["fork", "rebase"],
                  who: str, time: str | None) -> tuple[list[AuditEvent], int, int]:
    shared = _common_prefix(ours, theirs)
    mine, other = list(ours[shared:]), list(theirs[shared:])
    if not other:
        return [_copy(e) for e in ours], len(mine), 0
    if not mine:
        return [_copy(e) for e in theirs], 0, len(other)
    trail = [_copy(e) for e in theirs] if mode == "rebase" else [_copy(e) for e in ours] + [_copy(e) for e in other]
    holder = Project(title="", audit=trail)
    if mode == "rebase":
        for event in mine:
            append_event(holder, event.who, event.what, event.detail, event.time)
        return holder.audit, len(mine), len(other)
    base_head = ours[shared - 1].hash if shared else GENESIS_PREV
    head = AuditEvent(seq=max(mine[-1].seq, other[-1].seq) + 1, time=time or now_utc(), who=who, what=MERGE_EVENT,
                      detail={"heads": [mine[-1].hash, other[-1].hash], "base": base_head,
                              "events": [len(mine), len(other)]},
                      prev=other[-1].hash, hash="")
    head.hash = event_hash(head)
    trail.append(head)
    return trail, len(mine), len(other)


def merge_projects(base: Project, ours: Project, theirs: Project, *, who: str, mode: Literal["fork", "rebase"] = "fork",
                   time: str | None = None, prefer_ours: bool = False) -> MergeResult:
    """Merge ``ours`` and ``theirs``, two edited copies of ``base`` (see the module docstring).

    Parameters
    ----------
    who : str
        Who merges (the ``merge`` event's ``who``).
    mode : {"fork", "rebase"}
        How two grown audit trails are joined.
    time : str, optional
        ISO 8601 UTC time of the merge event (now when omitted).
    prefer_ours : bool
        Settle every conflicting value with ours and merge the rest (the conflicts are still
        returned, beside the project).
    """
    from stagewise.files.project_file import loads_project

    merger = _Merger()
    documents = [encode(project) for project in (base, ours, theirs)]
    for document in documents:
        document.pop("audit", None)
    merged = merger.object("", documents[0], documents[1], documents[2])
    if merger.conflicts and not prefer_ours:
        return MergeResult(None, tuple(merger.conflicts))
    trail, mine, other = _merge_trails(ours.audit, theirs.audit, mode, who, time)
    try:
        project = loads_project(json.dumps(merged, ensure_ascii=False), "the merged project")
    except ProjectFileError as error:
        return MergeResult(None, (Conflict("", "", "", "", f"the merged project is not valid: {error}"),))
    project.audit = trail
    verdict = verify_trail(project.audit)
    problems = [problem.sentence for problem in check_records(project).problems]
    if not verdict.intact or problems:
        why = verdict.sentence() if not verdict.intact else problems[0]
        return MergeResult(None, (Conflict("audit", "", "", "", f"the merged trail does not verify: {why}"),))
    return MergeResult(project, tuple(merger.conflicts), mine, other)
