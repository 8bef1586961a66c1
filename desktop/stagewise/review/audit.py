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
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any, Final

from stagewise.model.project import AuditEvent, Project
from stagewise.review.words import VERDICT_WORDS, current_verdict

__all__ = [
    "EVENT_LABELS",
    "GENESIS_PREV",
    "VerifyResult",
    "append_event",
    "canonical_json",
    "event_hash",
    "now_utc",
    "unrecorded_decisions",
    "verify_trail",
]

GENESIS_PREV: Final = "0" * 64

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

    def sentence(self) -> str:
        """One sentence for people: the verdict and, when broken, where and why."""
        if self.intact:
            noun = "event" if self.events == 1 else "events"
            return f"audit trail intact: {self.events} {noun}, every hash and link recomputed"
        position = (self.broken_index or 0) + 1
        return (f"audit trail broken at event {position} of {self.events} (seq {self.broken_seq}): "
                f"{self.why}")


def verify_trail(events: Sequence[AuditEvent]) -> VerifyResult:
    """Recompute the chain and name the first event that does not fit.

    For each event in order: its ``hash`` must be the SHA-256 of its content (else it was
    edited after it was recorded, or its hash was forged); its ``seq`` must follow the one
    before it (else events were removed, inserted or reordered); its ``prev`` must be the hash
    of the event before it (else the link was cut). An empty trail is intact.
    """
    expected_prev = GENESIS_PREV
    expected_seq = 1
    for index, event in enumerate(events):

        def broken(why: str, index: int = index, event: AuditEvent = event) -> VerifyResult:
            return VerifyResult(False, len(events), index, event.seq, why)

        if not _HEX64.fullmatch(event.hash):
            return broken(f'its hash "{_short(event.hash)}" is not 64 lower-case hexadecimal digits')
        if event_hash(event) != event.hash:
            return broken("its content does not match its hash: it was edited after it was recorded, "
                          "or its hash was not computed by the program")
        if event.seq != expected_seq:
            if event.seq > expected_seq:
                gap = "events are missing before it or it was moved"
            else:
                gap = "it repeats or comes after a later event: events were reordered or duplicated"
            return broken(f"its seq is {event.seq} where {expected_seq} was expected; {gap}")
        if event.prev != expected_prev:
            before = "64 zeros (it is the first event)" if index == 0 else f"the hash of event seq {expected_seq - 1}"
            return broken(f"its prev is not {before}: the chain was cut or re-linked here")
        expected_prev = event.hash
        expected_seq += 1
    return VerifyResult(True, len(events))


def _short(text: str) -> str:
    return text if len(text) <= 20 else text[:17] + "…"


def _matches(event: AuditEvent, what: str, who: str, time: str, **fields: Any) -> bool:
    return (event.what == what and event.who == who and event.time == time
            and all(event.detail.get(key) == value for key, value in fields.items()))


def unrecorded_decisions(project: Project) -> list[str]:
    """Review records in the stages that no audit event accounts for, each as one sentence.

    Every sign-off, waiver, manual answer, comment and resolved flag the program records comes
    with an event holding the same stage, person, time and content. A record without its event
    was written into the file by something else (for example a sign-off pasted by hand, or a
    stale sign-off whose fingerprint was edited to look current), or its event was cut from the
    end of the trail.
    """
    problems: list[str] = []
    events = list(project.audit)

    def found(what: str, who: str, time: str, **fields: Any) -> bool:
        return any(_matches(event, what, who, time, **fields) for event in events)

    for stage in project.stages:
        for index, signoff in enumerate(stage.signoffs):
            # An event recorded by an earlier release holds that release's verdict word; the
            # event is never rewritten (its hash covers it), so compare in today's words.
            if not any(_matches(event, "signoff", signoff.name, signoff.time, stage=stage.id,
                                fingerprint=signoff.fingerprint)
                       and current_verdict(str(event.detail.get("verdict"))) == current_verdict(signoff.verdict)
                       for event in events):
                problems.append(f'stage "{stage.id}", sign-off {index + 1} ({VERDICT_WORDS.get(signoff.verdict, signoff.verdict)} by {signoff.name}) '
                                f"has no matching audit event")
        for check in stage.checks:
            if check.waiver is not None and not found("waiver", check.waiver.by, check.waiver.time, stage=stage.id,
                                                      check=check.id, justification=check.waiver.justification):
                problems.append(f'stage "{stage.id}", check "{check.id}": the waiver by {check.waiver.by} '
                                f"has no matching audit event")
            if check.answer is not None and not found("answer", check.answer.by, check.answer.time, stage=stage.id,
                                                      check=check.id, answer=check.answer.answer):
                problems.append(f'stage "{stage.id}", check "{check.id}": the answer by {check.answer.by} '
                                f"has no matching audit event")
        for index, comment in enumerate(stage.comments):
            if not found("comment", comment.author, comment.time, stage=stage.id, text=comment.text):
                problems.append(f'stage "{stage.id}", comment {index + 1} by {comment.author} '
                                f"has no matching audit event")
            if comment.resolved and not any(
                event.what == "comment resolved" and event.detail.get("stage") == stage.id
                and event.detail.get("author") == comment.author and event.detail.get("text") == comment.text
                for event in events
            ):
                problems.append(f'stage "{stage.id}", comment {index + 1} is marked resolved without an audit event')
    for measurement in project.measurements:
        if not found("measurement", measurement.by, measurement.time, measurement=measurement.id,
                     sha256=measurement.sha256, fingerprint=measurement.fingerprint):
            problems.append(f'measurement "{measurement.id}" ({measurement.file}) has no matching audit event')
    return problems
