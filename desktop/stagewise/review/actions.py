"""Recording review decisions: the library API that the GUI and the command line call.

Each function checks its input first (raising :class:`ReviewError` with one sentence and
changing nothing), then changes the project in place and appends one audit event through
:func:`stagewise.review.audit.append_event`. Saving is the caller's business.
"""

from __future__ import annotations

import re
from typing import Any

from stagewise.model.fingerprint import stage_fingerprint
from stagewise.model.project import AuditEvent, Check, Comment, ManualAnswer, Project, Signoff, Stage, Waiver
from stagewise.review.audit import append_event, now_utc
from stagewise.review.diff import diff_projects
from stagewise.review.words import VERDICTS

__all__ = [
    "ReviewError",
    "answer",
    "comment",
    "record_packet",
    "record_part_changes",
    "resolve",
    "sign",
    "waive",
    "withdraw_waiver",
]

ANSWERS = ("yes", "no", "n/a")
_HEX64 = re.compile(r"[0-9a-f]{64}")


class ReviewError(ValueError):
    """A review action that cannot be recorded; the message is one sentence."""


def _stage(project: Project, stage_id: str) -> Stage:
    stage = project.stage(stage_id)
    if stage is None:
        raise ReviewError(f'the project has no stage "{stage_id}"')
    return stage


def _check(stage: Stage, check_id: str) -> Check:
    for check in stage.checks:
        if check.id == check_id:
            return check
    raise ReviewError(f'stage "{stage.id}" has no check "{check_id}"')


def _person(text: str, what: str) -> str:
    if not text.strip():
        raise ReviewError(f"{what} must not be empty")
    if len(text) > 200:
        raise ReviewError(f"{what} is longer than 200 characters")
    return text.strip()


def _time(time: str | None) -> str:
    return now_utc() if time is None else time


def sign(project: Project, stage_id: str, name: str, role: str, verdict: str, note: str = "",
         time: str | None = None) -> Signoff:
    """Record a reviewer's verdict on a stage, bound to the stage's current fingerprint.

    Parameters
    ----------
    verdict : {"accept", "rework"}
        Accepted, or returned for rework; ``rework`` needs a note saying what must change.
        Under the four-eyes rule (``settings.four_eyes``) whoever last changed the stage cannot
        accept it.

    Returns
    -------
    Signoff
        The sign-off appended to ``stage.signoffs``.
    """
    stage = _stage(project, stage_id)
    name = _person(name, "the reviewer's name")
    if verdict not in VERDICTS:
        raise ReviewError(f'"{verdict}" is not a verdict; use "accept" or "rework"')
    if verdict == "rework" and not note.strip():
        raise ReviewError("returning a stage for rework needs a note saying what must change")
    if project.settings.four_eyes and verdict == VERDICTS[0]:
        from stagewise.review.signoff import last_changed_by

        author = last_changed_by(project).get(stage.id, "")
        if author.strip().casefold() == name.casefold():
            raise ReviewError(f'{name} last changed stage "{stage.id}" and cannot accept it: the project asks '
                              "for the four-eyes rule (settings.four_eyes); another reviewer must")
    fingerprint = stage_fingerprint(stage, project)
    stamp = _time(time)
    event = append_event(project, name, "signoff",
                         {"stage": stage.id, "verdict": verdict, "role": role, "note": note,
                          "fingerprint": fingerprint}, stamp)
    signoff = Signoff(name=name, role=role, verdict=verdict, time=event.time, fingerprint=fingerprint, note=note)
    stage.signoffs.append(signoff)
    return signoff


def waive(project: Project, stage_id: str, check_id: str, by: str, role: str, justification: str,
          time: str | None = None) -> Waiver:
    """Waive a check with a justification; a waived check counts as waived, never as met.

    A check already waived gets the new waiver; the event keeps the justification it replaces.
    """
    stage = _stage(project, stage_id)
    check = _check(stage, check_id)
    by = _person(by, "the name of who waives the check")
    if not justification.strip():
        raise ReviewError("a waiver needs a justification saying why the check need not be met")
    detail: dict[str, Any] = {"stage": stage.id, "check": check.id, "role": role,
                              "justification": justification.strip()}
    if check.waiver is not None:
        detail["replaces"] = check.waiver.justification
    event = append_event(project, by, "waiver", detail, _time(time))
    check.waiver = Waiver(by=by, time=event.time, justification=justification.strip(), role=role)
    return check.waiver


def withdraw_waiver(project: Project, stage_id: str, check_id: str, by: str, note: str = "",
                    time: str | None = None) -> AuditEvent:
    """Remove a check's waiver, so that it is evaluated again; the event keeps what was withdrawn."""
    stage = _stage(project, stage_id)
    check = _check(stage, check_id)
    by = _person(by, "the name of who withdraws the waiver")
    if check.waiver is None:
        raise ReviewError(f'check "{check_id}" of stage "{stage_id}" is not waived')
    event = append_event(project, by, "waiver withdrawn",
                         {"stage": stage.id, "check": check.id, "justification": check.waiver.justification,
                          "waived_by": check.waiver.by, "note": note}, _time(time))
    check.waiver = None
    return event


def answer(project: Project, stage_id: str, check_id: str, answer: str, by: str, note: str = "",
           time: str | None = None) -> ManualAnswer:
    """Record the answer to a manual check: ``yes`` (met), ``no`` (not met) or ``n/a``."""
    stage = _stage(project, stage_id)
    check = _check(stage, check_id)
    by = _person(by, "the name of who answers")
    if not check.is_manual:
        raise ReviewError(f'check "{check_id}" is numeric: it is evaluated from the analysis, not answered')
    if answer not in ANSWERS:
        raise ReviewError(f'"{answer}" is not an answer; use "yes", "no" or "n/a"')
    detail: dict[str, Any] = {"stage": stage.id, "check": check.id, "answer": answer, "note": note}
    if check.answer is not None:
        detail["replaces"] = check.answer.answer
    event = append_event(project, by, "answer", detail, _time(time))
    check.answer = ManualAnswer(answer=answer, by=by, time=event.time, note=note)
    return check.answer


def comment(project: Project, stage_id: str, author: str, text: str, check_id: str | None = None,
            time: str | None = None) -> Comment:
    """Add a comment to a stage, or to one of its checks when ``check_id`` is given."""
    stage = _stage(project, stage_id)
    if check_id is not None:
        _check(stage, check_id)
    author = _person(author, "the comment's author")
    if not text.strip():
        raise ReviewError("a comment needs some text")
    event = append_event(project, author, "comment",
                         {"stage": stage.id, "check": check_id, "index": len(stage.comments), "text": text},
                         _time(time))
    note = Comment(author=author, time=event.time, text=text, resolved=False, check=check_id)
    stage.comments.append(note)
    return note


def resolve(project: Project, stage_id: str, comment_index: int, by: str, time: str | None = None) -> Comment:
    """Mark the stage's comment at ``comment_index`` (0-based) resolved."""
    stage = _stage(project, stage_id)
    by = _person(by, "the name of who resolves the comment")
    if not 0 <= comment_index < len(stage.comments):
        raise ReviewError(f'stage "{stage_id}" has no comment {comment_index + 1} '
                          f"(it has {len(stage.comments)})")
    target = stage.comments[comment_index]
    if target.resolved:
        raise ReviewError(f'comment {comment_index + 1} of stage "{stage_id}" is already resolved')
    append_event(project, by, "comment resolved",
                 {"stage": stage.id, "index": comment_index, "author": target.author, "text": target.text},
                 _time(time))
    target.resolved = True
    return target


def record_part_changes(old_project: Project, new_project: Project, who: str,
                        time: str | None = None) -> AuditEvent | None:
    """Append to ``new_project.audit`` one event listing what changes behaviour since ``old_project``.

    Call it when saving, with the project as it was last saved (or loaded) and as it is now.
    Lists changed parts, ports, models, settings, check limits and stages added, removed or
    moved (names, notes and review records are left out: they have their own events), and the
    sign-offs the change makes stale. Returns ``None`` and records nothing when nothing of
    behaviour changed.
    """
    who = _person(who, "the name of who saved the changes")
    difference = diff_projects(old_project, new_project)
    changes = [change for change in difference.changes if change.behaviour]
    if not changes:
        return None
    detail: dict[str, Any] = {
        "changes": [{"stage": c.stage_id, "subject": c.subject, "kind": c.kind, "field": c.field,
                     "old": c.old, "new": c.new} for c in changes],
        "stale_signoffs": [item.as_json() for item in difference.stale],
        "fingerprints": {stage.id: stage_fingerprint(stage, new_project) for stage in new_project.stages},
    }
    return append_event(new_project, who, "part change", detail, _time(time))


def record_packet(project: Project, packet_sha256: str, who: str, file_sha256: str | None = None,
                  time: str | None = None) -> AuditEvent:
    """Record that a review packet was printed, naming the SHA-256 of the PDF (and of the file)."""
    who = _person(who, "the name of who printed the packet")
    if not _HEX64.fullmatch(packet_sha256):
        raise ReviewError("the packet's SHA-256 must be 64 lower-case hexadecimal digits")
    detail: dict[str, Any] = {"packet_sha256": packet_sha256}
    if file_sha256 is not None:
        if not _HEX64.fullmatch(file_sha256):
            raise ReviewError("the file's SHA-256 must be 64 lower-case hexadecimal digits")
        detail["file_sha256"] = file_sha256
    return append_event(project, who, "packet", detail, _time(time))
