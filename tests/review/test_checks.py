"""Check evaluation against a provider built on closed forms (not on numbers the code produced)."""

from __future__ import annotations

import math

import pytest
from review_helpers import base_document, base_project, project_from

from stagewise.model.project import Project
from stagewise.model.values import Quantity
from stagewise.review.actions import answer as record_answer
from stagewise.review.actions import waive
from stagewise.review.checks import CheckResult, UnavailableProvider, evaluate_check, evaluate_project, totals
from stagewise.review.words import CheckState


class RcClosedForm:
    """Metrics of the "rc" stage from the first-order RC low-pass formulas.

    Source: first-order RC low-pass H(jω) = 1 / (1 + jωRC), corner f_c = 1/(2πRC); any circuits
    text, e.g. Nilsson & Riedel, *Electric Circuits*, chapter on frequency-selective circuits.
    """

    def __init__(self, project: Project) -> None:
        stage = project.stage("rc")
        assert stage is not None
        r1, c1 = stage.part("R1"), stage.part("C1")
        assert r1 is not None and r1.value is not None and c1 is not None and c1.value is not None
        self.corner_hz = 1.0 / (2.0 * math.pi * r1.value.si * c1.value.si)
        self.calls: list[tuple[str, str, str, float | None]] = []

    def metric_value(self, metric: str, where: str, stage_id: str,
                     at_hz: float | None) -> tuple[float | None, str | None]:
        self.calls.append((metric, where, stage_id, at_hz))
        if stage_id != "rc":
            return None, "this test provider only knows the RC stage"
        if metric == "f_high_3db_hz":
            return self.corner_hz, None
        if metric == "gain_db" and at_hz is not None:
            return -10.0 * math.log10(1.0 + (at_hz / self.corner_hz) ** 2), None
        if metric == "phase_deg" and at_hz is not None:
            return -math.degrees(math.atan(at_hz / self.corner_hz)), None
        return None, f"this test provider does not compute {metric}"


def _result(project: Project, stage_id: str, check_id: str) -> CheckResult:
    results = {(r.stage_id, r.check_id): r for r in evaluate_project(project, RcClosedForm(project))}
    return results[(stage_id, check_id)]


def test_numeric_checks_met_from_closed_forms() -> None:
    project = base_project()
    # 3k3 and 4n7: f_c = 1/(2π·3300·4.7e-9) ≈ 10.26 kHz, above the 9 kHz minimum.
    corner = _result(project, "rc", "corner")
    assert corner.state is CheckState.MET
    assert corner.value == pytest.approx(1 / (2 * math.pi * 3300 * 4.7e-9), rel=1e-12)
    assert corner.unit == "Hz" and corner.limits == "≥ 9 kHz"
    # At 100 Hz the loss is 10·log10(1 + (100/10260)²) ≈ 0.0004 dB: within ±0.05 dB.
    assert _result(project, "rc", "flat").state is CheckState.MET


def test_numeric_check_not_met_names_the_side() -> None:
    document = base_document()
    document["stages"][0]["parts"][1]["value"] = "6n8"  # f_c ≈ 7.09 kHz < 9 kHz
    result = _result(project_from(document), "rc", "corner")
    assert result.state is CheckState.NOT_MET
    assert "below the minimum" in (result.why or "")
    document["stages"][0]["checks"][1]["at_hz"] = 5000  # -10log10(1+(5000/10260)^2) ≈ -0.94 dB
    document["stages"][0]["parts"][1]["value"] = "4n7"
    result = _result(project_from(document), "rc", "flat")
    assert result.state is CheckState.NOT_MET
    assert result.value == pytest.approx(-10 * math.log10(1 + (5000 * 2 * math.pi * 3300 * 4.7e-9) ** 2))


def test_limits_are_inclusive() -> None:
    project = base_project()
    stage = project.stage("rc")
    assert stage is not None
    exact = 1 / (2 * math.pi * 3300 * 4.7e-9)
    stage.checks[0].min = Quantity(exact, exact)
    assert evaluate_check(stage.checks[0], stage, project, RcClosedForm(project)).state is CheckState.MET
    stage.checks[0].min = Quantity(exact * (1 + 1e-12), exact * (1 + 1e-12))
    assert evaluate_check(stage.checks[0], stage, project, RcClosedForm(project)).state is CheckState.NOT_MET


def test_no_value_carries_the_providers_reason() -> None:
    project = base_project()
    result = _result(project, "buf", "pm")
    assert result.state is CheckState.NO_VALUE
    assert result.value is None
    assert result.why == "this test provider only knows the RC stage"
    unavailable = evaluate_project(project, UnavailableProvider("the analysis engine is not available"))
    numeric = [r for r in unavailable if r.metric is not None]
    assert {r.state for r in numeric} == {CheckState.NO_VALUE}
    assert {r.why for r in numeric} == {"the analysis engine is not available"}


def test_waived_counts_as_waived_even_when_not_met() -> None:
    document = base_document()
    document["stages"][0]["parts"][1]["value"] = "6n8"
    project = project_from(document)
    waive(project, "rc", "corner", "Ana Ruiz", "quality", "the next stage limits the band anyway",
          time="2026-11-02T08:00:00Z")
    result = _result(project, "rc", "corner")
    assert result.state is CheckState.WAIVED
    assert result.value is not None  # the value is still shown
    assert "the next stage limits the band anyway" in (result.why or "")
    assert "without the waiver: not met" in (result.why or "")
    assert totals([result]).waived == 1 and totals([result]).met == 0


@pytest.mark.parametrize(("answer", "state"), [(None, CheckState.OPEN), ("yes", CheckState.MET),
                                               ("no", CheckState.NOT_MET), ("n/a", CheckState.NOT_APPLICABLE)])
def test_manual_checks(answer: str | None, state: CheckState) -> None:
    project = base_project()
    if answer is not None:
        record_answer(project, "rc", "layout", answer, "Ana", time="2026-11-02T08:00:00Z")
    result = _result(project, "rc", "layout")
    assert result.state is state
    assert result.value is None and result.metric is None


def test_frequency_rules() -> None:
    project = base_project()
    stage = project.stage("rc")
    assert stage is not None
    provider = RcClosedForm(project)
    # gain_db without at_hz is read at settings.ref_hz (100 Hz here).
    stage.checks[1].at_hz = None
    result = evaluate_check(stage.checks[1], stage, project, provider)
    assert result.at_hz == 100 and provider.calls[-1] == ("gain_db", "isolated", "rc", 100.0)
    # phase_deg needs a frequency of its own: no value, without asking the provider.
    stage.checks[1].metric = "phase_deg"
    calls = len(provider.calls)
    result = evaluate_check(stage.checks[1], stage, project, provider)
    assert result.state is CheckState.NO_VALUE and "at_hz" in (result.why or "")
    assert len(provider.calls) == calls
    # The corner frequency ignores at_hz.
    stage.checks[0].at_hz = Quantity(5, 5.0)
    evaluate_check(stage.checks[0], stage, project, provider)
    assert provider.calls[-1][3] is None


def test_a_metric_not_taken_there_has_no_value() -> None:
    project = base_project()
    stage = project.stage("buf")
    assert stage is not None
    stage.checks[0].where = "chain"  # phase margin belongs to a stage's loops, not to the chain
    result = evaluate_check(stage.checks[0], stage, project, RcClosedForm(project))
    assert result.state is CheckState.NO_VALUE
    assert "isolated, in chain" in (result.why or "")


class _Failing:
    def __init__(self, value: float | None = None) -> None:
        self.value = value

    def metric_value(self, metric: str, where: str, stage_id: str,
                     at_hz: float | None) -> tuple[float | None, str | None]:
        if self.value is None:
            raise ValueError("stage rc: the circuit matrix is singular")
        return self.value, None


def test_failing_or_non_finite_analyses_give_no_value() -> None:
    project = base_project()
    stage = project.stage("rc")
    assert stage is not None
    failed = evaluate_check(stage.checks[0], stage, project, _Failing())
    assert failed.state is CheckState.NO_VALUE and "singular" in (failed.why or "")
    for bad in (math.nan, math.inf):
        result = evaluate_check(stage.checks[0], stage, project, _Failing(bad))
        assert result.state is CheckState.NO_VALUE and result.value is None


def test_totals_for_the_cover() -> None:
    document = base_document()
    document["stages"][0]["parts"][1]["value"] = "6n8"   # corner not met
    project = project_from(document)
    results = evaluate_project(project, RcClosedForm(project))
    counted = totals(results)
    # corner: not met; flat: met; layout: open; pm: no value.
    assert (counted.met, counted.not_met, counted.open, counted.no_value, counted.waived) == (1, 1, 1, 1, 0)
    assert counted.total == 4 and not counted.all_passing
    assert counted.sentence().startswith("4 checks: 1 met, 1 not met, 0 waived, 1 open, 1 no value")


def test_a_waiver_or_answer_written_outside_the_program_never_makes_a_check_pass() -> None:
    # Common practice, no source: a record no audit event holds is not a decision.
    document = base_document()
    document["stages"][0]["parts"][1]["value"] = "6n8"
    document["stages"][0]["checks"][0]["waiver"] = {"by": "Ana Ruiz", "role": "quality", "time": "2026-11-02T08:00:00Z",
                                                    "justification": "pasted by hand"}
    document["stages"][0]["checks"][2]["answer"] = {"answer": "yes", "by": "Ana", "time": "2026-11-02T08:00:00Z"}
    project = project_from(document)
    corner = _result(project, "rc", "corner")
    assert corner.state is CheckState.NOT_MET
    assert "waiver in the file is unrecorded" in (corner.why or "")
    layout = _result(project, "rc", "layout")
    assert layout.state is CheckState.OPEN
    assert "answer in the file is unrecorded" in (layout.why or "")
