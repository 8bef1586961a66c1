"""Stability as a verdict, automatic findings (over-range, clipping) and the SNR with quantization noise.

Each unstable case is checked against the closed-loop pole of its own characteristic equation and
against python-control; the SNR against IEEE Std 1241's ideal converter.
"""

from __future__ import annotations

import math
from typing import Any

import control  # type: ignore[import-untyped]
import numpy as np
import pytest

from stagewise.engine.analysis import ProjectAnalysis, analyze_project
from stagewise.engine.loops import NO_LOOP_WHY
from stagewise.engine.stability import stability_of_poles
from stagewise.files.codec import decode
from stagewise.model.project import Project

TWO_PI = 2 * math.pi


def project_of(stages: list[dict[str, Any]], *, drive: str = "voltage", amplitude: str | None = "10m",
               models: dict[str, Any] | None = None, converter: dict[str, Any] | None = None,
               settings: dict[str, Any] | None = None) -> Project:
    return decode({
        "format": "stagewise-project", "version": 1, "title": "verdict test",
        "settings": {"f_min_hz": 1, "f_max_hz": "1M", "points_per_decade": 40, "ref_hz": 1000,
                     "noise_band_hz": [10, 20000], **(settings or {})},
        "input": {"drive": drive, "amplitude": amplitude},
        "converter": converter or {},
        "opamp_models": models or {},
        "stages": stages,
    })


# R1 1k in→p, R2 10k p→out, op-amp + input on p, − input on node 0; A0 100 dB, GBW 1 MHz.
POSITIVE_FEEDBACK = {
    "id": "pf", "name": "positive feedback", "ports": {"in": "in", "out": "out"},
    "parts": [{"ref": "R1", "type": "R", "nodes": ["in", "p"], "value": "1k"},
              {"ref": "R2", "type": "R", "nodes": ["p", "out"], "value": "10k"},
              {"ref": "U1", "type": "opamp", "nodes": ["p", "0", "out"], "model": "m"}],
    "checks": [{"id": "pm", "text": "phase margin", "metric": "phase_margin_deg", "where": "isolated", "min": 45},
               {"id": "gain", "text": "gain", "metric": "gain_db", "where": "isolated", "min": -200}],
}
MODEL = {"m": {"a0_db": 100, "gbw_hz": "1M"}}


def positive_feedback_pole_rad_s() -> float:
    # With the input zeroed, v_p = β·v_out (β = R1/(R1 + R2)) and v_out = A(s)·v_p, so the loop
    # closes with 1 − A(s)·β = 0. With A(s) = A0/(1 + s/ωp), ωp = 2π·GBW/A0:
    # s = ωp·(A0·β − 1), on the positive real axis.
    # Source: Black's feedback formula (H. S. Black, 1934) with the sign of positive feedback.
    a0, beta = 1e5, 1e3 / 11e3
    return TWO_PI * 1e6 / a0 * (a0 * beta - 1)


def test_positive_feedback_stage_is_unstable_and_every_check_there_has_no_value() -> None:
    project = project_of([POSITIVE_FEEDBACK], models=MODEL)
    analysis = ProjectAnalysis(project, spread=False)
    verdict = analysis.stability("isolated", "pf")
    assert verdict is not None and not verdict.stable
    pole = positive_feedback_pole_rad_s()
    assert verdict.offending_rad_s[0].real == pytest.approx(pole, rel=1e-6)
    # Reference library: control 0.10.2, feedback(sign=+1) then poles
    a0 = 1e5
    opamp = control.tf([a0], [a0 / (TWO_PI * 1e6), 1])
    closed = control.feedback(opamp, 1e3 / 11e3, sign=1)
    assert float(np.max(np.real(control.poles(closed)))) == pytest.approx(pole, rel=1e-6)
    assert "right-half-plane pole" in verdict.reason
    for metric in ("phase_margin_deg", "gain_db", "f_high_3db_hz"):
        value, why = analysis.metric_value(metric, "isolated", "pf", 1000.0)
        assert value is None and why is not None and "unstable" in why, metric
    # The loop's margins are not shown for an unstable closed loop (the Bode shortcut would
    # read a comfortable phase margin off this loop).
    document = analyze_project(project, spread=False)
    loop = document["stages"][0]["isolated"]["loops"][0]
    assert loop["phase_margin_deg"] is None and "unstable" in loop["phase_margin_deg_why"]
    assert document["stages"][0]["isolated"]["stability"]["verdict"] == "unstable"
    assert document["stages"][0]["isolated"]["gain_db"] is None
    kinds = {(item.kind, item.where) for item in analysis.findings()}
    assert {("unstable", "isolated"), ("unstable", "in_chain"), ("unstable", "chain")} <= kinds


def test_undamped_lc_is_unstable_on_the_imaginary_axis() -> None:
    inductance, capacitance = 4.7e-3, 220e-9
    project = project_of([{"id": "lc", "name": "LC", "ports": {"in": "in", "out": "out"},
                           "parts": [{"ref": "L1", "type": "L", "nodes": ["in", "out"], "value": inductance},
                                     {"ref": "C1", "type": "C", "nodes": ["out", "0"], "value": capacitance}]}])
    verdict = ProjectAnalysis(project, spread=False).stability("isolated", "lc")
    assert verdict is not None and not verdict.stable
    # Source: series L into C, unloaded: H(s) = 1/(1 + s²LC), poles ±j/√(LC) (any circuits text).
    assert abs(verdict.offending_rad_s[0]) == pytest.approx(1 / math.sqrt(inductance * capacitance), rel=1e-9)
    assert "jω axis" in verdict.reason


def test_a_damped_stage_is_stable_and_a_pole_at_the_origin_is_not() -> None:
    # Common practice, no source: a pole at s = 0 (an integrator) never settles; -1 ± 1j decays.
    assert stability_of_poles(np.array([-1 + 1j, -1 - 1j])).stable
    origin = stability_of_poles(np.array([0j, -5 + 0j]))
    assert not origin.stable and "s = 0" in origin.reason
    # A right-half-plane pole cancelled by a zero still grows inside the circuit.
    hidden = stability_of_poles(np.array([-3 + 0j]), cancelled=((2 + 0j, 2 + 0j),))
    assert not hidden.stable


def test_current_driven_stage_in_a_voltage_driven_project_has_no_loop_not_an_error() -> None:
    tia = {"id": "tia", "name": "TIA", "drive": "current", "ports": {"in": "n", "out": "out"},
           "parts": [{"ref": "U1", "type": "opamp", "nodes": ["0", "n", "out"], "model": "m"},
                     {"ref": "R1", "type": "R", "nodes": ["n", "out"], "value": "100k"},
                     {"ref": "C1", "type": "C", "nodes": ["n", "out"], "value": "1p"}],
           "checks": [{"id": "pm", "text": "pm", "metric": "phase_margin_deg", "where": "in_chain", "min": 45}]}
    project = project_of([tia], models=MODEL)
    document = analyze_project(project)
    # Common practice, no source: a voltage source on the inverting input holds it, so nothing
    # the output does reaches the op-amp's inputs: there is no loop to measure.
    loop = document["stages"][0]["in_chain"]["loops"][0]
    assert loop["phase_margin_deg"] is None and loop["phase_margin_deg_why"] == NO_LOOP_WHY
    assert document["stages"][0]["checks"][0]["state"] == "no value"


def test_snr_counts_quantization_noise_and_a_noiseless_chain_gives_the_ideal_converter() -> None:
    buffer = {"id": "buf", "name": "buffer", "ports": {"in": "in", "out": "out"},
              "parts": [{"ref": "U1", "type": "opamp", "nodes": ["in", "out", "out"], "model": "ideal"},
                        {"ref": "R1", "type": "R", "nodes": ["in", "0"], "value": "10k"}]}
    project = project_of([buffer], converter={"fs_hz": 48000, "bits": 12, "full_scale_vpp": 4})
    analysis = ProjectAnalysis(project, spread=False)
    value, why = analysis.metric_value("snr_db", "chain", "buf", None)
    # Source: IEEE Std 1241, ideal N-bit converter SNR for a full-scale sine 6.02·N + 1.76 dB
    # (the rounded form of 20·log10(2^N·√1.5)).
    assert why is None and value == pytest.approx(6.02 * 12 + 1.76, abs=0.01)
    only, reason = analysis.metric_value("snr_noise_only_db", "chain", "buf", None)
    assert only is None and reason is not None and "zero" in reason


def test_snr_is_the_power_sum_of_chain_and_quantization_noise() -> None:
    r_ohm, c_f = 10e3, 1e-9
    rc = {"id": "rc", "name": "RC", "ports": {"in": "in", "out": "out"},
          "parts": [{"ref": "R1", "type": "R", "nodes": ["in", "out"], "value": r_ohm},
                    {"ref": "C1", "type": "C", "nodes": ["out", "0"], "value": c_f}]}
    bits, full_scale = 16, 2.0
    project = project_of([rc], converter={"fs_hz": 1e6, "bits": bits, "full_scale_vpp": full_scale},
                         settings={"temperature_c": 26.85, "noise_band_hz": [1, 1e6]})
    analysis = ProjectAnalysis(project, spread=False)
    fc = 1 / (TWO_PI * r_ohm * c_f)
    band = (2 / math.pi) * (math.atan(1e6 / fc) - math.atan(1 / fc))
    # Source: kT/C of an RC (equipartition), band-limited exactly; Boltzmann constant, SI Brochure.
    chain = math.sqrt(1.380649e-23 * 300.0 / c_f * band)
    # Source: Bennett (1948), quantization noise LSB/√12; IEEE Std 1241, LSB = FSR/2^N.
    quantization = full_scale / 2**bits / math.sqrt(12)
    full_scale_rms = full_scale / (2 * math.sqrt(2))  # Common practice, no source: sine rms = Vpp/(2√2)
    value, _ = analysis.metric_value("snr_db", "chain", "rc", None)
    # Common practice, no source: uncorrelated noises add as powers.
    assert value == pytest.approx(20 * math.log10(full_scale_rms / math.hypot(chain, quantization)), abs=1e-6)
    only, _ = analysis.metric_value("snr_noise_only_db", "chain", "rc", None)
    assert only == pytest.approx(20 * math.log10(full_scale_rms / chain), abs=1e-6)


def test_converter_headroom_and_an_over_range_finding() -> None:
    rf, rg = 47e3, 10e3
    gain_stage = {"id": "amp", "name": "gain", "ports": {"in": "in", "out": "out"},
                  "parts": [{"ref": "U1", "type": "opamp", "nodes": ["in", "n", "out"], "model": "ideal"},
                            {"ref": "RF", "type": "R", "nodes": ["out", "n"], "value": rf},
                            {"ref": "RG", "type": "R", "nodes": ["n", "0"], "value": rg}]}
    converter = {"fs_hz": 96000, "bits": 16, "full_scale_vpp": 3.3}
    # Common practice, no source: an ideal non-inverting stage has gain 1 + RF/RG at every frequency.
    gain = 1 + rf / rg
    for amplitude, over in (("0.2", False), ("0.4", True)):
        project = project_of([gain_stage], amplitude=amplitude, converter=converter)
        analysis = ProjectAnalysis(project, spread=False)
        value, why = analysis.metric_value("converter_headroom_db", "chain", "amp", None)
        assert why is None
        # Full scale (peak, half of peak-to-peak) over the largest peak at the converter input.
        assert value == pytest.approx(20 * math.log10((3.3 / 2) / (gain * float(amplitude))), abs=1e-9)
        findings = [item for item in analysis.findings() if item.kind == "over_range"]
        assert bool(findings) is over
        if over:
            assert "over-range" in findings[0].sentence


def test_yield_counts_every_numeric_check_with_the_same_part_values_everywhere() -> None:
    from stagewise.engine.spread import monte_carlo

    r_ohm, c_f = 10e3, 15e-9
    rc = {"id": "rc", "name": "RC", "ports": {"in": "in", "out": "out"},
          "parts": [{"ref": "R1", "type": "R", "nodes": ["in", "out"], "value": r_ohm, "tol": "5%"},
                    {"ref": "C1", "type": "C", "nodes": ["out", "0"], "value": c_f, "tol": "10%"}]}
    fc = 1 / (TWO_PI * r_ohm * c_f)
    band = {"min": 0.95 * fc, "max": 1.05 * fc}
    rc["checks"] = [
        {"id": "corner-chain", "text": "t", "metric": "f_high_3db_hz", "where": "chain", **band},
        {"id": "corner-alone", "text": "t", "metric": "f_high_3db_hz", "where": "isolated", **band},
        {"id": "corner-here", "text": "t", "metric": "f_high_3db_hz", "where": "in_chain", **band},
        {"id": "corner-from-input", "text": "t", "metric": "f_high_3db_hz", "where": "from_input", **band},
        {"id": "noise", "text": "t", "metric": "noise_out_rms_v", "where": "chain", "max": 1},
        {"id": "waived", "text": "t", "metric": "gain_db", "where": "chain", "at_hz": 100, "min": 10,
         "waiver": {"by": "A. Reviewer", "time": "2026-12-01T00:00:00Z", "justification": "bench value"}},
    ]
    project = project_of([rc], settings={"mc_samples": 400})
    document = ProjectAnalysis(project).spread
    counts = {item["label"]: item["pass_count"] for item in document["limits"]}
    assert set(counts) == {"rc/corner-chain", "rc/corner-alone", "rc/corner-here", "rc/corner-from-input"}
    skipped = {item["label"]: item["why"] for item in document["not_evaluated"]}
    assert set(skipped) == {"rc/noise", "rc/waived"} and "waived" in skipped["rc/waived"]
    # Source: first-order RC corner 1/(2πRC) (any circuits text), for each sample's part values.
    reference = monte_carlo(ProjectAnalysis(project).merged.system, project, current_drive=False)
    values = dict(zip(reference.parts, reference.sample_values.multipliers.T, strict=True))
    corner = fc / (values["rc:R1"] * values["rc:C1"])
    expected = int(np.count_nonzero((corner >= band["min"]) & (corner <= band["max"])))
    assert 0 < expected < 400
    # The same part values in every place: one stage alone, in chain and as the chain agree.
    assert counts == {"rc/corner-chain": expected, "rc/corner-alone": expected, "rc/corner-here": expected,
                      "rc/corner-from-input": expected}
    assert document["yield_pct"] == pytest.approx(100 * expected / 400)


def test_yield_of_a_stage_in_chain_uses_the_loaded_corner_with_each_samples_part_values() -> None:
    from stagewise.engine.spread import monte_carlo

    r_ohm, c_f, load_ohm = 10e3, 15e-9, 22e3
    rc = {"id": "rc", "name": "RC", "ports": {"in": "in", "out": "out"},
          "parts": [{"ref": "R1", "type": "R", "nodes": ["in", "out"], "value": r_ohm, "tol": "5%"},
                    {"ref": "C1", "type": "C", "nodes": ["out", "0"], "value": c_f, "tol": "10%"}]}
    load = {"id": "load", "name": "load", "ports": {"in": "in", "out": "in"},
            "parts": [{"ref": "RL", "type": "R", "nodes": ["in", "0"], "value": load_ohm, "tol": "5%"}]}
    # Source: first-order RC corner 1/(2πRC) (any circuits text); loaded by RL the source
    # resistance seen by C is R ∥ RL (Thevenin).
    loaded = 1 / (TWO_PI * (r_ohm * load_ohm / (r_ohm + load_ohm)) * c_f)
    band = {"min": 0.96 * loaded, "max": 1.04 * loaded}
    rc["checks"] = [{"id": "loaded", "text": "t", "metric": "f_high_3db_hz", "where": "in_chain", **band}]
    project = project_of([rc, load], settings={"mc_samples": 300})
    analysis = ProjectAnalysis(project)
    counts = {item["label"]: item["pass_count"] for item in analysis.spread["limits"]}
    reference = monte_carlo(analysis.merged.system, project, current_drive=False)
    m = dict(zip(reference.parts, reference.sample_values.multipliers.T, strict=True))
    r, rl = r_ohm * m["rc:R1"], load_ohm * m["load:RL"]
    corner = 1 / (TWO_PI * (r * rl / (r + rl)) * c_f * m["rc:C1"])
    expected = int(np.count_nonzero((corner >= band["min"]) & (corner <= band["max"])))
    assert 0 < expected < 300
    assert counts == {"rc/loaded": expected}
