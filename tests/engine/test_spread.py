"""Monte Carlo and worst case over tolerances, against exact statistics and exhaustive corners."""

from __future__ import annotations

import itertools
import math
from typing import Any

import numpy as np
import pytest
from scipy import integrate  # type: ignore[import-untyped]

from stagewise.engine.mna import assemble
from stagewise.engine.spread import (
    YieldLimit,
    monte_carlo,
    sampled_response,
    spread_to_json,
    tolerance_model,
)
from stagewise.files.codec import decode
from stagewise.model.project import Project

TWO_PI = 2 * math.pi


def make_project(parts: list[dict[str, Any]], **settings: Any) -> Project:
    return decode({
        "format": "stagewise-project", "version": 1, "title": "spread test",
        "settings": {"f_min_hz": 1, "f_max_hz": 1e6, **settings},
        "opamp_models": {"m": {"a0_db": 100, "gbw_hz": "4M", "rout_ohm": 30}},
        "stages": [{"id": "s", "name": "stage", "ports": {"in": "in", "out": "out"}, "parts": parts}],
    })


def divider(r1: float, t1: str | None, r2: float, t2: str | None, **settings: Any) -> Project:
    return make_project([
        {"ref": "R1", "type": "R", "nodes": ["in", "out"], "value": r1, "tol": t1},
        {"ref": "R2", "type": "R", "nodes": ["out", "0"], "value": r2, "tol": t2},
    ], **settings)


def run(project: Project, **options: Any):  # type: ignore[no-untyped-def]
    system = assemble(project.stages[0], project)
    return monte_carlo(system, project, current_drive=False, **options)


def test_divider_mean_and_variance_match_exact_integrals() -> None:
    r1, t1, r2, t2 = 6.8e3, 0.05, 3.3e3, 0.02
    samples = 20000
    result = run(divider(r1, "5%", r2, "2%", ref_hz=100, seed=11), samples=samples, phase_margins=False,
                 worst_case=False, f_hz=np.logspace(1, 4, 31))
    gains = 10 ** (result.sample_values.gain_db / 20)

    def gain(x: float, y: float) -> float:  # x, y uniform on [-1, 1]: the parts' relative deviations
        a, b = r1 * (1 + t1 * x), r2 * (1 + t2 * y)
        return b / (a + b)

    # Reference library: scipy 1.17.1, integrate.dblquad (exact moments of R2/(R1+R2) under
    # independent uniform tolerances; the density of each deviation is 1/2 on [-1, 1]).
    mean = integrate.dblquad(lambda y, x: gain(x, y) / 4, -1, 1, -1, 1, epsabs=1e-14)[0]
    variance = integrate.dblquad(lambda y, x: (gain(x, y) - mean) ** 2 / 4, -1, 1, -1, 1, epsabs=1e-16)[0]
    fourth = integrate.dblquad(lambda y, x: (gain(x, y) - mean) ** 4 / 4, -1, 1, -1, 1, epsabs=1e-20)[0]
    # Confidence bound: 4 standard errors (two-sided failure chance about 6e-5 for a fresh seed).
    assert abs(gains.mean() - mean) < 4 * math.sqrt(variance / samples)
    assert abs(gains.var(ddof=1) - variance) < 4 * math.sqrt((fourth - variance**2) / samples)
    # First order, for the reader: var ≈ (g(1−g))²·(t1² + t2²)/3 (uniform variance t²/3).
    g0 = r2 / (r1 + r2)
    assert variance == pytest.approx((g0 * (1 - g0)) ** 2 * (t1**2 + t2**2) / 3, rel=0.01)


def test_normal_distribution_reads_tolerance_as_three_sigma() -> None:
    r1, r2, tol = 4.7e3, 12e3, 0.01
    samples = 20000
    result = run(divider(r1, None, r2, "1%", ref_hz=100), samples=samples, distribution="normal",
                 phase_margins=False, worst_case=False, f_hz=np.logspace(1, 4, 31))
    gains = 10 ** (result.sample_values.gain_db / 20)
    # Common practice, no source: a tolerance read as 3σ of a normal distribution.
    g0 = r2 / (r1 + r2)
    sigma_first_order = g0 * (1 - g0) * tol / 3  # d g / d ln R2 = g(1 − g); linearization error ~1e-4
    assert gains.std(ddof=1) == pytest.approx(sigma_first_order, rel=0.03)  # SE of a std: 1/sqrt(2N) = 0.5 %


def test_yield_of_a_gain_limit_matches_the_uniform_law() -> None:
    r1, r2, tol = 10e3, 10e3, 0.05
    samples = 20000
    limit_db = 20 * math.log10(0.51)  # R2/(R1+R2) <= 0.51  <=>  R2 <= R1·0.51/0.49
    result = run(divider(r1, None, r2, "5%", ref_hz=100), samples=samples, phase_margins=False,
                 worst_case=False, f_hz=np.logspace(1, 4, 31), limits=[YieldLimit("gain_db", max=limit_db)])
    # Common practice, no source: P(R2 <= x) for R2 uniform on [R(1−t), R(1+t)] is linear in x.
    threshold = r1 * 0.51 / 0.49
    probability = (threshold / r2 - (1 - tol)) / (2 * tol)
    assert result.yield_pct is not None
    assert abs(result.yield_pct / 100 - probability) < 4 * math.sqrt(probability * (1 - probability) / samples)
    document = spread_to_json(result)
    assert document["yield_pct"] == result.yield_pct and "yield_pct_why" not in document


def rc_divider(r1: float, t1: float, r2: float, t2: float, c: float, tc: float, ref_hz: float) -> Project:
    return make_project([
        {"ref": "R1", "type": "R", "nodes": ["in", "out"], "value": r1, "tol": t1},
        {"ref": "R2", "type": "R", "nodes": ["out", "0"], "value": r2, "tol": t2},
        {"ref": "C1", "type": "C", "nodes": ["out", "0"], "value": c, "tol": tc},
    ], ref_hz=ref_hz, seed=5)


def test_worst_case_equals_exhaustive_corner_enumeration() -> None:
    r1, t1, r2, t2, c, tc = 2.2e3, 0.01, 5.6e3, 0.05, 15e-9, 0.1
    fc = (r1 + r2) / (TWO_PI * r1 * r2 * c)
    ref_hz = fc / 1e4
    result = run(rc_divider(r1, t1, r2, t2, c, tc, ref_hz), samples=400, phase_margins=False)
    # Source: H(jω) = R2 / (R1 + R2 + jω·R1·R2·C) (impedances R and 1/(jωC), any circuits text).
    # A low-pass corner is 3 dB below the DC gain: at the pole, whatever ref_hz says.
    gains, corners = [], []
    for s1, s2, s3 in itertools.product((-1, 1), repeat=3):  # all 2^3 tolerance corners
        a, b, cap = r1 * (1 + s1 * t1), r2 * (1 + s2 * t2), c * (1 + s3 * tc)
        pole = (a + b) / (TWO_PI * a * b * cap)
        gains.append(20 * math.log10(b / abs(a + b + 1j * TWO_PI * ref_hz * a * b * cap)))
        corners.append(pole)
    gain_case = result.worst_case["gain_db"]
    assert gain_case.low == pytest.approx(min(gains), abs=1e-9)
    assert gain_case.high == pytest.approx(max(gains), abs=1e-9)
    corner_case = result.worst_case["f_high_3db_hz"]
    assert corner_case.low == pytest.approx(min(corners), rel=1e-8)
    assert corner_case.high == pytest.approx(max(corners), rel=1e-8)
    assert gain_case.confirmed and corner_case.confirmed
    assert "f_low_3db_hz" not in result.worst_case  # a low-pass has no low corner
    # The corner raises with smaller R and C: the high vertex has all three at −tol.
    assert corner_case.high_vertex == {"R1": -1, "R2": -1, "C1": -1}
    # Every sample's corner lies between the vertices; the envelope stays inside the corners.
    corners_mc = result.sample_values.f_high_3db_hz
    assert corners_mc.min() >= min(corners) * (1 - 1e-9) and corners_mc.max() <= max(corners) * (1 + 1e-9)


def test_low_rank_updates_equal_dense_solves_of_each_sample() -> None:
    # An active stage: inverting amplifier with a feedback capacitor, every part toleranced.
    project = make_project([
        {"ref": "RI", "type": "R", "nodes": ["in", "n"], "value": "8k2", "tol": "1%"},
        {"ref": "RF", "type": "R", "nodes": ["n", "out"], "value": "39k", "tol": "1%"},
        {"ref": "CF", "type": "C", "nodes": ["n", "out"], "value": "1n5", "tol": "5%"},
        {"ref": "RP", "type": "R", "nodes": ["out", "n"], "value": "220k", "tol": "5%"},  # parallel: one term
        {"ref": "U1", "type": "opamp", "nodes": ["0", "n", "out"], "model": "m"},
    ], ref_hz=100)
    model = tolerance_model(assemble(project.stages[0], project), current_drive=False)
    rng = np.random.default_rng(3)
    multipliers = 1 + 0.05 * rng.uniform(-1, 1, size=(7, 4))
    f_hz = np.logspace(1, 6, 9)
    shared = sampled_response(model, multipliers, f_hz)
    per_sample = sampled_response(model, multipliers, np.broadcast_to(f_hz, (7, 9)))
    # Cross-check inside the engine (REFERENCES.md): Woodbury updates vs dense solves.
    assert np.allclose(shared, per_sample, rtol=1e-10, atol=0)
    # Source: the inverting amplifier with ideal gain, −(RF ∥ RP ∥ CF)/RI (any circuits text); the
    # finite op-amp (A0 = 1e5, 4 MHz) departs from it by < 1e-3 at 10 Hz.
    ri, rf, cf = 8.2e3 * multipliers[:, 0], 39e3 * multipliers[:, 1], 1.5e-9 * multipliers[:, 2]
    rp = 220e3 * multipliers[:, 3]
    ideal = -1 / (ri * (1 / rf + 1 / rp + 1j * TWO_PI * 10 * cf))
    assert np.allclose(shared[:, 0], ideal, rtol=1e-3)


def test_low_corner_worst_case_of_a_high_pass_equals_its_corners() -> None:
    c, tc, r, tr = 47e-9, 0.1, 33e3, 0.05
    fc = 1 / (TWO_PI * r * c)
    ref_hz = fc * 1e3
    project = make_project([
        {"ref": "C1", "type": "C", "nodes": ["in", "out"], "value": c, "tol": tc},
        {"ref": "R1", "type": "R", "nodes": ["out", "0"], "value": r, "tol": tr},
    ], ref_hz=ref_hz)
    result = run(project, samples=300, phase_margins=False)
    # Source: H = jωRC/(1 + jωRC) (any circuits text): a high-pass corner is 3 dB below the
    # high-frequency gain, at the pole, whatever ref_hz says.
    corners = []
    for s1, s2 in itertools.product((-1, 1), repeat=2):
        corners.append(1 / (TWO_PI * r * (1 + s2 * tr) * c * (1 + s1 * tc)))
    case = result.worst_case["f_low_3db_hz"]
    assert case.low == pytest.approx(min(corners), rel=1e-8)
    assert case.high == pytest.approx(max(corners), rel=1e-8)
    assert case.confirmed


def test_phase_margin_of_each_sample_matches_stability_margins() -> None:
    import control  # type: ignore[import-untyped]

    rf, rg = 15e3, 1.8e3
    project = decode({
        "format": "stagewise-project", "version": 1, "title": "pm spread",
        "settings": {"f_min_hz": 1, "f_max_hz": 1e6, "ref_hz": 100},
        "opamp_models": {"m": {"a0_db": 96, "gbw_hz": "2M", "p2_hz": "3M"}},
        "stages": [{"id": "s", "name": "stage", "ports": {"in": "in", "out": "out"}, "parts": [
            {"ref": "U1", "type": "opamp", "nodes": ["in", "n", "out"], "model": "m"},
            {"ref": "RF", "type": "R", "nodes": ["out", "n"], "value": rf, "tol": "20%"},
            {"ref": "RG", "type": "R", "nodes": ["n", "0"], "value": rg, "tol": "20%"}]}],
    })
    result = run(project, samples=40, worst_case=False)
    margins = result.sample_values.phase_margin_deg["U1"]
    a0 = 10 ** (96 / 20)
    open_loop = control.tf([a0], [a0 / (TWO_PI * 2e6), 1]) * control.tf([1], [1 / (TWO_PI * 3e6), 1])
    for row in range(0, 40, 8):  # a few samples checked one by one against the reference library
        m_rf, m_rg = result.sample_values.multipliers[row]
        beta = rg * m_rg / (rf * m_rf + rg * m_rg)
        # Reference library: control 0.10.2, stability_margins (T = A(s)·β, no loading)
        pm = control.stability_margins(open_loop * beta)[1]
        assert margins[row] == pytest.approx(pm, abs=1e-6)
    spread = result.metrics["phase_margin_deg:U1"]
    assert spread.minimum is not None and spread.maximum is not None and spread.minimum < spread.maximum


def test_spread_corners_are_taken_against_the_pass_band_like_the_nominal_analysis() -> None:
    # Source: first-order corner 1/(2πRC) (any circuits text): with ref_hz = 1 kHz beyond a 159 Hz corner,
    # each sample's corner is still its own pole, 3 dB below its DC gain, and peaking over DC is zero.
    r, c, tol = 1e3, 1e-6, 0.05
    project = make_project([
        {"ref": "R1", "type": "R", "nodes": ["in", "out"], "value": r, "tol": tol},
        {"ref": "C1", "type": "C", "nodes": ["out", "0"], "value": c},
    ], ref_hz=1000, seed=4)
    result = run(project, samples=200, phase_margins=False)
    corner = result.metrics["f_high_3db_hz"]
    assert corner.nominal == pytest.approx(1 / (TWO_PI * r * c), rel=1e-9)
    assert corner.minimum >= 1 / (TWO_PI * r * (1 + tol) * c) * (1 - 1e-9)
    assert corner.maximum <= 1 / (TWO_PI * r * (1 - tol) * c) * (1 + 1e-9)
    assert result.metrics["peaking_db"].maximum == pytest.approx(0.0, abs=1e-9)


def test_a_sample_that_goes_unstable_meets_no_check_of_the_yield() -> None:
    # Equal-component Sallen-Key low-pass with gain K = 1 + RB/RA = 2.95 (Q = 20), RA and RB ±5 %:
    # some samples have K > 3. Source: Sallen & Key (1955), equal components: the denominator is
    # s²R²C² + s·RC·(3 − K) + 1, so K > 3 puts both poles in the right half-plane. Their H(jω)
    # still has a corner above 1 Hz, so a bandwidth check alone would count them as met.
    r, c, ra, rb = 10e3, 10e-9, 10e3, 19.5e3
    project = make_project([
        {"ref": "R1", "type": "R", "nodes": ["in", "a"], "value": r},
        {"ref": "R2", "type": "R", "nodes": ["a", "b"], "value": r},
        {"ref": "C1", "type": "C", "nodes": ["a", "out"], "value": c},
        {"ref": "C2", "type": "C", "nodes": ["b", "0"], "value": c},
        {"ref": "RA", "type": "R", "nodes": ["m", "0"], "value": ra, "tol": "5%"},
        {"ref": "RB", "type": "R", "nodes": ["out", "m"], "value": rb, "tol": "5%"},
        {"ref": "U1", "type": "opamp", "nodes": ["b", "m", "out"], "model": "ideal"},
    ], mc_samples=400, seed=7)
    system = assemble(project.stages[0], project)
    result = monte_carlo(system, project, current_drive=False, worst_case=False, phase_margins=False,
                         limits=[YieldLimit("f_high_3db_hz", min=1.0, label="bw")])
    multipliers = dict(zip(result.parts, result.sample_values.multipliers.T, strict=True))
    gain = 1 + rb * multipliers["RB"] / (ra * multipliers["RA"])
    expected_stable = gain < 3
    assert 0 < np.count_nonzero(~expected_stable) < 400  # the case is a real mix
    assert result.sample_values.stable is not None
    assert np.array_equal(result.sample_values.stable, expected_stable)
    assert result.yield_pct == pytest.approx(100 * np.mean(expected_stable))
    assert any("unstable" in note for note in result.notes)


def test_stable_samples_keep_their_yield() -> None:
    # Source: voltage divider R2/(R1 + R2), no pole at all: every sample is stable, and a gain
    # check on the divider counts as before (both parts ±1 %, limits wider than any sample).
    project = divider(1e3, "1%", 1e3, "1%", mc_samples=50)
    system = assemble(project.stages[0], project)
    result = monte_carlo(system, project, current_drive=False, worst_case=False, phase_margins=False,
                         limits=[YieldLimit("gain_db", min=-6.3, max=-5.8, label="gain")])
    assert result.yield_pct == pytest.approx(100.0)


def test_per_sample_stability_is_skipped_with_a_note_past_its_cost_bound(monkeypatch: pytest.MonkeyPatch) -> None:
    # Common practice, no source: a cost bound says what it left out rather than running for minutes.
    import stagewise.engine.spread as spread  # noqa: PLC0415

    monkeypatch.setattr(spread, "STABILITY_WORK", 1e12)
    project = divider(1e3, "1%", 1e3, "1%", mc_samples=50)
    system = assemble(project.stages[0], project)
    result = monte_carlo(system, project, current_drive=False, worst_case=False, phase_margins=False,
                         limits=[YieldLimit("gain_db", min=-6.3, max=-5.8, label="gain")])
    assert result.sample_values.stable is None
    assert any("stability of each sample was not checked" in note for note in result.notes)
