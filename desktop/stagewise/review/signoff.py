"""Sign-off states: which sign-offs still hold, which are out of date, and each stage's overall state.

A sign-off stores the stage fingerprint it saw (:func:`stagewise.model.fingerprint.stage_fingerprint`);
it is **out of date** as soon as the stage's current fingerprint differs. A sign-off followed by a
later one of the same reviewer on the same stage is **replaced**. A stage's state looks at each
reviewer's latest sign-off that is still current: any returning it for rework makes the stage
``returned for rework``; otherwise any acceptance makes it ``accepted``; sign-offs that are all out
of date make it ``out of date``; none at all is ``not signed``. A sign-off that no audit event
accounts for (written or edited outside the program, :func:`stagewise.review.audit.check_records`)
is **unrecorded**: it never counts as a verdict, and a stage holding one is ``unrecorded`` until
it is signed again or the record is removed. The words come from :mod:`stagewise.review.words`.
"""

from __future__ import annotations

from dataclasses import dataclass

from stagewise.model.fingerprint import stage_fingerprint
from stagewise.model.project import Project, Signoff, Stage
from stagewise.review.audit import RecordsCheck, check_records
from stagewise.review.words import SignoffState, current_verdict

__all__ = ["SignoffView", "StageSignoffs", "is_out_of_date", "signoff_state", "signoff_states"]


@dataclass(frozen=True, slots=True)
class SignoffView:
    """One recorded sign-off with its position in ``stage.signoffs``, whether it is out of date
    (given to an earlier design of the stage) and whether it is replaced (the same reviewer
    signed the stage again later)."""

    index: int
    signoff: Signoff
    out_of_date: bool
    replaced: bool
    unrecorded: bool = False

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
        if self.out_of_date:
            return str(SignoffState.OUT_OF_DATE)
        return self.verdict_word


@dataclass(frozen=True, slots=True)
class StageSignoffs:
    """A stage's sign-off state, its current fingerprint and every sign-off with its standing.

    ``replaced`` sign-offs are earlier sign-offs of a reviewer who signed again later; they
    stay in the record and do not count towards the state.
    """

    stage_id: str
    state: SignoffState
    fingerprint: str
    signoffs: tuple[SignoffView, ...]

    @property
    def out_of_date_count(self) -> int:
        """Sign-offs that are out of date and not replaced (they ask for a new sign-off)."""
        return sum(1 for view in self.signoffs if view.out_of_date and not view.replaced)


def is_out_of_date(signoff: Signoff, stage: Stage, project: Project) -> bool:
    """True when ``signoff`` was given to a different design of ``stage`` than the current one."""
    return signoff.fingerprint != stage_fingerprint(stage, project)


def _state_of(stage: Stage, project: Project, records: RecordsCheck) -> StageSignoffs:
    current = stage_fingerprint(stage, project)
    unrecorded = {index for index in range(len(stage.signoffs)) if records.is_unrecorded("signoff", stage.id, index)}
    latest_by_reviewer: dict[str, int] = {}
    for index, signoff in enumerate(stage.signoffs):
        if index not in unrecorded:  # a record written outside the program replaces nothing
            latest_by_reviewer[signoff.name.strip().casefold()] = index
    latest = set(latest_by_reviewer.values())
    views = tuple(
        SignoffView(index, signoff, signoff.fingerprint != current, index not in latest and index not in unrecorded,
                    index in unrecorded)
        for index, signoff in enumerate(stage.signoffs)
    )
    live = [view for view in views if not view.replaced and not view.out_of_date and not view.unrecorded]
    if unrecorded:
        state = SignoffState.UNRECORDED
    elif any(current_verdict(view.signoff.verdict) == "rework" for view in live):
        state = SignoffState.REWORK
    elif live:
        state = SignoffState.ACCEPTED
    elif views:
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
    return _state_of(stage, project, check_records(project))


def signoff_states(project: Project) -> dict[str, StageSignoffs]:
    """Every stage's sign-off state, in chain order, keyed by stage id."""
    records = check_records(project)
    return {stage.id: _state_of(stage, project, records) for stage in project.stages}
