"""Stage metrics: step response, corners, peaking, phase, group delay (DESIGN 3.5 and 6)."""

from __future__ import annotations

import json
import math

import control
import numpy as np
import pytest
import scipy.signal

from stagewise.engine.metrics import (
    bandwidth,
    frequency_response,
    group_delay_s_at,
    metric_at,
    phase_deg_at,
    stage_metrics,
)
from stagewise.engine.stage import StageAnalysis, analyze_stage
from stagewise.engine.timeresp import impulse_response, step_response
from stagewise.model.project import OpampModel, Part, Project, Settings, Stage
from stagewise.model.values import Quantity

TWO_PI = 2.0 * math.pi


def q(value: float) -> Quantity:
    return Quantity(value, float(value))


def part(ref: str, kind: str, nodes: list[str], value: float | None = None, **extra: str) -> Part:
    return Part(ref, kind, nodes, None if value is None else q(value), **extra)


def analyse(parts: list[Part], ref_hz: float | None = None, models: dict[str, OpampModel] | None = None,
            **stage_fields: object) -> tuple[StageAnalysis, Settings]:
    stage = Stage("s", "stage", parts=parts, **stage_fields)  # type: ignore[arg-type]
    project = Project("metrics", opamp_models=models or {}, stages=[stage])
    project.settings.ref_hz = None if ref_hz is None else q(ref_hz)
    analysis = analyze_stage(stage, project)
    assert analysis.why is None, analysis.why
    return analysis, project.settings


def rc_low_pass(r: float, c: float) -> list[Part]:
    return [part("R1", "R", ["in", "out"], r), part("C1", "C", ["out", "0"], c)]


def unity_sallen_key(r1: float, r2: float, c1: float, c2: float) -> list[Part]:
    return [part("R1", "R", ["in", "a"], r1), part("R2", "R", ["a", "b"], r2),
            part("C1", "C", ["a", "out"], c1), part("C2", "C", ["b", "0"], c2),
            part("U1", "opamp", ["b", "out", "out"], model="ideal")]


def control_step_info(system: control.TransferFunction, span_s: float) -> dict[str, float]:
    times = np.linspace(0.0, span_s, 100_001)
    return dict(control.step_info(system, T=times, SettlingTimeThreshold=0.01))


# -- step response ---------------------------------------------------------------------------


def test_first_order_step_closed_form() -> None:
    # Source: any control text: y = 1 − exp(−t/τ): 10–90 % rise ln(9)·τ, settling to 1 % at τ·ln(100),
    # to 0.1 % at τ·ln(1000), no overshoot, final value 1
    r, c = 6.8e3, 33e-9
    tau = r * c
    analysis, _ = analyse(rc_low_pass(r, c))
    assert analysis.model is not None
    step = step_response(analysis.model)
    assert step.final == pytest.approx(1.0, rel=1e-12)
    assert step.rise_s == pytest.approx(math.log(9.0) * tau, rel=1e-9)
    assert step.settle_1pct_s == pytest.approx(math.log(100.0) * tau, rel=1e-9)
    assert step.settle_0p1pct_s == pytest.approx(math.log(1000.0) * tau, rel=1e-9)
    assert step.overshoot_pct == 0.0
    # Source: same: y(t) = 1 − exp(−t/τ) on the whole grid
    assert np.max(np.abs(step.y - (1.0 - np.exp(-step.t_s / tau)))) < 1e-12


def test_double_pole_step_closed_form() -> None:
    # Source: any control text: 1/(1 + sτ)² has the step response 1 − (1 + t/τ)·exp(−t/τ) (a Jordan
    # block: the modal form does not apply, the exact exponential path must)
    r, c = 10e3, 10e-9
    tau = r * c
    analysis, _ = analyse([part("R1", "R", ["in", "a"], r), part("C1", "C", ["a", "0"], c),
                           part("U1", "opamp", ["a", "b", "b"], model="ideal"),
                           part("R2", "R", ["b", "d"], r), part("C2", "C", ["d", "0"], c),
                           part("U2", "opamp", ["d", "out", "out"], model="ideal")])
    assert analysis.model is not None
    step = step_response(analysis.model)
    expected = 1.0 - (1.0 + step.t_s / tau) * np.exp(-step.t_s / tau)
    assert np.max(np.abs(step.y - expected)) < 1e-9
    # Source: same formula, 1 % settling: (1 + x)·exp(−x) = 0.01 at x = 6.638352 (solved numerically)
    assert step.settle_1pct_s == pytest.approx(6.638352 * tau, rel=1e-6)


@pytest.mark.parametrize("r2", [10e3, 39e3, 120e3])
def test_sallen_key_step_matches_python_control(r2: float) -> None:
    # Reference library: control 0.10.2, step_info (SettlingTimeThreshold 0.01) on ω0²/(s² + (ω0/Q)s + ω0²)
    # with ω0, Q from Sallen & Key (1955)
    r1, c1, c2 = 10e3, 47e-9, 2.2e-9
    omega0 = 1.0 / math.sqrt(r1 * r2 * c1 * c2)
    quality = math.sqrt(r1 * r2 * c1 * c2) / (c2 * (r1 + r2))
    analysis, _ = analyse(unity_sallen_key(r1, r2, c1, c2))
    assert analysis.model is not None
    step = step_response(analysis.model)
    span = float(step.t_s[-1])
    info = control_step_info(control.tf([omega0**2], [1.0, omega0 / quality, omega0**2]), span)
    resolution = span / 100_000
    assert step.final == pytest.approx(info["SteadyStateValue"], rel=1e-9)
    assert step.rise_s == pytest.approx(info["RiseTime"], abs=2 * resolution)
    assert step.overshoot_pct == pytest.approx(info["Overshoot"], abs=1e-4)
    assert step.settle_1pct_s == pytest.approx(info["SettlingTime"], abs=2 * resolution)
    if quality > 0.5:
        # Source: Ogata, Modern Control Engineering, ch. 5: overshoot exp(−πζ/sqrt(1 − ζ²)), ζ = 1/(2Q)
        zeta = 1.0 / (2.0 * quality)
        assert step.overshoot_pct == pytest.approx(100 * math.exp(-math.pi * zeta / math.sqrt(1 - zeta**2)), rel=1e-7)


def test_inverting_finite_gbw_step_matches_python_control() -> None:
    # Reference library: control 0.10.2, step_info of −(R2/R1)·A/(A + 1 + R2/R1)... built as
    # control.feedback of the open loop (Black, 1934), negative final value
    a0_db, gbw, p2, r1, r2 = 80.0, 1e6, 2.5e6, 1e3, 3.3e3
    models = {"m": OpampModel(a0_db=q(a0_db), gbw_hz=q(gbw), p2_hz=q(p2))}
    analysis, _ = analyse([part("R1", "R", ["in", "m"], r1), part("R2", "R", ["m", "out"], r2),
                           part("U1", "opamp", ["0", "m", "out"], model="m")], models=models)
    assert analysis.model is not None
    step = step_response(analysis.model)
    a0 = 10 ** (a0_db / 20)
    open_loop = control.tf([a0], np.polymul([a0 / (TWO_PI * gbw), 1], [1 / (TWO_PI * p2), 1]))
    beta = r1 / (r1 + r2)
    closed = -(r2 / (r1 + r2)) * control.feedback(open_loop, beta)
    span = float(step.t_s[-1])
    info = control_step_info(closed, span)
    resolution = span / 100_000
    assert step.final == pytest.approx(info["SteadyStateValue"], rel=1e-9)
    assert step.final is not None and step.final < 0
    assert step.rise_s == pytest.approx(info["RiseTime"], abs=2 * resolution)
    assert step.overshoot_pct == pytest.approx(info["Overshoot"], abs=1e-4)
    assert step.settle_1pct_s == pytest.approx(info["SettlingTime"], abs=2 * resolution)


def test_bessel_block_step_matches_scipy() -> None:
    # Reference library: scipy 1.17, scipy.signal.bessel(3, ω, analog=True, norm="phase") poles and
    # scipy.signal.step of the same (b, a)
    omega = TWO_PI * 5e3
    _, poles, _ = scipy.signal.bessel(3, omega, analog=True, output="zpk", norm="phase")
    real = [p for p in poles if abs(p.imag) < 1e-9 * abs(p)]
    pair = [p for p in poles if p.imag > 1e-9 * abs(p)]
    roots: list[Quantity | tuple[Quantity, Quantity]] = [q(-real[0].real / TWO_PI)]
    roots.append((q(abs(pair[0]) / TWO_PI), q(abs(pair[0]) / (-2 * pair[0].real))))
    stage = Stage("bessel", "block", kind="block", gain=q(1.0), poles_hz=roots)
    analysis = analyze_stage(stage, Project("b", stages=[stage]))
    assert analysis.model is not None
    b, a = scipy.signal.zpk2tf([], poles, np.prod(-poles).real)
    times = np.linspace(0.0, 2e-3, 2001)
    _, expected = scipy.signal.step((b, a), T=times)
    actual = step_response(analysis.model, times)
    assert np.max(np.abs(actual.y - expected)) < 1e-8


def test_impulse_response_matches_python_control() -> None:
    # Reference library: control 0.10.2, impulse_response of ω0²/(s² + (ω0/Q)s + ω0²)
    r1, r2, c1, c2 = 15e3, 15e3, 20e-9, 5e-9
    omega0 = 1.0 / math.sqrt(r1 * r2 * c1 * c2)
    quality = math.sqrt(r1 * r2 * c1 * c2) / (c2 * (r1 + r2))
    analysis, _ = analyse(unity_sallen_key(r1, r2, c1, c2))
    assert analysis.model is not None
    times = np.linspace(0.0, 1e-3, 1001)
    ours = impulse_response(analysis.model, times)
    reference = control.impulse_response(control.tf([omega0**2], [1.0, omega0 / quality, omega0**2]), T=times)
    assert ours.impulse_weight == 0.0
    assert np.max(np.abs(ours.y - reference.outputs)) <= 1e-9 * np.max(np.abs(reference.outputs))


def test_high_pass_step_has_no_rise_time_and_settles_against_its_peak() -> None:
    # Source: any circuits text: the step response of sτ/(1 + sτ) is exp(−t/τ): final 0, peak 1 at t = 0,
    # inside 1 % of the peak after τ·ln(100)
    r, c = 47e3, 100e-9
    analysis, settings = analyse([part("C1", "C", ["in", "out"], c), part("R1", "R", ["out", "0"], r)])
    document = stage_metrics(analysis, settings)["step"]
    assert document["final"] == 0.0
    assert document["rise_s"] is None and "zero at DC" in document["rise_s_why"]
    assert document["overshoot_pct"] is None and document["overshoot_pct_why"]
    assert document["settle_basis"] == "peak"
    assert document["settle_1pct_s"] == pytest.approx(r * c * math.log(100.0), rel=1e-9)


def test_leaky_high_pass_step_settles_against_its_peak() -> None:
    # Source: any circuits text (first-order step response). C in parallel with a leak R1 in series,
    # R2 to ground: the step jumps to 1 (C passes it), then decays with τ = C·(R1 ∥ R2) to the
    # divider R2/(R1 + R2): y(t) = f + (1 − f)·exp(−t/τ). It is inside 1 % of the peak (1) once
    # (1 − f)·exp(−t/τ) = 0.01, at t = τ·ln((1 − f)/0.01).
    r_leak, r2, c = 220e3, 10e3, 100e-9
    analysis, settings = analyse([part("C1", "C", ["in", "out"], c), part("R1", "R", ["in", "out"], r_leak),
                                  part("R2", "R", ["out", "0"], r2)])
    document = stage_metrics(analysis, settings)["step"]
    final = r2 / (r_leak + r2)
    tau = c * r_leak * r2 / (r_leak + r2)
    assert document["final"] == pytest.approx(final, rel=1e-9)
    assert document["rise_s"] is None and "high-pass" in document["rise_s_why"]
    assert document["overshoot_pct"] is None
    assert document["settle_basis"] == "peak"
    assert document["settle_1pct_s"] == pytest.approx(tau * math.log((1 - final) / 0.01), rel=1e-6)


def test_integrator_step_has_no_final_value() -> None:
    # Source: any op-amp text: −1/(sRC) has a pole at s = 0, its step response is a ramp
    analysis, settings = analyse([part("R1", "R", ["in", "m"], 10e3), part("C1", "C", ["m", "out"], 1e-9),
                                  part("U1", "opamp", ["0", "m", "out"], model="ideal")])
    document = stage_metrics(analysis, settings)["step"]
    assert document["final"] is None
    assert "s = 0" in document["final_why"]


def test_unstable_stage_step_says_so() -> None:
    # Source: Sallen & Key (1955), equal components: Q = 1/(3 − K); K > 3 puts the poles in the right half-plane
    analysis, settings = analyse([
        part("R1", "R", ["in", "a"], 10e3), part("R2", "R", ["a", "b"], 10e3),
        part("C1", "C", ["a", "out"], 10e-9), part("C2", "C", ["b", "0"], 10e-9),
        part("RA", "R", ["m", "0"], 1e3), part("RB", "R", ["out", "m"], 2.5e3),
        part("U1", "opamp", ["b", "m", "out"], model="ideal")])
    assert analysis.poles_rad_s is not None and np.all(analysis.poles_rad_s.real > 0)
    document = stage_metrics(analysis, settings)["step"]
    assert document["rise_s"] is None and "unstable" in document["rise_s_why"]
    # Same source: ω0 = 1/(RC), Q = 1/(3 − K) with K = 1 + RB/RA = 3.5, so the pair sits at
    # f0 = 1/(2πRC) ≈ 1.592 kHz; the reason reads it in hertz, as the stability verdict does.
    assert "right-half-plane pole at 1.592 kHz" in document["rise_s_why"]


# -- frequency-domain metrics ----------------------------------------------------------------


@pytest.mark.parametrize("f_ref", [None, 10.0, 1e3])
def test_rc_corner_is_at_one_over_two_pi_rc_whatever_ref_hz_says(f_ref: float | None) -> None:
    # Source: first-order corner f_c = 1/(2πRC) (any circuits text): the low-pass corner is 3 dB
    # below the DC gain. With ref_hz = 1 kHz on a 159 Hz corner, the gain at ref_hz is −16 dB and a
    # corner taken against it would land at fc·√(1 + 2(f_ref/fc)²) = 1.42 kHz: not the corner.
    r, c = 1e3, 1e-6
    fc = 1.0 / (TWO_PI * r * c)
    analysis, settings = analyse(rc_low_pass(r, c), ref_hz=f_ref)
    limits = bandwidth(analysis, settings)
    assert limits.f_high_3db_hz == pytest.approx(fc, rel=1e-9)
    assert limits.gain_db == pytest.approx(0.0, abs=1e-12)
    assert limits.reference is not None and limits.reference.kind == "dc" and limits.reference.f_hz == 0.0
    assert limits.f_low_3db_hz is None and "DC" in limits.why["f_low_3db_hz"]
    assert limits.peaking_db == pytest.approx(0.0, abs=1e-12)
    document = stage_metrics(analysis, settings)
    assert document["ref"]["kind"] == "dc" and document["ref"]["gain_db"] == pytest.approx(0.0, abs=1e-12)
    if f_ref is not None:
        assert "ref_hz" in document["ref"]["note"] and "not used" in document["ref"]["note"]
        # Source: same: |H(f_ref)|² = 1/(1 + (f_ref/fc)²), the point value gain_db at ref_hz
        assert document["gain_db"] == pytest.approx(-10 * math.log10(1 + (f_ref / fc) ** 2), abs=1e-10)
    # Source: same formula: attenuation at f relative to the DC gain is 10·log10(1 + (f/fc)²)
    f = 20e3
    value = metric_at(analysis, "attenuation_db", f, settings)
    assert value.value == pytest.approx(10 * math.log10(1 + (f / fc) ** 2), rel=1e-10)


def test_rc_corner_below_the_analysed_band_is_still_found() -> None:
    # Source: first-order corner 1/(2πRC), any circuits text: 10 MΩ and 22 nF give 0.72 Hz, below the
    # band's 1 Hz start; the corner is a property of the response, found on the exact solve.
    r, c = 10e6, 22e-9
    analysis, settings = analyse(rc_low_pass(r, c), ref_hz=1e3)
    assert analysis.f_hz[0] == pytest.approx(1.0)
    limits = bandwidth(analysis, settings)
    assert limits.f_high_3db_hz == pytest.approx(1.0 / (TWO_PI * r * c), rel=1e-9)


def test_rc_high_pass_is_referred_to_its_high_frequency_gain() -> None:
    # Source: first-order high-pass sRC/(1 + sRC), corner 1/(2πRC) (any circuits text); its pass-band
    # gain is the high-frequency limit 1 (0 dB), whatever ref_hz says.
    r, c = 4.7e3, 220e-9
    fc = 1.0 / (TWO_PI * r * c)
    analysis, settings = analyse([part("C1", "C", ["in", "out"], c), part("R1", "R", ["out", "0"], r)], ref_hz=20.0)
    limits = bandwidth(analysis, settings)
    assert limits.reference is not None and limits.reference.kind == "hf" and limits.reference.shape == "high-pass"
    assert limits.gain_db == pytest.approx(0.0, abs=1e-9)
    assert limits.f_low_3db_hz == pytest.approx(fc, rel=1e-9)
    assert limits.f_high_3db_hz is None
    document = stage_metrics(analysis, settings)
    assert document["ref"]["f_hz"] is None and "s → ∞" in document["ref"]["f_hz_why"]


def test_series_rlc_half_power_frequencies() -> None:
    # Source: Nilsson & Riedel, series RLC band-pass: ω0 = 1/sqrt(LC), Q = ω0L/R, half-power frequencies
    # ω0·(sqrt(1 + 1/(4Q²)) ∓ 1/(2Q)); reference gain (band maximum) 0 dB at ω0
    resistance, inductance, capacitance = 150.0, 33e-3, 68e-9
    omega0 = 1.0 / math.sqrt(inductance * capacitance)
    quality = omega0 * inductance / resistance
    analysis, settings = analyse([part("L1", "L", ["in", "a"], inductance), part("C1", "C", ["a", "out"], capacitance),
                                  part("R1", "R", ["out", "0"], resistance)])
    limits = bandwidth(analysis, settings)
    root = math.sqrt(1 + 1 / (4 * quality**2))
    assert limits.gain_db == pytest.approx(0.0, abs=1e-9)
    assert limits.peak_hz == pytest.approx(omega0 / TWO_PI, rel=1e-5)
    assert limits.f_low_3db_hz == pytest.approx(omega0 * (root - 1 / (2 * quality)) / TWO_PI, rel=1e-9)
    assert limits.f_high_3db_hz == pytest.approx(omega0 * (root + 1 / (2 * quality)) / TWO_PI, rel=1e-9)


@pytest.mark.parametrize("f_ref", [None, 10.0, 1e3])
def test_sallen_key_peaking(f_ref: float | None) -> None:
    # Source: Ogata, Modern Control Engineering, ch. 7, resonant peak of a second-order low-pass over its
    # DC gain: M_r = 1/(2ζ·sqrt(1 − ζ²)) = Q/sqrt(1 − 1/(4Q²)) at ω0·sqrt(1 − 2ζ²), whatever ref_hz is
    r1, r2, c1, c2 = 10e3, 10e3, 100e-9, 1.5e-9
    omega0 = 1.0 / math.sqrt(r1 * r2 * c1 * c2)
    quality = math.sqrt(r1 * r2 * c1 * c2) / (c2 * (r1 + r2))
    zeta = 1.0 / (2.0 * quality)
    analysis, settings = analyse(unity_sallen_key(r1, r2, c1, c2), ref_hz=f_ref)
    limits = bandwidth(analysis, settings)
    peak_db = 20 * math.log10(1.0 / (2 * zeta * math.sqrt(1 - zeta**2)))
    assert limits.peak_gain_db == pytest.approx(peak_db, abs=1e-9)
    assert limits.peak_hz == pytest.approx(omega0 * math.sqrt(1 - 2 * zeta**2) / TWO_PI, rel=1e-4)
    assert limits.peaking_db == pytest.approx(peak_db, abs=1e-9)
    # Source: same section, |H(jω)|² = 1/((1 − x²)² + (x/Q)²), x = ω/ω0: half power (against DC) at
    # x² = 1 − 1/(2Q²) + sqrt((1 − 1/(2Q²))² + 1)
    half = 1 - 1 / (2 * quality**2)
    assert limits.f_high_3db_hz == pytest.approx(omega0 * math.sqrt(half + math.sqrt(half**2 + 1)) / TWO_PI, rel=1e-9)


def test_butterworth_q_section_peaks_by_three_decibels() -> None:
    # Source: standard second-order result (e.g. Ogata, ch. 7; any active-filter text): a low-pass with
    # Q = 1.3066 (the 4th-order Butterworth section, Williams & Taylor tables, value from memory) peaks
    # 20·log10(Q/sqrt(1 − 1/(4Q²))) ≈ 3.01 dB over its DC gain. Unity-gain Sallen-Key,
    # Q = sqrt(R1R2C1C2)/(C2(R1+R2)) (Sallen & Key, 1955): equal R, C1/C2 = 4Q².
    quality = 1.0 / (2.0 * math.cos(3 * math.pi / 8))
    r, c2 = 22e3, 1e-9
    c1 = 4.0 * quality**2 * c2
    analysis, settings = analyse(unity_sallen_key(r, r, c1, c2), ref_hz=1e3)
    limits = bandwidth(analysis, settings)
    expected = 20 * math.log10(quality / math.sqrt(1 - 1 / (4 * quality**2)))
    assert expected == pytest.approx(3.0103, abs=1e-4)
    assert limits.peaking_db == pytest.approx(expected, abs=1e-9)


def test_band_pass_corners_around_its_mid_band_gain() -> None:
    # Source: an AC-coupled buffer, high-pass sC1R1/(1 + sC1R1) then low-pass 1/(1 + sR2C2) behind an ideal
    # follower (any circuits text): mid-band gain 1 (0 dB, Sedra & Smith, the mid-band gain A_M) and
    # corners where |H|² = 1/2: with a = f/fl, b = f/fh, (1 + 1/a²)(1 + b²) = 2.
    r1, c1, r2, c2 = 100e3, 1e-6, 1e3, 1e-9
    fl, fh = 1 / (TWO_PI * r1 * c1), 1 / (TWO_PI * r2 * c2)
    analysis, settings = analyse([part("C1", "C", ["in", "a"], c1), part("R1", "R", ["a", "0"], r1),
                                  part("U1", "opamp", ["a", "b", "b"], model="ideal"),
                                  part("R2", "R", ["b", "out"], r2), part("C2", "C", ["out", "0"], c2)],
                                 ref_hz=0.5)
    limits = bandwidth(analysis, settings)
    assert limits.reference is not None and limits.reference.kind == "midband"
    assert "not used" in limits.reference.note
    # Source: same: the mid-band frequency is the flat stretch's geometric centre sqrt(fl·fh)
    f_mid = math.sqrt(fl * fh)
    assert limits.reference.f_hz == pytest.approx(f_mid, rel=1e-9)
    assert limits.gain_db == pytest.approx(-10 * math.log10((1 + (fl / f_mid) ** 2) * (1 + (f_mid / fh) ** 2)),
                                           abs=1e-12)
    level = limits.gain_db - 10 * math.log10(2.0)

    def gain(f: float) -> float:
        return -10 * math.log10((1 + (fl / f) ** 2) * (1 + (f / fh) ** 2))

    assert limits.f_low_3db_hz is not None and limits.f_high_3db_hz is not None
    assert gain(limits.f_low_3db_hz) == pytest.approx(level, abs=1e-7)
    assert gain(limits.f_high_3db_hz) == pytest.approx(level, abs=1e-7)
    # Five decades apart, the corners sit within 0.1 % of the single-section ones (Sedra & Smith's
    # dominant-pole approximation)
    assert limits.f_low_3db_hz == pytest.approx(fl, rel=1e-3)
    assert limits.f_high_3db_hz == pytest.approx(fh, rel=1e-3)
    # ref_hz inside the flat mid-band, two decades or more from both corners, is used as given.
    settings.ref_hz = q(1e3)
    reference = bandwidth(analysis, settings).reference
    assert reference is not None and reference.kind == "ref_hz" and reference.f_hz == 1e3


def test_integrator_has_no_pass_band_without_ref_hz() -> None:
    # Common practice, no source: an integrator −1/(sRC) has no DC gain, so no pass band of its own
    parts = [part("R1", "R", ["in", "m"], 10e3), part("C1", "C", ["m", "out"], 1e-6),
             part("U1", "opamp", ["0", "m", "out"], model="ideal")]
    analysis, settings = analyse(parts)
    limits = bandwidth(analysis, settings)
    assert limits.reference is not None and limits.reference.kind is None
    assert limits.f_high_3db_hz is None and "pole at s = 0" in limits.why["f_high_3db_hz"]
    analysis, settings = analyse(parts, ref_hz=100.0)
    reference = bandwidth(analysis, settings).reference
    assert reference is not None and reference.kind == "ref_hz"
    # Source: |−1/(jωRC)| at 100 Hz
    assert reference.gain_db == pytest.approx(-20 * math.log10(TWO_PI * 100 * 10e3 * 1e-6), abs=1e-9)


def test_phase_and_group_delay_of_rc() -> None:
    # Source: any circuits text: phase −atan(ωRC); group delay −dφ/dω = RC/(1 + (ωRC)²)
    r, c = 1e3, 1e-6
    analysis, _ = analyse(rc_low_pass(r, c))
    for f in (30.0, 159.15, 4e3):
        w = TWO_PI * f
        assert phase_deg_at(analysis, f) == pytest.approx(-math.degrees(math.atan(w * r * c)), abs=1e-10)
        assert group_delay_s_at(analysis, f) == pytest.approx(r * c / (1 + (w * r * c) ** 2), rel=1e-9)


def test_butterworth_phase_is_unwrapped() -> None:
    # Reference library: scipy 1.17, scipy.signal.freqs_zpk of butter(4) and numpy.unwrap on a dense grid:
    # the phase runs continuously from 0 towards −360°
    order, corner, resistance = 4, TWO_PI * 1e3, 10e3
    parts: list[Part] = []
    nodes = ["in", "mid", "out"]
    for k in (1, 2):
        quality = 1.0 / (2.0 * math.cos((2 * k - 1) * math.pi / (2 * order)))
        c2 = 1.0 / (2.0 * quality * corner * resistance)
        c1 = 4.0 * quality**2 * c2
        tag = str(k)
        parts += [part(f"R1{tag}", "R", [nodes[k - 1], f"a{tag}"], resistance),
                  part(f"R2{tag}", "R", [f"a{tag}", f"b{tag}"], resistance),
                  part(f"C1{tag}", "C", [f"a{tag}", nodes[k]], c1), part(f"C2{tag}", "C", [f"b{tag}", "0"], c2),
                  part(f"U{tag}", "opamp", [f"b{tag}", nodes[k], nodes[k]], model="ideal")]
    analysis, _ = analyse(parts)
    z, p, k_gain = scipy.signal.butter(order, corner, analog=True, output="zpk")
    dense = np.logspace(-1, 6, 20001)
    _, h = scipy.signal.freqs_zpk(z, p, k_gain, worN=TWO_PI * dense)
    expected = np.degrees(np.unwrap(np.angle(h)))
    ours = frequency_response(analysis)
    assert np.max(np.abs(ours.phase_deg - np.interp(ours.f_hz, dense, expected))) < 0.05
    assert phase_deg_at(analysis, 300e3) == pytest.approx(np.interp(300e3, dense, expected), abs=1e-3)


def test_all_pass_phase_starts_near_zero_despite_its_right_half_plane_zero() -> None:
    # Source: first-order all-pass (1 − s/ω0)/(1 + s/ω0): |H| = 1, phase −2·arctan(ω/ω0)
    # (any filter text). The right-half-plane zero must not add a turn to the plotted phase.
    f0 = 1.5e3
    stage = Stage("ap", "all-pass", kind="block", gain=q(1.0), zeros_hz=[q(-f0)], poles_hz=[q(f0)])
    project = Project("all-pass", stages=[stage])
    analysis = analyze_stage(stage, project)
    assert analysis.why is None, analysis.why
    response = frequency_response(analysis)
    expected = -2.0 * np.degrees(np.arctan(response.f_hz / f0))
    np.testing.assert_allclose(response.phase_deg, expected, atol=1e-9)
    np.testing.assert_allclose(response.mag_db, 0.0, atol=1e-9)


def test_inverting_amplifier_phase_is_180_degrees() -> None:
    # Source: any op-amp text: H = −R2/R1 with an ideal op-amp: phase ±180°, gain 20·log10(R2/R1)
    analysis, settings = analyse([part("R1", "R", ["in", "m"], 1e3), part("R2", "R", ["m", "out"], 22e3),
                                  part("U1", "opamp", ["0", "m", "out"], model="ideal")], ref_hz=1e3)
    assert abs(phase_deg_at(analysis, 1e3)) == pytest.approx(180.0, abs=1e-9)
    assert metric_at(analysis, "gain_db", 5e3).value == pytest.approx(20 * math.log10(22.0), abs=1e-10)


def test_stage_metrics_document_is_json_ready_with_reasons() -> None:
    # Common practice, no source: every null carries a reason; no NaN or infinity in JSON
    analysis, settings = analyse(rc_low_pass(1e3, 100e-9), ref_hz=1e3)
    document = stage_metrics(analysis, settings)
    text = json.dumps(document, allow_nan=False)
    assert "f_low_3db_hz_why" in document and document["f_low_3db_hz"] is None
    assert document["poles"][0]["q"] is None
    # Source: first-order corner 1/(2πRC): the pole's natural frequency
    assert document["poles"][0]["f_hz"] == pytest.approx(1 / (TWO_PI * 1e-4), rel=1e-9)
    for key in ("gain_db", "peak_gain_db", "f_low_3db_hz", "f_high_3db_hz", "peaking_db", "poles", "zeros", "step"):
        assert key in document, text
    for key in ("rise_s", "overshoot_pct", "settle_1pct_s", "final"):
        assert key in document["step"]


def test_failed_stage_metrics_are_null_with_the_reason() -> None:
    # Common practice, no source: an unsolvable stage gives nulls with its diagnosis, never an exception
    stage = Stage("bad", "bad", parts=[part("R1", "R", ["in", "0"], 1e3), part("R2", "R", ["out", "0"], 1e3),
                                      part("U1", "opamp", ["in", "0", "out"], model="ideal")])
    project = Project("p", stages=[stage])
    analysis = analyze_stage(stage, project)
    document = stage_metrics(analysis, project.settings)
    assert document["gain_db"] is None and "U1" in document["gain_db_why"]
    assert document["step"] is None and "U1" in document["step_why"]
    assert metric_at(analysis, "gain_db", 1e3).value is None


def test_point_response_matches_the_sweep_branch() -> None:
    # Reference library: scipy 1.17, scipy.signal.freqs for the MFB low-pass closed form (Williams &
    # Taylor): exact values at arbitrary frequencies, phase on the sweep's branch (inverting: starts at ±180°)
    from stagewise.engine.metrics import frequency_response_at

    r1, r2, r3, c1, c2 = 4.7e3, 9.1e3, 5.6e3, 33e-9, 2.2e-9
    analysis, _ = analyse([
        part("R1", "R", ["in", "a"], r1), part("C1", "C", ["a", "0"], c1),
        part("R2", "R", ["a", "out"], r2), part("R3", "R", ["a", "b"], r3),
        part("C2", "C", ["b", "out"], c2), part("U1", "opamp", ["0", "b", "out"], model="ideal")])
    points = np.array([3.3, 470.0, 2.2e3, 9.9e3, 123e3])
    b = [-1.0 / (r1 * r3 * c1 * c2)]
    a = [1.0, (1 / r1 + 1 / r2 + 1 / r3) / c1, 1.0 / (r2 * r3 * c1 * c2)]
    _, h = scipy.signal.freqs(b, a, worN=TWO_PI * points)
    ours = frequency_response_at(analysis, points)
    assert np.allclose(ours.mag_db, 20 * np.log10(np.abs(h)), atol=1e-9)
    sweep = frequency_response(analysis)
    branch = np.interp(np.log10(points), np.log10(sweep.f_hz), sweep.phase_deg)
    assert np.max(np.abs(ours.phase_deg - branch)) < 1.0
    assert np.allclose(np.exp(1j * np.radians(ours.phase_deg)), np.exp(1j * np.angle(h)), atol=1e-9)


def test_notch_with_real_poles_step_matches_scipy() -> None:
    # Source: Nilsson & Riedel: R in series, then L and C in series to node 0: H = (1 + s²LC)/(1 + sRC + s²LC);
    # with R = 2.2 kΩ the poles are real (Q = sqrt(L/C)/R < 0.5) and the complex zero pair needs them paired.
    # Reference library: scipy 1.17, scipy.signal.step of the same (b, a)
    r, inductance, capacitance = 2.2e3, 10e-3, 100e-9
    analysis, _ = analyse([part("R1", "R", ["in", "out"], r), part("L1", "L", ["out", "a"], inductance),
                           part("C1", "C", ["a", "0"], capacitance)])
    assert analysis.model is not None
    assert np.all(analysis.model.poles_rad_s.imag == 0)
    times = np.linspace(0.0, 5e-3, 5001)
    _, expected = scipy.signal.step(([inductance * capacitance, 0.0, 1.0], [inductance * capacitance, r * capacitance, 1.0]),
                                    T=times)
    ours = step_response(analysis.model, times)
    assert np.max(np.abs(ours.y - expected)) < 1e-8


def test_step_from_poles_and_residues_matches_the_closed_form() -> None:
    # Source: Ogata, Modern Control Engineering, ch. 5: the unit-step response of ω0²/(s² + 2ζω0s + ω0²),
    # 1 − e^(−ζω0t)(cos ωd·t + ζ/sqrt(1 − ζ²)·sin ωd·t), ωd = ω0·sqrt(1 − ζ²); here computed from the
    # pencil's poles and residues alone (the path used when zeros are ill-conditioned)
    from stagewise.engine.timeresp import step_response_of_pencil

    r1, r2, c1, c2 = 22e3, 22e3, 15e-9, 2.2e-9
    omega0 = 1.0 / math.sqrt(r1 * r2 * c1 * c2)
    zeta = c2 * (r1 + r2) / (2.0 * math.sqrt(r1 * r2 * c1 * c2))
    analysis, _ = analyse(unity_sallen_key(r1, r2, c1, c2))
    assert analysis.model is not None and analysis.driven is not None
    driven = analysis.driven
    times = np.linspace(0.0, 2e-3, 801)
    step = step_response_of_pencil(driven.g, driven.c, driven.b, driven.output, analysis.model, times)
    damped = omega0 * math.sqrt(1 - zeta**2)
    expected = 1 - np.exp(-zeta * omega0 * times) * (np.cos(damped * times)
                                                      + zeta / math.sqrt(1 - zeta**2) * np.sin(damped * times))
    assert np.max(np.abs(step.y - expected)) < 1e-9
    assert step.final == pytest.approx(1.0, rel=1e-12)
    assert step.overshoot_pct == pytest.approx(100 * math.exp(-math.pi * zeta / math.sqrt(1 - zeta**2)), rel=1e-7)


def test_step_from_the_pencil_through_a_jordan_block() -> None:
    # Source: any control text: 1/(1 + sτ)² steps as 1 − (1 + t/τ)·exp(−t/τ). Two buffered RC sections
    # form a Jordan block (no simple residues), so the pencil path must fall back to the circuit's own
    # index-1 ODE form and its exact exponential.
    from stagewise.engine.poles import index_one_state_space, transfer_at
    from stagewise.engine.timeresp import step_response_of_pencil

    r, c = 4.7e3, 22e-9
    tau = r * c
    analysis, _ = analyse([part("R1", "R", ["in", "a"], r), part("C1", "C", ["a", "0"], c),
                           part("U1", "opamp", ["a", "b", "b"], model="ideal"),
                           part("R2", "R", ["b", "d"], r), part("C2", "C", ["d", "0"], c),
                           part("U2", "opamp", ["d", "out", "out"], model="ideal")])
    assert analysis.model is not None and analysis.driven is not None
    driven = analysis.driven
    times = np.linspace(0.0, 12 * tau, 601)
    step = step_response_of_pencil(driven.g, driven.c, driven.b, driven.output, analysis.model, times)
    assert np.max(np.abs(step.y - (1.0 - (1.0 + times / tau) * np.exp(-times / tau)))) < 1e-9
    # Cross-check inside the engine: the ODE form's C(sI − A)⁻¹B + D against the MNA solve
    a, b, c_row, d = index_one_state_space(driven.g, driven.c, driven.b, driven.output)
    s = 1j * TWO_PI * np.logspace(1, 6, 11)
    ode = np.array([c_row @ np.linalg.solve(point * np.eye(len(b)) - a, b) + d for point in s])
    exact = transfer_at(driven.g, driven.c, driven.b, driven.output, s)
    assert np.max(np.abs(ode - exact) / np.abs(exact)) < 1e-9


def test_right_half_plane_zero_of_an_op_amp_model_is_named_and_real_roots_say_why_q_is_null() -> None:
    # Source: nodal analysis of an inverting stage (Kirchhoff's current law): the op-amp's source
    # A(s)·(v+ − v−) = A0/(1 + s·A0/ωt)·(−v−) drives the output through r_out; the output is zero where
    # A(s) = r_out/R2, a real zero at f = GBW·(R2/r_out − 1/A0), in the right half-plane: the signal
    # that reaches the output through R2 and r_out ahead of the amplifier.
    a0_db, gbw, rout, r1, r2 = 100.0, 1e6, 100.0, 1e3, 10e3
    models = {"m": OpampModel(a0_db=q(a0_db), gbw_hz=q(gbw), rout_ohm=q(rout))}
    analysis, settings = analyse([part("R1", "R", ["in", "n"], r1), part("R2", "R", ["n", "out"], r2),
                                  part("U1", "opamp", ["0", "n", "out"], model="m")], models=models)
    document = stage_metrics(analysis, settings)
    zero = document["zeros"][0]
    assert zero["f_hz"] == pytest.approx(gbw * (r2 / rout - 10 ** (-a0_db / 20)), rel=1e-9)
    assert zero["half_plane"] == "right" and "right-half-plane zero" in zero["note"]
    # Common practice, no source: Q and ζ describe a complex pair; a real root has neither
    # (so its note says nothing of a sign of Q, which it does not have)
    assert "Q" not in zero["note"]
    assert zero["q"] is None and "real root" in zero["q_why"] and zero["zeta"] is None and zero["zeta_why"]
    pole = document["poles"][0]
    assert pole["half_plane"] == "left" and "note" not in pole and pole["q"] is None and pole["q_why"]


def test_op_amp_feedthrough_floor_does_not_make_a_band_pass_a_high_pass() -> None:
    # Source: any op-amp text: an AC-coupled inverting stage, −(R2/R1)·sR1C/(1 + sR1C), has its mid-band
    # gain R2/R1 and its lower corner at 1/(2πR1C). A finite op-amp with output resistance adds, far above
    # the band, a flat floor (the input fed through R2 and r_out); its pole/zero model then has
    # relative degree 0, but the pass band is still the mid-band, not that floor.
    r1, r2, c = 4.7e3, 47e3, 1e-6
    models = {"m": OpampModel(a0_db=q(120.0), gbw_hz=q(10e6), rout_ohm=q(75.0))}
    analysis, settings = analyse([part("C1", "C", ["in", "a"], c), part("R1", "R", ["a", "n"], r1),
                                  part("R2", "R", ["n", "out"], r2),
                                  part("U1", "opamp", ["0", "n", "out"], model="m")], ref_hz=1e3, models=models)
    assert analysis.model is not None and analysis.model.relative_degree == 0
    limits = bandwidth(analysis, settings)
    assert limits.reference is not None and limits.reference.shape == "band-pass"
    assert limits.reference.kind in ("midband", "ref_hz")
    assert limits.gain_db == pytest.approx(20 * math.log10(r2 / r1), abs=0.01)
    assert limits.f_low_3db_hz == pytest.approx(1 / (TWO_PI * r1 * c), rel=1e-3)
    # Common practice, no source: closed-loop bandwidth ≈ GBW / noise gain (1 + R2/R1)
    assert limits.f_high_3db_hz == pytest.approx(10e6 / (1 + r2 / r1), rel=0.05)


def test_a_right_half_plane_complex_pair_reads_its_q_as_negative() -> None:
    # Source: standard second-order section s² + (ω0/Q)s + ω0² (Ogata, ch. 5): Q = |s|/(−2·Re s), so a
    # pair right of the jω axis has Q < 0; the note says how to read it only where Q exists.
    from stagewise.engine.poles import root_table

    pair, real = root_table(np.array([3.0 + 40.0j, 5.0 + 0.0j]), "pole")
    assert pair["q"] == pytest.approx(-abs(3 + 40j) / 6.0, rel=1e-12) and "Q < 0" in pair["note"]
    assert real["q"] is None and "Q" not in real["note"] and "unstable" in real["note"]
