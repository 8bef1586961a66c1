"""Sign-off states: which sign-offs still hold, which are stale, and each stage's overall state.

A sign-off stores the stage fingerprint it saw (:func:`stagewise.model.fingerprint.stage_fingerprint`);
it is **stale** as soon as the stage's current fingerprint differs. A stage's state looks at
each reviewer's latest sign-off that is still current: any asking for changes makes the stage
``changes needed``; otherwise any approval makes it ``approved``; sign-offs that are all stale
make it ``stale``; none at all is ``not signed``.
"""

from __future__ import annotations

from dataclasses import dataclass

from stagewise.model.fingerprint import stage_fingerprint
from stagewise.model.project import Project, Signoff, Stage
from stagewise.review.words import SignoffState

__all__ = ["SignoffView", "StageSignoffs", "is_stale", "signoff_state", "signoff_states"]


@dataclass(frozen=True, slots=True)
class SignoffView:
    """One recorded sign-off with its position in ``stage.signoffs`` and whether it is stale."""

    index: int
    signoff: Signoff
    stale: bool
    superseded: bool

    @property
    def word(self) -> str:
        """``approved``, ``changes needed``, or ``stale`` when the stage changed since."""
        if self.stale:
            return str(SignoffState.STALE)
        return str(SignoffState.APPROVED if self.signoff.verdict == "approve" else SignoffState.CHANGES)


@dataclass(frozen=True, slots=True)
class StageSignoffs:
    """A stage's sign-off state, its current fingerprint and every sign-off with its staleness.

    ``superseded`` sign-offs are earlier sign-offs of a reviewer who signed again later; they
    stay in the record and do not count towards the state.
    """

    stage_id: str
    state: SignoffState
    fingerprint: str
    signoffs: tuple[SignoffView, ...]

    @property
    def stale_count(self) -> int:
        return sum(1 for view in self.signoffs if view.stale and not view.superseded)


def is_stale(signoff: Signoff, stage: Stage, project: Project) -> bool:
    """True when ``signoff`` was given to a different version of ``stage`` than the current one."""
    return signoff.fingerprint != stage_fingerprint(stage, project)


def _state_of(stage: Stage, project: Project) -> StageSignoffs:
    current = stage_fingerprint(stage, project)
    latest_by_reviewer: dict[str, int] = {}
    for index, signoff in enumerate(stage.signoffs):
        latest_by_reviewer[signoff.name.strip().casefold()] = index
    latest = set(latest_by_reviewer.values())
    views = tuple(
        SignoffView(index, signoff, signoff.fingerprint != current, index not in latest)
        for index, signoff in enumerate(stage.signoffs)
    )
    live = [view for view in views if not view.superseded and not view.stale]
    if any(view.signoff.verdict == "changes" for view in live):
        state = SignoffState.CHANGES
    elif live:
        state = SignoffState.APPROVED
    elif views:
        state = SignoffState.STALE
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
    return _state_of(stage, project)


def signoff_states(project: Project) -> dict[str, StageSignoffs]:
    """Every stage's sign-off state, in chain order, keyed by stage id."""
    return {stage.id: _state_of(stage, project) for stage in project.stages}
