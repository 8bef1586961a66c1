"""Measurements against the prediction: deviation, the Monte Carlo envelope, step metrics, staleness."""

from __future__ import annotations

import copy
import json
import math
from typing import Any

import numpy as np
import pytest

from stagewise.engine.analysis import ProjectAnalysis, response_points
from stagewise.engine.measured import capture_step, compare_measurement
from stagewise.files.project_file import loads_project
from stagewise.model.fingerprint import measurement_fingerprint
from stagewise.model.project import Measurement, Project
from stagewise.review.checks import evaluate_check

R_OHM, C_F = 22e3, 4.7e-9  # our own values: f_c = 1/(2πRC) ≈ 1.539 kHz
DOCUMENT: dict[str, Any] = {
    "format": "stagewise-project", "version": 1, "title": "Bench test", "revision": "1",
    "settings": {"f_min_hz": 10, "f_max_hz": "1M", "points_per_decade": 50, "temperature_c": 25,
                 "ref_hz": 100, "noise_band_hz": None, "seed": 7, "mc_samples": 400},
    "stages": [
        {"id": "rc", "name": "RC low-pass", "ports": {"in": "in", "out": "out"},
         "parts": [{"ref": "R1", "type": "R", "nodes": ["in", "out"], "value": R_OHM, "tol": "1%"},
                   {"ref": "C1", "type": "C", "nodes": ["out", "0"], "value": C_F, "tol": "5%"}],
         "checks": [{"id": "bench", "text": "Board within the predicted spread",
                     "metric": "measured_inside_spread_pct", "where": "isolated", "min": 100},
                    {"id": "dev", "text": "Board within 0.5 dB", "metric": "measured_dev_db_max",
                     "where": "isolated", "max": 0.5}]},
    ],
}  # fmt: skip

F_HZ = np.logspace(2, 5, 61)  # 100 Hz … 100 kHz, where the RC product shows


def _project() -> Project:
    return loads_project(json.dumps(copy.deepcopy(DOCUMENT)), "bench test")


def _lowpass(f_hz: np.ndarray, rc_s: float) -> np.ndarray:
    # Source: first-order RC low-pass, H = 1/(1 + jωRC), any circuits text (Nilsson & Riedel).
    return 1.0 / (1.0 + 2j * np.pi * f_hz * rc_s)


def _attach(project: Project, f_hz: np.ndarray, response: np.ndarray, where: str = "isolated") -> Measurement:
    measurement = Measurement(
        id=f"m{len(project.measurements) + 1}", kind="response", where=where, stage="rc", file="board.s2p",
        sha256="0" * 64, by="tester", time="2026-12-03T10:00:00Z",
        fingerprint=measurement_fingerprint(project, where, "rc"),
        f_hz=[float(f) for f in f_hz], re=[float(v) for v in response.real], im=[float(v) for v in response.imag])
    project.measurements.append(measurement)
    return measurement


def test_prediction_on_measured_frequencies_equals_the_response_command() -> None:
    project = _project()
    unit, expected, why = response_points(project, list(F_HZ), "rc")
    assert why is None and expected is not None
    comparison = compare_measurement(project, _attach(project, F_HZ, expected))
    # Reference: the closed form of the RC low-pass, and our own response path to 1e-12.
    np.testing.assert_allclose(comparison.predicted, _lowpass(F_HZ, R_OHM * C_F), rtol=1e-12)
    assert comparison.dev_db_max is not None and comparison.dev_db_max < 1e-9
    assert comparison.dev_deg_max is not None and comparison.dev_deg_max < 1e-9


def test_board_with_a_capacitor_off_nominal_gives_the_formula_deviation() -> None:
    project = _project()
    board = _lowpass(F_HZ, R_OHM * C_F * 1.02)  # C 2 % high: inside its 5 % tolerance
    comparison = compare_measurement(project, _attach(project, F_HZ, board))
    # Source: first-order RC low-pass; the deviation is 20·log10|H'(jω)/H(jω)| and arg(H'/H).
    ratio = board / _lowpass(F_HZ, R_OHM * C_F)
    np.testing.assert_allclose(comparison.dev_db, 20 * np.log10(np.abs(ratio)), atol=1e-12)
    np.testing.assert_allclose(comparison.dev_deg, np.degrees(np.angle(ratio)), atol=1e-10)
    assert comparison.dev_db_max == pytest.approx(float(np.max(np.abs(20 * np.log10(np.abs(ratio))))), rel=1e-9)
    # The response depends only on the product RC (Source: same formula); 400 samples of R ±1 % and
    # C ±5 % uniform reach beyond +2 % on the product, so every point lies inside the envelope.
    assert comparison.inside_spread_pct == 100.0
    analysis = ProjectAnalysis(project)
    stage = project.stages[0]
    states = {check.id: str(evaluate_check(check, stage, project, analysis).state) for check in stage.checks}
    assert states == {"bench": "met", "dev": "met"}


def test_board_outside_the_tolerances_is_outside_the_spread() -> None:
    project = _project()
    board = _lowpass(F_HZ, R_OHM * C_F * 1.09)  # RC 9 % high: beyond 1.01·1.05 − 1 ≈ 6 %
    comparison = compare_measurement(project, _attach(project, F_HZ, board))
    # Source: first-order RC low-pass; no sample's RC product can exceed (1.01)(1.05), so no point is inside.
    assert comparison.inside_spread_pct == 0.0
    analysis = ProjectAnalysis(project)
    stage = project.stages[0]
    result = evaluate_check(stage.checks[0], stage, project, analysis)
    assert str(result.state) == "not met" and result.value == 0.0


def test_added_noise_of_known_rms_gives_the_expected_deviation_statistics() -> None:
    project = _project()
    f_hz = np.logspace(1, 5, 4001)
    nominal = _lowpass(f_hz, R_OHM * C_F)
    generator = np.random.default_rng(20261203)
    sigma_db, sigma_deg = 0.05, 0.3
    noisy = nominal * 10 ** (generator.normal(0, sigma_db, f_hz.size) / 20) \
        * np.exp(1j * np.radians(generator.normal(0, sigma_deg, f_hz.size)))
    comparison = compare_measurement(project, _attach(project, f_hz, noisy))
    # Source: the RMS of N normal deviates estimates σ with a relative standard error of 1/√(2N)
    # (≈ 1.1 % for N = 4001; common practice, no source); allow four standard errors.
    tolerance = 4 / math.sqrt(2 * f_hz.size)
    assert comparison.dev_db_rms == pytest.approx(sigma_db, rel=tolerance)
    assert comparison.dev_deg_rms == pytest.approx(sigma_deg, rel=tolerance)
    # Source: the largest of N = 4001 normal deviates lies near σ·√(2 ln N) ≈ 4.07 σ (extreme-value
    # approximation, common practice); within 3 σ … 5.5 σ.
    assert comparison.dev_db_max is not None and 3 * sigma_db < comparison.dev_db_max < 5.5 * sigma_db


def test_a_changed_stage_makes_the_measurement_stale_and_its_checks_give_no_value() -> None:
    project = _project()
    _attach(project, F_HZ, _lowpass(F_HZ, R_OHM * C_F))
    comparison = compare_measurement(project, project.measurements[0])
    assert comparison.stale is False
    project.stages[0].parts[1].value = type(project.stages[0].parts[1].value).of("5n6")  # type: ignore[union-attr]
    assert compare_measurement(project, project.measurements[0]).stale is True
    analysis = ProjectAnalysis(project)
    result = evaluate_check(project.stages[0].checks[0], project.stages[0], project, analysis)
    assert str(result.state) == "no value"
    assert "out of date" in (result.why or "")
    # A new check limit is not a change of the board (Common practice, no source: what was measured
    # is the circuit, not the checklist).
    fresh = _project()
    _attach(fresh, F_HZ, _lowpass(F_HZ, R_OHM * C_F))
    fresh.stages[0].checks[1].max = type(fresh.stages[0].parts[0].value).of(0.2)  # type: ignore[union-attr]
    assert compare_measurement(fresh, fresh.measurements[0]).stale is False


def test_analyze_document_lists_every_measurement() -> None:
    project = _project()
    _attach(project, F_HZ, _lowpass(F_HZ, R_OHM * C_F * 1.02))
    document = ProjectAnalysis(project, spread=False).document()
    (entry,) = document["measurements"]
    assert set(entry) >= {"id", "file", "sha256", "where", "stage", "stale", "points", "dev_db_max", "dev_deg_max",
                          "inside_spread_pct"}
    assert entry["points"] == F_HZ.size and entry["stale"] is False and entry["where"] == "isolated"


def test_in_chain_and_chain_places_compare_against_the_loaded_response() -> None:
    document = copy.deepcopy(DOCUMENT)
    document["load"] = {"r_ohm": "47k", "c_f": None}
    project = loads_project(json.dumps(document), "loaded")
    unit, loaded, why = response_points(project, list(F_HZ), "rc", in_chain=True)
    assert loaded is not None
    # Source: RC low-pass loaded by R_L: H = (R_L/(R+R_L)) / (1 + jω·C·(R∥R_L)), any circuits text.
    r_load = 47e3
    expected = (r_load / (R_OHM + r_load)) / (1 + 2j * np.pi * F_HZ * C_F * R_OHM * r_load / (R_OHM + r_load))
    for where in ("in_chain", "chain"):
        measurement = _attach(project, F_HZ, expected, where=where)
        if where == "chain":
            measurement.stage = None
            measurement.fingerprint = measurement_fingerprint(project, "chain", None)
        comparison = compare_measurement(project, measurement)
        assert comparison.dev_db_max is not None and comparison.dev_db_max < 1e-9, where
        assert comparison.stale is False


def test_step_capture_metrics_follow_the_first_order_formulas() -> None:
    tau = 1e-4
    t_s = np.linspace(-2e-4, 1.2e-3, 14001)
    v = np.where(t_s < 0, 0.25, 0.25 + 2.0 * (1 - np.exp(-np.clip(t_s, 0, None) / tau)))
    step, why = capture_step(t_s, v)
    assert why is None and step is not None
    # Source: first-order step: 10–90 % rise time ln(9)·τ; 1 % settling at ln(100)·τ; no overshoot
    # (any control text, e.g. Ogata, Modern Control Engineering, ch. 5).
    assert step.rise_s == pytest.approx(math.log(9) * tau, rel=2e-3)
    assert step.settle_1pct_s == pytest.approx(math.log(100) * tau, rel=2e-3)
    # The final value is the mean of the capture's last tenth, a hair below its last samples
    # (2·e^(−10.8) ≈ 4e-5 V short): the "overshoot" is that gap, far below any limit.
    assert step.overshoot_pct is not None and step.overshoot_pct < 0.01
    assert step.final == pytest.approx(2.0, rel=1e-4)


def test_step_capture_overshoot_of_a_second_order_response() -> None:
    zeta, wn = 0.4, 2 * math.pi * 5e3
    t_s = np.linspace(0, 3e-3, 30001)
    wd = wn * math.sqrt(1 - zeta**2)
    # Source: underdamped second-order step response and its overshoot exp(−πζ/√(1−ζ²)),
    # Ogata, Modern Control Engineering, ch. 5.
    y = 1 - np.exp(-zeta * wn * t_s) * (np.cos(wd * t_s) + zeta / math.sqrt(1 - zeta**2) * np.sin(wd * t_s))
    step, _ = capture_step(t_s, y)
    assert step is not None
    assert step.overshoot_pct == pytest.approx(100 * math.exp(-math.pi * zeta / math.sqrt(1 - zeta**2)), rel=1e-4)


def test_validation_names_each_bad_measurement_record() -> None:
    from stagewise.model.validate import validate

    project = _project()
    _attach(project, F_HZ, _lowpass(F_HZ, R_OHM * C_F))
    _attach(project, F_HZ, _lowpass(F_HZ, R_OHM * C_F))
    project.measurements[1].id = "m1"
    project.measurements[1].stage = "absent"
    project.measurements[1].im = project.measurements[1].im[:-1]
    problems = validate(project)
    # Common practice, no source: every record is named by its JSON path.
    assert 'measurements[1].id: "m1" is used by another measurement' in problems
    assert 'measurements[1].stage: "absent" is not a stage of this project' in problems
    assert "measurements[1].data: the columns f_hz, re, im differ in length" in problems


def test_dc_only_keys_and_check_limits_leave_a_measurement_current() -> None:
    # Common practice, no source: an offset voltage or a tempco does not change a small-signal
    # frequency response, so the bench measurement of it stays current.
    project = _project()
    before = measurement_fingerprint(project, "isolated", "rc")
    project.stages[0].parts[0].tc_ppm_per_c = type(project.stages[0].parts[0].value).of(50)  # type: ignore[union-attr]
    assert measurement_fingerprint(project, "isolated", "rc") == before
    project.stages[0].parts[0].value = type(project.stages[0].parts[0].value).of("22k1")  # type: ignore[union-attr]
    assert measurement_fingerprint(project, "isolated", "rc") != before


def test_without_tolerances_there_is_no_spread_to_be_inside() -> None:
    # Common practice, no source: a share of points inside a spread needs a spread; none is made up.
    document = copy.deepcopy(DOCUMENT)
    for part in document["stages"][0]["parts"]:
        part.pop("tol")
    project = loads_project(json.dumps(document), "no tolerances")
    comparison = compare_measurement(project, _attach(project, F_HZ, _lowpass(F_HZ, R_OHM * C_F)))
    assert comparison.dev_db_max is not None and comparison.dev_db_max < 1e-9
    assert comparison.inside_spread_pct is None and "no part" in comparison.why["inside_spread_pct"]


def test_a_step_capture_is_listed_beside_the_predicted_step_of_its_place() -> None:
    project = _project()
    tau = R_OHM * C_F
    t_s = np.linspace(-0.1 * tau, 12 * tau, 6001)
    v = np.where(t_s < 0, 0.0, 0.8 * (1 - np.exp(-np.clip(t_s, 0, None) / tau)))
    project.measurements.append(Measurement(
        id="step", kind="step", where="isolated", stage="rc", file="scope.csv", sha256="1" * 64, by="tester",
        time="2026-12-03T10:00:00Z", fingerprint=measurement_fingerprint(project, "isolated", "rc"),
        t_s=[float(t) for t in t_s], v=[float(x) for x in v]))
    (entry,) = ProjectAnalysis(project, spread=False).document()["measurements"]
    # Source: first-order RC step, 10–90 % rise time ln(9)·RC (any control text); measured by the
    # same code from the capture and from the prediction, so both read the same within sampling.
    assert entry["step"]["rise_s"] == pytest.approx(math.log(9) * tau, rel=2e-3)
    assert entry["predicted_step"]["rise_s"] == pytest.approx(math.log(9) * tau, rel=1e-6)
    assert entry["dev_db_max"] is None and "step capture" in entry["dev_db_max_why"]


def test_checks_on_a_step_capture_read_its_rise_overshoot_and_settling() -> None:
    from stagewise.model.project import Check  # noqa: PLC0415
    from stagewise.model.values import Quantity  # noqa: PLC0415

    project = _project()
    tau = R_OHM * C_F
    t_s = np.linspace(-0.1 * tau, 12 * tau, 6001)
    v = np.where(t_s < 0, 0.0, 0.8 * (1 - np.exp(-np.clip(t_s, 0, None) / tau)))
    stage = project.stages[0]
    checks = [Check(id="rise", text="rise", metric="measured_rise_s", where="isolated", max=Quantity.of(3 * tau)),
              Check(id="settle", text="settle", metric="measured_settle_1pct_s", where="isolated",
                    max=Quantity.of(4 * tau)),
              Check(id="over", text="overshoot", metric="measured_overshoot_pct", where="isolated",
                    max=Quantity.of(1)),
              Check(id="chain", text="chain rise", metric="measured_rise_s", where="chain", max=Quantity.of(1))]
    stage.checks.extend(checks)
    project.measurements.append(Measurement(
        id="scope", kind="step", where="isolated", stage=stage.id, file="scope.csv", sha256="1" * 64, by="tester",
        time="2026-12-03T10:00:00Z", fingerprint=measurement_fingerprint(project, "isolated", stage.id),
        t_s=[float(t) for t in t_s], v=[float(x) for x in v]))
    analysis = ProjectAnalysis(project, spread=False)
    results = {check.id: evaluate_check(check, stage, project, analysis) for check in checks}
    # Source: first-order RC step: 10–90 % rise ln(9)·RC, 1 % settling ln(100)·RC, no overshoot
    # (any control text, e.g. Ogata, Modern Control Engineering, ch. 5).
    assert results["rise"].value == pytest.approx(math.log(9) * tau, rel=2e-3)
    assert results["rise"].state.name == "MET"
    assert results["settle"].value == pytest.approx(math.log(100) * tau, rel=2e-3)
    assert results["settle"].state.name == "NOT_MET"  # 4.6·RC > 4·RC
    assert results["over"].value is not None and results["over"].value < 0.01
    assert results["chain"].value is None and "no step capture is attached to the whole chain" in str(
        results["chain"].why)
    # A change of the stage makes the capture out of date: no value, as a measured response.
    stage.parts[0].value = Quantity.of(R_OHM * 2)
    result = evaluate_check(checks[0], stage, project, ProjectAnalysis(project, spread=False))
    assert result.value is None and "out of date" in str(result.why)


def test_a_million_samples_asked_are_bounded_for_the_envelope_too(monkeypatch: pytest.MonkeyPatch) -> None:
    import dataclasses

    import stagewise.engine.spread as spread

    project = _project()
    project = dataclasses.replace(project, settings=dataclasses.replace(project.settings, mc_samples=1_000_000))
    board = _lowpass(F_HZ, R_OHM * C_F * 1.02)  # C 2 % high: inside its 5 % tolerance
    measurement = _attach(project, F_HZ, board)
    # A bound this small lets about 300 samples of this RC at 61 frequencies through, so the test is
    # quick; the program's bound is the same code with about 8 s of work.
    per_sample = F_HZ.size * 12.0 ** 3
    monkeypatch.setattr(spread, "WORK_BOUND", 300 * per_sample)
    comparison = compare_measurement(project, measurement)
    assert comparison.notes and "300 of the 1000000 samples asked" in comparison.notes[0]
    # Source: first-order RC low-pass, as above: 300 samples of R ±1 % and C ±5 % still reach past
    # +2 % on the product, so every point lies inside the envelope.
    assert comparison.inside_spread_pct == 100.0
    # Below the bound's minimum of samples the envelope is not computed, with the reason.
    monkeypatch.setattr(spread, "WORK_BOUND", 50 * per_sample)
    comparison = compare_measurement(project, measurement)
    assert comparison.inside_spread_pct is None and "fewer than 100 samples fit" in comparison.why["inside_spread_pct"]
