"""The append-only, hash-chained audit trail of a project (DESIGN section 4).

Every recorded decision appends one event ``{seq, time, who, what, detail, prev, hash}``:

- ``seq`` counts from 1 without gaps;
- ``time`` is ISO 8601 in UTC (``2026-12-01T22:15:00Z``);
- ``prev`` is the ``hash`` of the event before it, or 64 zeros for the first event;
- ``hash`` is the SHA-256 (lower-case hex) of the *canonical JSON* of the event without its
  ``hash`` key but with ``prev``: keys sorted, no spaces (separators ``,`` and ``:``), non-ASCII
  characters written as themselves, encoded as UTF-8.

What this proves, and what it does not: recomputing the chain reveals an event edited, removed,
inserted or reordered by anything that did not also recompute every hash after it, which is
what happens when a file is edited by hand or by another tool. It is not a signature: the
rule above is public and uses no secret, so anyone holding the file can rebuild a chain that
verifies. Removing events from the end leaves a shorter chain that still verifies, unless a
review record in the stages still needs one of them: :func:`unrecorded_decisions` lists the
sign-offs, waivers, answers and comments that no event accounts for.
"""

from __future__ import annotations

import hashlib
import json
import re
from collections.abc import Sequence
from dataclasses import dataclass, replace
from datetime import UTC, datetime
from typing import Any, Final

from stagewise.model.project import AuditEvent, Check, Project
from stagewise.review.words import VERDICT_WORDS, SignoffState, current_verdict

__all__ = [
    "EVENT_LABELS",
    "GENESIS_PREV",
    "MERGE_EVENT",
    "RecordProblem",
    "RecordsCheck",
    "VerifyResult",
    "append_event",
    "canonical_json",
    "check_records",
    "event_hash",
    "now_utc",
    "trusted_check",
    "unrecorded_decisions",
    "verify_trail",
]

GENESIS_PREV: Final = "0" * 64
# The event that joins two branches of the trail (two copies merged by ``stagewise merge``).
MERGE_EVENT: Final = "merge"

# The kinds of event the program records, and the words shown for them in the GUI, the packet
# and the command line. Other callers may record other kinds; they are shown as written.
EVENT_LABELS: Final[dict[str, str]] = {
    "signoff": "sign-off",
    "waiver": "check waived",
    "waiver withdrawn": "waiver withdrawn",
    "answer": "manual check answered",
    "comment": "comment added",
    "comment resolved": "comment resolved",
    "part change": "parts changed when saved",
    "packet": "review packet printed",
    "import": "stage imported",
    "measurement": "bench measurement attached",
    "merge": "copies merged",
}

_HEX64 = re.compile(r"[0-9a-f]{64}")


def canonical_json(document: Any) -> bytes:
    """The canonical JSON bytes that hashes are computed over.

    Keys sorted, separators ``,`` and ``:`` without spaces, non-ASCII characters kept as they
    are (not ``\\u`` escapes), UTF-8. NaN and infinities are refused (they are not JSON).

    Raises
    ------
    ValueError
        The document holds something JSON cannot represent.
    """
    try:
        text = json.dumps(document, sort_keys=True, separators=(",", ":"), ensure_ascii=False, allow_nan=False)
    except TypeError as error:
        raise ValueError(f"the audit detail cannot be written as JSON ({error})") from error
    return text.encode("utf-8")


def _hashed_content(event: AuditEvent) -> dict[str, Any]:
    return {"seq": event.seq, "time": event.time, "who": event.who, "what": event.what,
            "detail": event.detail, "prev": event.prev}


def event_hash(event: AuditEvent) -> str:
    """SHA-256 (hex) of the canonical JSON of ``event`` without its ``hash`` (``prev`` included)."""
    return hashlib.sha256(canonical_json(_hashed_content(event))).hexdigest()


def now_utc() -> str:
    """The current time as ISO 8601 UTC to the second, e.g. ``2026-12-01T22:15:00Z``."""
    return datetime.now(UTC).replace(microsecond=0).isoformat().replace("+00:00", "Z")


def _utc_time(text: str) -> str:
    """Check that ``text`` is an ISO 8601 time in UTC; returns it unchanged."""
    try:
        moment = datetime.fromisoformat(text.replace("Z", "+00:00"))
    except ValueError as error:
        raise ValueError(f'"{text}" is not an ISO 8601 time such as 2026-12-01T22:15:00Z') from error
    if moment.utcoffset() is None or moment.utcoffset() != UTC.utcoffset(None):
        raise ValueError(f'"{text}" is not in UTC; write it with a Z, e.g. 2026-12-01T22:15:00Z')
    return text


def append_event(project: Project, who: str, what: str, detail: dict[str, Any], time: str | None = None) -> AuditEvent:
    """Append one event to ``project.audit`` and return it.

    Parameters
    ----------
    project : Project
        The project whose trail grows; ``project.audit`` is changed in place.
    who : str
        The person who made the decision (not empty).
    what : str
        The kind of event, normally a key of :data:`EVENT_LABELS`.
    detail : dict
        What was decided, as JSON data (stage, check, fingerprint, old and new values...).
        A deep copy goes into the event, so later changes to ``detail`` do not alter it.
    time : str, optional
        ISO 8601 UTC time; the current time when omitted.

    Raises
    ------
    ValueError
        ``who`` or ``what`` is empty, ``time`` is not ISO 8601 UTC, or ``detail`` is not JSON.
    """
    if not who.strip():
        raise ValueError("an audit event needs the name of who made the decision")
    if not what.strip():
        raise ValueError("an audit event needs to say what was decided")
    stamp = now_utc() if time is None else _utc_time(time)
    # Round trip through the canonical text: a private copy, refused early if it is not JSON.
    copied: dict[str, Any] = json.loads(canonical_json(detail))
    previous = project.audit[-1] if project.audit else None
    event = AuditEvent(
        seq=1 if previous is None else previous.seq + 1,
        time=stamp,
        who=who,
        what=what,
        detail=copied,
        prev=GENESIS_PREV if previous is None else previous.hash,
        hash="",
    )
    event.hash = event_hash(event)
    project.audit.append(event)
    return event


@dataclass(frozen=True, slots=True)
class VerifyResult:
    """Outcome of :func:`verify_trail`.

    ``broken_index`` is the 0-based position of the first bad event in the list and
    ``broken_seq`` the seq written in it; ``why`` is one sentence (``None`` when intact).
    """

    intact: bool
    events: int
    broken_index: int | None = None
    broken_seq: int | None = None
    why: str | None = None
    merges: int = 0

    def sentence(self) -> str:
        """One sentence for people: the verdict and, when broken, where and why."""
        if self.intact:
            noun = "event" if self.events == 1 else "events"
            joined = (f", {self.merges} merge{'s' if self.merges != 1 else ''} of two branches each checked"
                      if self.merges else "")
            return f"audit trail intact: {self.events} {noun}, every hash and link recomputed{joined}"
        position = (self.broken_index or 0) + 1
        return (f"audit trail broken at event {position} of {self.events} (seq {self.broken_seq}): "
                f"{self.why}")


def verify_trail(events: Sequence[AuditEvent]) -> VerifyResult:
    """Recompute the chain and name the first event that does not fit.

    For each event in order: its ``hash`` must be the SHA-256 of its content (else it was
    edited after it was recorded, or its hash was forged); its ``prev`` must be the hash of the
    event before it and its ``seq`` one more than that event's (else events were removed,
    inserted or reordered, or the link was cut). An empty trail is intact.

    Merged histories (``stagewise merge``): an event whose ``prev`` is the hash of an *earlier*
    event (not the one just before it), with the seq following that earlier event, starts a
    second branch; the tip it leaves behind must then be named by a later ``merge`` event,
    whose ``detail.heads`` lists the hashes of the tips of every branch it joins (its ``prev``
    is the event just before it, its ``seq`` one more than the largest seq among the heads). A
    branch that no merge event closes is reported as a cut chain.
    """
    seq_of: dict[str, int] = {GENESIS_PREV: 0}
    open_heads: dict[str, int] = {}  # tips left behind by a branch start -> index of that start
    last_hash = GENESIS_PREV
    for index, event in enumerate(events):

        def broken(why: str, index: int = index, event: AuditEvent = event) -> VerifyResult:
            return VerifyResult(False, len(events), index, event.seq, why)

        if not _HEX64.fullmatch(event.hash):
            return broken(f'its hash "{_short(event.hash)}" is not 64 lower-case hexadecimal digits')
        if event_hash(event) != event.hash:
            return broken("its content does not match its hash: it was edited after it was recorded, "
                          "or its hash was not computed by the program")
        if event.hash in seq_of:
            return broken("it repeats an earlier event: events were duplicated")
        if event.what == MERGE_EVENT:
            problem = _merge_problem(event, last_hash, seq_of, open_heads)
            if problem is not None:
                return broken(problem)
            for head in event.detail["heads"]:
                open_heads.pop(head, None)
        elif event.prev == last_hash:
            expected_seq = seq_of[last_hash] + 1
            if event.seq != expected_seq:
                gap = ("events are missing before it or it was moved" if event.seq > expected_seq else
                       "it repeats or comes after a later event: events were reordered or duplicated")
                return broken(f"its seq is {event.seq} where {expected_seq} was expected; {gap}")
        elif event.prev in seq_of and event.seq == seq_of[event.prev] + 1 and index > 0:
            # A second branch forking from an earlier event: legitimate only if merged later.
            open_heads[last_hash] = index
        else:
            expected_seq = seq_of[last_hash] + 1
            if event.seq != expected_seq:
                gap = ("events are missing before it or it was moved" if event.seq > expected_seq else
                       "it repeats or comes after a later event: events were reordered or duplicated")
                return broken(f"its seq is {event.seq} where {expected_seq} was expected; {gap}")
            before = "64 zeros (it is the first event)" if index == 0 else f"the hash of event seq {expected_seq - 1}"
            return broken(f"its prev is not {before}: the chain was cut or re-linked here")
        seq_of[event.hash] = event.seq
        last_hash = event.hash
    if open_heads:
        start = min(open_heads.values())
        event = events[start]
        return VerifyResult(False, len(events), start, event.seq,
                            "it starts a second branch from an earlier event, and no merge event names the "
                            "branches' heads: the chain was cut or re-linked here")
    return VerifyResult(True, len(events), merges=sum(1 for event in events if event.what == MERGE_EVENT))


def _merge_problem(event: AuditEvent, last_hash: str, seq_of: dict[str, int],
                   open_heads: dict[str, int]) -> str | None:
    """Why a ``merge`` event does not close the open branches, or ``None`` when it does."""
    heads = event.detail.get("heads")
    if not isinstance(heads, list) or len(heads) < 2 or not all(isinstance(h, str) for h in heads):
        return "it is a merge event without the list of the heads it joins"
    if event.prev != last_hash:
        return "its prev is not the hash of the event before it: the chain was cut or re-linked here"
    unknown = [head for head in heads if head not in seq_of]
    if unknown:
        return f'it names a head "{_short(unknown[0])}" that is no earlier event: events were removed'
    if last_hash not in heads or not set(heads) <= set(open_heads) | {last_hash}:
        return "the heads it names are not the tips of the branches before it: events were removed or moved"
    expected_seq = max(seq_of[head] for head in heads) + 1
    if event.seq != expected_seq:
        return f"its seq is {event.seq} where {expected_seq} was expected after the heads it joins"
    return None


def _short(text: str) -> str:
    return text if len(text) <= 20 else text[:17] + "…"


@dataclass(frozen=True, slots=True)
class RecordProblem:
    """A review record and its audit event that do not match.

    ``kind`` is ``signoff``, ``waiver``, ``answer``, ``comment`` or ``resolved``; ``stage_id``
    the stage; ``key`` the record within it (a sign-off's or comment's 0-based index, a check's
    id); ``removed`` is true when an event's record is missing from the file (the record was
    removed), false when a record in the file has no event that holds its content (it was
    written or edited outside the program: "unrecorded"). ``sentence`` says which and why.
    """

    kind: str
    stage_id: str
    key: int | str
    removed: bool
    sentence: str


@dataclass(frozen=True, slots=True)
class RecordsCheck:
    """Every review record matched with the event that created it, both ways."""

    problems: tuple[RecordProblem, ...]
    # ``(kind, stage_id, key)`` of every record in the file that its events do not account for.
    unrecorded: frozenset[tuple[str, str, int | str]] = frozenset()

    @classmethod
    def of(cls, problems: Sequence[RecordProblem]) -> RecordsCheck:
        return cls(tuple(problems), frozenset((p.kind, p.stage_id, p.key) for p in problems if not p.removed))

    def is_unrecorded(self, kind: str, stage_id: str, key: int | str) -> bool:
        return (kind, stage_id, key) in self.unrecorded


# What each kind of record holds, as (field in the record, key in its event's detail). The
# event's ``who`` and ``time`` are the record's person and time; its detail's ``stage`` (and
# ``check``) say where it belongs. A key an older event lacks is not compared ("compare what
# the event held"); every event this release writes holds them all.
_SIGNOFF_FIELDS: Final = (("verdict", "verdict"), ("role", "role"), ("note", "note"), ("fingerprint", "fingerprint"))
_WAIVER_FIELDS: Final = (("justification", "justification"), ("role", "role"))
_ANSWER_FIELDS: Final = (("answer", "answer"), ("note", "note"))


def _content_differences(record: Any, event: AuditEvent, fields: Sequence[tuple[str, str]]) -> list[str]:
    differences = []
    for attribute, key in fields:
        if key not in event.detail:
            continue
        held, recorded = getattr(record, attribute), event.detail[key]
        if attribute == "verdict":
            # An event recorded by an earlier release holds that release's verdict word; the
            # event is never rewritten (its hash covers it), so compare in today's words.
            held, recorded = current_verdict(str(held)), current_verdict(str(recorded))
        if held != recorded:
            differences.append(attribute)
    return differences


def _removed_by_later_change(events: Sequence[AuditEvent], after: int, stage_id: str, check_id: str | None) -> bool:
    """Whether a "part change" event after position ``after`` removed the stage (or the check)."""
    subjects = {"stage"} if check_id is None else {"stage", f"check {check_id}"}
    for event in events[after + 1:]:
        if event.what != "part change":
            continue
        for change in event.detail.get("changes") or []:
            if (isinstance(change, dict) and change.get("kind") == "removed" and change.get("stage") == stage_id
                    and change.get("subject") in subjects):
                return True
    return False


def check_records(project: Project) -> RecordsCheck:
    """Match every review record in the stages with the audit event that created it, both ways.

    Each sign-off, the standing waiver and answer of each check, each comment and each resolved
    flag must have an event holding the same stage, person, time and content (a sign-off's
    verdict, role, note and fingerprint; a waiver's justification and role; an answer and its
    note; a comment's text and check). A record without such an event was written or edited
    outside the program; it is reported as unrecorded, naming the field that differs when an
    event with its person and time exists. The other way, every sign-off and comment event, the
    last waiver or answer event of each check and every resolution event must still find its
    record: one that is missing was removed from the file (unless a later "part change" event
    removed its stage or check).
    """
    events = list(project.audit)
    problems: list[RecordProblem] = []
    used: set[int] = set()

    by_key: dict[tuple[str, str, str], list[int]] = {}
    for index, event in enumerate(events):
        by_key.setdefault((event.what, event.who, event.time), []).append(index)

    def candidates(what: str, who: str, time: str, stage_id: str, check_id: str | None = None) -> list[int]:
        return [i for i in by_key.get((what, who, time), [])
                if i not in used and events[i].detail.get("stage") == stage_id
                and (check_id is None or events[i].detail.get("check") == check_id)]

    standing = _standing_decisions(events)

    def match(kind: str, stage_id: str, key: int | str, label: str, what: str, record: Any, who: str, time: str,
              fields: Sequence[tuple[str, str]], check_id: str | None = None) -> None:
        found = candidates(what, who, time, stage_id, check_id)
        if check_id is not None and found:
            # A check holds one waiver and one answer: only the last decision on it stands.
            last = standing.get((kind, stage_id, check_id))
            if last not in found:
                assert last is not None  # found holds events of this kind on this check
                problems.append(RecordProblem(kind, stage_id, key, False,
                                              f"{label}: audit event seq {events[last].seq} withdrew or replaced "
                                              "it, and the record was put back outside the program"))
                return
            found = [last]
        for index in found:
            if not _content_differences(record, events[index], fields):
                used.add(index)
                return
        if found:
            index = found[0]
            used.add(index)
            differing = " and ".join(_content_differences(record, events[index], fields))
            problems.append(RecordProblem(kind, stage_id, key, False,
                                          f"{label}: its {differing} differs from what audit event seq "
                                          f"{events[index].seq} recorded; it was edited outside the program"))
        else:
            problems.append(RecordProblem(kind, stage_id, key, False, f"{label} has no matching audit event"))

    for stage in project.stages:
        where = f'stage "{stage.id}"'
        for index, signoff in enumerate(stage.signoffs):
            word = VERDICT_WORDS.get(current_verdict(signoff.verdict), signoff.verdict)
            match("signoff", stage.id, index, f"{where}, sign-off {index + 1} ({word} by {signoff.name})", "signoff",
                  signoff, signoff.name, signoff.time, _SIGNOFF_FIELDS)
        for check in stage.checks:
            if check.waiver is not None:
                match("waiver", stage.id, check.id, f'{where}, check "{check.id}": the waiver by {check.waiver.by}',
                      "waiver", check.waiver, check.waiver.by, check.waiver.time, _WAIVER_FIELDS, check.id)
            if check.answer is not None:
                match("answer", stage.id, check.id, f'{where}, check "{check.id}": the answer by {check.answer.by}',
                      "answer", check.answer, check.answer.by, check.answer.time, _ANSWER_FIELDS, check.id)
        for index, comment in enumerate(stage.comments):
            label = f"{where}, comment {index + 1} by {comment.author}"
            found = [i for i in candidates("comment", comment.author, comment.time, stage.id)
                     if events[i].detail.get("text") == comment.text
                     and events[i].detail.get("check", comment.check) == comment.check]
            if found:
                used.add(found[0])
            else:
                problems.append(RecordProblem("comment", stage.id, index, False,
                                              f"{label} has no matching audit event (its text, check, author or "
                                              "time differs from every comment event)"))
            resolutions = [i for i, e in enumerate(events)
                           if i not in used and e.what == "comment resolved" and e.detail.get("stage") == stage.id
                           and e.detail.get("author") == comment.author and e.detail.get("text") == comment.text]
            if comment.resolved and resolutions:
                used.add(resolutions[0])
            elif comment.resolved:
                problems.append(RecordProblem("resolved", stage.id, index, False,
                                              f"{label} is marked resolved without an audit event"))
    for measurement in project.measurements:
        found = [i for i, e in enumerate(events)
                 if i not in used and e.what == "measurement" and e.who == measurement.by and e.time == measurement.time
                 and e.detail.get("measurement") == measurement.id and e.detail.get("sha256") == measurement.sha256
                 and e.detail.get("fingerprint") == measurement.fingerprint]
        if found:
            used.add(found[0])
        else:
            problems.append(RecordProblem("measurement", "", measurement.id, False,
                                          f'measurement "{measurement.id}" ({measurement.file}) has no matching '
                                          "audit event"))
    problems.extend(_removed_records(project, events, used))
    return RecordsCheck.of(problems)


def _standing_decisions(events: Sequence[AuditEvent]) -> dict[tuple[str, str, str], int]:
    """The position of the last waiver (or withdrawal) and the last answer event on each check,
    keyed by ``(kind, stage, check)``: only those decisions stand, earlier ones were replaced."""
    last: dict[tuple[str, str, str], int] = {}
    for index, event in enumerate(events):
        kind = "waiver" if event.what in ("waiver", "waiver withdrawn") else event.what
        if kind in ("waiver", "answer"):
            last[(kind, str(event.detail.get("stage")), str(event.detail.get("check")))] = index
    return last


def _removed_records(project: Project, events: Sequence[AuditEvent], used: set[int]) -> list[RecordProblem]:
    """Events whose record is no longer in the file (the other direction of :func:`check_records`)."""
    problems: list[RecordProblem] = []
    standing = set(_standing_decisions(events).values())
    for index, event in enumerate(events):
        if index in used:
            continue
        stage_id = str(event.detail.get("stage"))
        check_id = event.detail.get("check")
        if event.what == "signoff":
            kind, what = "signoff", f"the sign-off by {event.who}"
        elif event.what == "comment":
            kind, what = "comment", f"the comment by {event.who}"
            check_id = None
        elif event.what == "comment resolved":
            kind, what = "resolved", f"the resolution of the comment by {event.detail.get('author')}"
        elif event.what in ("waiver", "answer") and index in standing:
            kind, what = event.what, f"the {event.what} by {event.who} on check \"{check_id}\""
        else:
            continue
        if _removed_by_later_change(events, index, stage_id, check_id if isinstance(check_id, str) else None):
            continue
        gone = "" if project.stage(stage_id) is not None else " (the stage itself is gone, with no change event)"
        problems.append(RecordProblem(kind, stage_id, f"event {event.seq}", True,
                                      f'stage "{stage_id}": {what} recorded by audit event seq {event.seq} at '
                                      f"{event.time} is missing from the file{gone}; it was removed outside the "
                                      "program"))
    return problems


def unrecorded_decisions(project: Project) -> list[str]:
    """Review records and events that do not match, both ways, each as one sentence.

    See :func:`check_records`: records written or edited outside the program, and records
    removed from the file whose events remain.
    """
    return [problem.sentence for problem in check_records(project).problems]


def trusted_check(check: Check, stage_id: str, records: RecordsCheck) -> tuple[Check, str | None]:
    """``check`` without a waiver or answer that no audit event accounts for, and a sentence
    saying what was left out (``None`` when nothing was).

    Check evaluation uses this, so that a waiver or an answer written outside the program never
    makes a check pass: it is shown as unrecorded and the check is evaluated without it.
    """
    ignored = [kind for kind in ("waiver", "answer") if records.is_unrecorded(kind, stage_id, check.id)]
    if not ignored:
        return check, None
    trusted = replace(check, waiver=None if "waiver" in ignored else check.waiver,
                      answer=None if "answer" in ignored else check.answer)
    what = " and ".join(f"the {kind}" for kind in ignored)
    return trusted, f"{what} in the file {'is' if len(ignored) == 1 else 'are'} {SignoffState.UNRECORDED} " \
                    "(no audit event holds it) and ignored"
