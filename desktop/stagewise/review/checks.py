"""Evaluating a project's checks: state computed each time, never stored (DESIGN section 4).

Numeric checks read their metric from a :class:`MetricProvider` (the analysis engine implements
one; tests use small closed-form ones) and compare it with ``min`` and ``max``, both inclusive.
A metric that cannot be computed gives ``no value`` with the provider's reason; nothing is made
up. A waived check is ``waived`` whatever its value (the value is still shown). Manual checks
are ``open`` until answered; ``yes`` is met, ``no`` is not met, ``n/a`` is not applicable.

Automatic findings stand beside the checks: what fails a design whether or not anyone wrote a
check for it (an unstable stage or chain, a converter driven past full scale, an op-amp output
that clips or is slew-limited at the declared input). A provider that can tell offers them
through ``findings()``; :func:`automatic_findings` collects them. They cannot be waived, and any
one of them fails the checklist (``check`` exits 1).
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, replace
from typing import Final, Protocol

from stagewise.model.project import Check, Project, Stage
from stagewise.model.values import format_value
from stagewise.review.audit import RecordsCheck, check_records, trusted_check
from stagewise.review.metrics import METRICS, metric_unit
from stagewise.review.words import ANSWER_WORDS, PASSING_STATES, WHERE_WORDS, CheckState

__all__ = [
    "FINDING_WORDS",
    "AutomaticFinding",
    "CheckResult",
    "CheckTotals",
    "MetricProvider",
    "UnavailableProvider",
    "automatic_findings",
    "evaluate_check",
    "evaluate_project",
    "evaluate_stage",
    "format_limits",
    "totals",
]


class MetricProvider(Protocol):
    """Where checks get their numbers.

    ``metric_value`` returns ``(value, None)`` with the value in the unit of
    :data:`stagewise.review.metrics.METRICS`, or ``(None, why)`` with one sentence saying why
    it cannot be computed. ``where`` is ``isolated``, ``in_chain``, ``from_input`` or ``chain``; ``at_hz`` is
    the frequency in hertz for metrics read at one (``None`` otherwise).
    """

    def metric_value(self, metric: str, where: str, stage_id: str,
                     at_hz: float | None) -> tuple[float | None, str | None]: ...


# The word shown for each kind of automatic finding (GUI, packet and command line).
FINDING_WORDS: Final[dict[str, str]] = {
    "unstable": "unstable",
    "over_range": "over-range",
    "swing": "clips",
    "slew": "slew-limited",
    "not_analysed": "not analysed",
}


class AutomaticFinding(Protocol):
    """One automatic finding (the engine's ``diagnostics.Finding`` has this shape).

    ``kind`` is a key of :data:`FINDING_WORDS`; ``stage_id`` the stage it belongs to (``None``
    for the chain or the converter); ``where`` the place (``isolated``, ``in_chain``,
    ``from_input``, ``chain``); ``ref`` the op-amp for swing and slew; ``sentence`` what and how
    much, in one sentence.
    """

    @property
    def kind(self) -> str: ...

    @property
    def stage_id(self) -> str | None: ...

    @property
    def where(self) -> str: ...

    @property
    def ref(self) -> str | None: ...

    @property
    def sentence(self) -> str: ...


def automatic_findings(provider: object) -> Sequence[AutomaticFinding]:
    """The provider's automatic findings (none when it offers no ``findings()``)."""
    source = getattr(provider, "findings", None)
    if source is None:
        return []
    found: Sequence[AutomaticFinding] = source()
    return found


@dataclass(frozen=True, slots=True)
class UnavailableProvider:
    """A provider that knows no values, saying why (for builds or states without an engine)."""

    why: str

    def metric_value(self, metric: str, where: str, stage_id: str,
                     at_hz: float | None) -> tuple[float | None, str | None]:
        return None, self.why


@dataclass(frozen=True, slots=True)
class CheckResult:
    """The evaluated state of one check.

    ``value`` is in ``unit`` (``None`` for manual checks and when there is no value);
    ``why`` explains a ``no value``, a ``not met`` or a manual answer in one sentence;
    ``at_hz`` is the frequency actually used (the reference frequency when the check gave none);
    ``reference`` names, in a few words, the pass-band gain a corner, peaking or attenuation
    was taken against (from the provider's optional ``metric_reference_words``).
    """

    stage_id: str
    check_id: str
    text: str
    metric: str | None
    where: str | None
    at_hz: float | None
    value: float | None
    unit: str
    limits: str
    state: CheckState
    why: str | None
    reference: str | None = None

    @property
    def passing(self) -> bool:
        """True when this check does not hold the checklist back (met, waived or n/a)."""
        return self.state in PASSING_STATES

    def value_text(self) -> str:
        """The value with an SI prefix and its unit, or a dash."""
        if self.value is None:
            return "—"
        return _format(self.value, self.unit)


def _format(value: float, unit: str) -> str:
    # Decibels, degrees and percentages read better without SI prefixes (−0.02 dB, not −20 mdB).
    if unit in ("dB", "dBΩ", "°", "%", ""):
        text = f"{value:.4g}"
        return f"{text} {unit}".rstrip() if unit != "°" else f"{text}°"
    return format_value(value, unit)


def format_limits(check: Check, unit: str) -> str:
    """The limits of a numeric check as people read them: ``≥ 40 dB``, ``≤ 1 µs``, ``-0.1 … 0.1 dB``."""
    low = None if check.min is None else _format(check.min.si, unit)
    high = None if check.max is None else _format(check.max.si, unit)
    if low is not None and high is not None:
        return f"{low} … {high}"
    if low is not None:
        return f"≥ {low}"
    if high is not None:
        return f"≤ {high}"
    return ""


def evaluate_check(check: Check, stage: Stage, project: Project, provider: MetricProvider) -> CheckResult:
    """Evaluate one check of ``stage``.

    Raises nothing for bad metrics or failing analyses: those become ``no value`` with a reason.
    """
    waiver = check.waiver
    if check.metric is None:
        return _evaluate_manual(check, stage)
    # A stage alone or in chain is driven as the stage says; the chain, and a stage seen from it, as the chain.
    drive = project.input.drive if check.where in ("chain", "from_input") else stage.drive
    unit = metric_unit(check.metric, drive) if check.metric in METRICS else ""
    limits = format_limits(check, unit)

    def result(state: CheckState, value: float | None, why: str | None, at_hz: float | None) -> CheckResult:
        if waiver is not None:
            who = f"{waiver.by} ({waiver.role})" if waiver.role else waiver.by
            # Keep what the check would say without the waiver: a waiver hides nothing.
            unwaived = f"{state}: {why}" if why else str(state)
            why = f"waived by {who}: {waiver.justification} (without the waiver: {unwaived})"
            state = CheckState.WAIVED
        return CheckResult(stage.id, check.id, check.text, check.metric, check.where, at_hz, value, unit,
                           limits, state, why, reference)

    reference: str | None = None

    entry = METRICS.get(check.metric)
    if entry is None:
        return result(CheckState.NO_VALUE, None, f'"{check.metric}" is not a metric Stagewise computes', None)
    if check.where not in entry.where:
        places = ", ".join(WHERE_WORDS[place] for place in entry.where)
        return result(CheckState.NO_VALUE, None,
                      f"{entry.label.lower()} is not taken {WHERE_WORDS.get(check.where, check.where)}; "
                      f"it can be taken: {places}", None)
    at_hz: float | None = None
    if entry.at_hz != "unused":
        if check.at_hz is not None:
            at_hz = check.at_hz.si
        elif entry.at_hz == "required":
            return result(CheckState.NO_VALUE, None,
                          f"{entry.label.lower()} is read at a frequency, and the check names none (at_hz)", None)
        elif project.settings.ref_hz is not None:
            at_hz = project.settings.ref_hz.si
    try:
        value, why = provider.metric_value(check.metric, check.where, stage.id, at_hz)
    except (ValueError, ArithmeticError) as error:
        return result(CheckState.NO_VALUE, None, f"the analysis failed: {error}", at_hz)
    words_of = getattr(provider, "metric_reference_words", None)
    if entry.referenced and value is not None and words_of is not None:
        reference = words_of(check.metric, check.where, stage.id)
    if value is None:
        return result(CheckState.NO_VALUE, None, why or "the analysis gave no value and no reason", at_hz)
    if not math.isfinite(value):
        return result(CheckState.NO_VALUE, None, f"the analysis gave {value}, not a finite number", at_hz)
    below = check.min is not None and value < check.min.si
    above = check.max is not None and value > check.max.si
    if below or above:
        side = "below the minimum" if below else "above the maximum"
        return result(CheckState.NOT_MET, value, f"{_format(value, unit)} is {side} ({limits})", at_hz)
    return result(CheckState.MET, value, None, at_hz)


def _evaluate_manual(check: Check, stage: Stage) -> CheckResult:
    answer = check.answer
    if check.waiver is not None:
        waiver = check.waiver
        who = f"{waiver.by} ({waiver.role})" if waiver.role else waiver.by
        state, why = CheckState.WAIVED, f"waived by {who}: {waiver.justification}"
    elif answer is None:
        state, why = CheckState.OPEN, "not answered yet"
    else:
        state = {"yes": CheckState.MET, "no": CheckState.NOT_MET}.get(answer.answer, CheckState.NOT_APPLICABLE)
        why = f"{ANSWER_WORDS.get(answer.answer, answer.answer)} by {answer.by}"
        if answer.note:
            why += f": {answer.note}"
    return CheckResult(stage.id, check.id, check.text, None, None, None, None, "", "", state, why)


def evaluate_stage(stage: Stage, project: Project, provider: MetricProvider,
                   records: RecordsCheck | None = None) -> list[CheckResult]:
    """Every check of ``stage``, in order. A waiver or answer no audit event accounts for
    (``records``, computed when not given) is ignored, with a sentence saying so."""
    records = check_records(project) if records is None else records
    results = []
    for check in stage.checks:
        trusted, ignored = trusted_check(check, stage.id, records)
        result = evaluate_check(trusted, stage, project, provider)
        if ignored is not None:
            result = replace(result, why=f"{result.why}; {ignored}" if result.why else ignored)
        results.append(result)
    return results


def evaluate_project(project: Project, provider: MetricProvider) -> list[CheckResult]:
    """Every check of every stage (bypassed stages included: their checks still stand), in order."""
    records = check_records(project)
    return [result for stage in project.stages for result in evaluate_stage(stage, project, provider, records)]


@dataclass(frozen=True, slots=True)
class CheckTotals:
    """How many checks are in each state, for the packet cover and the CLI summary."""

    met: int = 0
    not_met: int = 0
    no_value: int = 0
    waived: int = 0
    open: int = 0
    not_applicable: int = 0

    @property
    def total(self) -> int:
        return self.met + self.not_met + self.no_value + self.waived + self.open + self.not_applicable

    @property
    def all_passing(self) -> bool:
        """True when no check is not met, without value or open."""
        return self.not_met == 0 and self.no_value == 0 and self.open == 0

    def sentence(self) -> str:
        """``12 checks: 9 met, 1 not met, 1 waived, 1 open, 0 no value, 0 n/a``."""
        noun = "check" if self.total == 1 else "checks"
        return (f"{self.total} {noun}: {self.met} {CheckState.MET}, {self.not_met} {CheckState.NOT_MET}, "
                f"{self.waived} {CheckState.WAIVED}, {self.open} {CheckState.OPEN}, "
                f"{self.no_value} {CheckState.NO_VALUE}, {self.not_applicable} {CheckState.NOT_APPLICABLE}")


def totals(results: Iterable[CheckResult]) -> CheckTotals:
    """Count results by state."""
    counts = dict.fromkeys(CheckState, 0)
    for item in results:
        counts[item.state] += 1
    return CheckTotals(
        met=counts[CheckState.MET],
        not_met=counts[CheckState.NOT_MET],
        no_value=counts[CheckState.NO_VALUE],
        waived=counts[CheckState.WAIVED],
        open=counts[CheckState.OPEN],
        not_applicable=counts[CheckState.NOT_APPLICABLE],
    )
