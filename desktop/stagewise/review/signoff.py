"""Sign-off states: which sign-offs still hold, which are out of date, and each stage's overall state.

A sign-off stores the stage fingerprint it saw (:func:`stagewise.model.fingerprint.stage_fingerprint`);
it is **out of date** as soon as the stage's current fingerprint differs. Each reviewer is
represented by one sign-off, their latest given to the current design (else their latest); their
other sign-offs are **replaced** (normally by a later one; after an undo restores an earlier
design, by the earlier sign-off that matches it). A stage's state looks at each reviewer's
representing sign-off that is current: any returning it for rework makes the stage
``returned for rework``; otherwise any acceptance makes it ``accepted``; sign-offs that are all out
of date make it ``out of date``; none at all is ``not signed``. A sign-off that no audit event
accounts for (written or edited outside the program, :func:`stagewise.review.audit.check_records`)
is **unrecorded**: it never counts as a verdict, and a stage holding one is ``unrecorded`` until
it is signed again or the record is removed. Where the project asks for the four-eyes rule
(``settings.four_eyes``), an acceptance by the person who last changed the stage
(:func:`last_changed_by`) does not count either and is listed in ``four_eyes_breaches``. The
words come from :mod:`stagewise.review.words`.
"""

from __future__ import annotations

from dataclasses import dataclass

from stagewise.model.fingerprint import stage_fingerprint
from stagewise.model.project import Project, Signoff, Stage
from stagewise.review.audit import RecordsCheck, check_records
from stagewise.review.words import FOUR_EYES_WORD, VERDICTS, SignoffState, current_verdict

__all__ = ["SignoffView", "StageSignoffs", "is_out_of_date", "last_changed_by", "signoff_state", "signoff_states"]


@dataclass(frozen=True, slots=True)
class SignoffView:
    """One recorded sign-off with its position in ``stage.signoffs``, whether it is out of date
    (given to an earlier design of the stage) and whether it is replaced (another sign-off of the
    same reviewer stands for them: a later one, or the one given to the current design)."""

    index: int
    signoff: Signoff
    out_of_date: bool
    replaced: bool
    unrecorded: bool = False
    breaks_four_eyes: bool = False

    @property
    def verdict_word(self) -> str:
        """The verdict in words: ``accepted`` or ``returned for rework``."""
        return str(SignoffState.ACCEPTED if current_verdict(self.signoff.verdict) == "accept" else SignoffState.REWORK)

    @property
    def word(self) -> str:
        """``accepted``, ``returned for rework``, ``out of date`` when the stage changed since, or
        ``unrecorded`` when no audit event accounts for it."""
        if self.unrecorded:
            return str(SignoffState.UNRECORDED)
        if self.breaks_four_eyes:
            return FOUR_EYES_WORD
        if self.out_of_date:
            return str(SignoffState.OUT_OF_DATE)
        return self.verdict_word


@dataclass(frozen=True, slots=True)
class StageSignoffs:
    """A stage's sign-off state, its current fingerprint and every sign-off with its standing.

    ``replaced`` sign-offs are those of a reviewer another of their sign-offs stands for (a later
    one, or the one given to the current design); they
    stay in the record and do not count towards the state.
    """

    stage_id: str
    state: SignoffState
    fingerprint: str
    signoffs: tuple[SignoffView, ...]

    @property
    def four_eyes_breaches(self) -> tuple[SignoffView, ...]:
        """Acceptances by the person who last changed the stage, where the project's four-eyes
        rule (``settings.four_eyes``) forbids it; they do not count towards the state."""
        return tuple(view for view in self.signoffs if view.breaks_four_eyes)

    @property
    def out_of_date_count(self) -> int:
        """Sign-offs that are out of date and not replaced (they ask for a new sign-off)."""
        return sum(1 for view in self.signoffs if view.out_of_date and not view.replaced)


def is_out_of_date(signoff: Signoff, stage: Stage, project: Project) -> bool:
    """True when ``signoff`` was given to a different design of ``stage`` than the current one."""
    return signoff.fingerprint != stage_fingerprint(stage, project)


def last_changed_by(project: Project) -> dict[str, str]:
    """Who last changed each stage, from the audit trail: the ``who`` of the latest "part change"
    event listing a change of that stage, or of the "import" event that brought it in."""
    changed: dict[str, str] = {}
    for event in project.audit:
        if event.what == "import" and isinstance(event.detail.get("stage"), str):
            changed[event.detail["stage"]] = event.who
        elif event.what == "part change":
            for change in event.detail.get("changes") or []:
                if isinstance(change, dict) and isinstance(change.get("stage"), str):
                    changed[change["stage"]] = event.who
    return changed


def _state_of(stage: Stage, project: Project, records: RecordsCheck, changers: dict[str, str]) -> StageSignoffs:
    current = stage_fingerprint(stage, project)
    unrecorded = {index for index in range(len(stage.signoffs)) if records.is_unrecorded("signoff", stage.id, index)}
    # Each reviewer is represented by one sign-off: their latest given to the design as it is now,
    # else their latest. So undoing the edit a fresh sign-off was given to brings back the older
    # sign-off that matches the restored design.
    latest_by_reviewer: dict[str, int] = {}
    latest_current_by_reviewer: dict[str, int] = {}
    for index, signoff in enumerate(stage.signoffs):
        if index not in unrecorded:  # a record written outside the program replaces nothing
            reviewer = signoff.name.strip().casefold()
            latest_by_reviewer[reviewer] = index
            if signoff.fingerprint == current:
                latest_current_by_reviewer[reviewer] = index
    latest = {latest_current_by_reviewer.get(reviewer, index) for reviewer, index in latest_by_reviewer.items()}
    changer = changers.get(stage.id, "").strip().casefold() if project.settings.four_eyes else ""

    def breaks(signoff: Signoff) -> bool:
        return bool(changer) and signoff.name.strip().casefold() == changer \
            and current_verdict(signoff.verdict) == VERDICTS[0]

    views = tuple(
        SignoffView(index, signoff, signoff.fingerprint != current, index not in latest and index not in unrecorded,
                    index in unrecorded, breaks(signoff) and signoff.fingerprint == current)
        for index, signoff in enumerate(stage.signoffs)
    )
    live = [view for view in views
            if not view.replaced and not view.out_of_date and not view.unrecorded and not view.breaks_four_eyes]
    if unrecorded:
        state = SignoffState.UNRECORDED
    elif any(current_verdict(view.signoff.verdict) == VERDICTS[1] for view in live):
        state = SignoffState.REWORK
    elif live:
        state = SignoffState.ACCEPTED
    elif views and not any(view.breaks_four_eyes and not view.replaced for view in views):
        state = SignoffState.OUT_OF_DATE
    else:
        state = SignoffState.NONE
    return StageSignoffs(stage.id, state, current, views)


def signoff_state(project: Project, stage_id: str) -> StageSignoffs:
    """The sign-off state of one stage.

    Raises
    ------
    KeyError
        No stage has ``stage_id``.
    """
    stage = project.stage(stage_id)
    if stage is None:
        raise KeyError(f'the project has no stage "{stage_id}"')
    return _state_of(stage, project, check_records(project), last_changed_by(project))


def signoff_states(project: Project) -> dict[str, StageSignoffs]:
    """Every stage's sign-off state, in chain order, keyed by stage id."""
    records = check_records(project)
    changers = last_changed_by(project)
    return {stage.id: _state_of(stage, project, records, changers) for stage in project.stages}
