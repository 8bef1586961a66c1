"""The analysis document, the check values it gives, and the stage in chain.

Closed forms are derived here from the impedances R and 1/(sC) by nodal analysis
(Source: any circuits text, e.g. Nilsson & Riedel, Electric Circuits, chapters on the Laplace
transform in circuit analysis). Component values are our own.
"""

from __future__ import annotations

import json
import math
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from stagewise.engine.analysis import ProjectAnalysis, analyze_project, response_points
from stagewise.files.project_file import load_project, loads_project

ROOT = Path(__file__).resolve().parents[2]
DEMOS = [ROOT / "projects" / "hydrophone.stagewise.json", ROOT / "projects" / "greenhouse.stagewise.json"]

R1, C1, R2, C2 = 3.3e3, 47e-9, 12e3, 6.8e-9


def _rc_pair_project(load_r: float | None = None, extra_checks: str = "") -> str:
    return json.dumps({
        "format": "stagewise-project", "version": 1, "title": "Two RC sections, unbuffered",
        "settings": {"f_min_hz": 10, "f_max_hz": 1e6, "points_per_decade": 40, "temperature_c": 25,
                     "ref_hz": 10, "noise_band_hz": [10, 20000], "seed": 3},
        "input": {"drive": "voltage", "amplitude": 0.1},
        "converter": {"fs_hz": 200000, "bits": 12, "full_scale_vpp": 2},
        "load": {"r_ohm": load_r, "c_f": None},
        "stages": [
            {"id": "first", "name": "First RC", "ports": {"in": "a", "out": "b"},
             "parts": [{"ref": "R1", "type": "R", "nodes": ["a", "b"], "value": R1},
                       {"ref": "C1", "type": "C", "nodes": ["b", "0"], "value": C1}],
             "checks": json.loads(extra_checks or "[]")},
            {"id": "second", "name": "Second RC", "ports": {"in": "a", "out": "b"},
             "parts": [{"ref": "R2", "type": "R", "nodes": ["a", "b"], "value": R2},
                       {"ref": "C2", "type": "C", "nodes": ["b", "0"], "value": C2}]},
        ],
    })


def _closed_forms(f_hz: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Chain V_out/V_in and the first section in chain, V_b/V_a, for two unbuffered RC sections."""
    s = 2j * math.pi * f_hz
    # Looking into the second section: R2 + 1/(sC2); in parallel with C1 it loads the first.
    z_second = R2 + 1 / (s * C2)
    z_shunt = 1 / (s * C1 + 1 / z_second)
    first_in_chain = z_shunt / (R1 + z_shunt)
    second = 1 / (1 + s * R2 * C2)
    return first_in_chain * second, first_in_chain


def test_chain_and_in_chain_match_the_loaded_closed_form() -> None:
    project = loads_project(_rc_pair_project())
    f_hz = [10.0, 1.7e3, 23e3, 410e3]
    chain_expected, first_expected = _closed_forms(np.array(f_hz))
    unit, chain, why = response_points(project, f_hz)
    assert unit == "V/V" and why is None and chain is not None
    np.testing.assert_allclose(chain, chain_expected, rtol=1e-9)
    _, first, why = response_points(project, f_hz, "first", in_chain=True)
    assert why is None and first is not None
    np.testing.assert_allclose(first, first_expected, rtol=1e-9)
    # Isolated, the first section is the plain divider 1/(1 + sR1C1).
    _, alone, _ = response_points(project, f_hz, "first")
    assert alone is not None
    np.testing.assert_allclose(alone, 1 / (1 + 2j * math.pi * np.array(f_hz) * R1 * C1), rtol=1e-9)


def test_in_chain_metrics_come_from_the_loaded_stage() -> None:
    analysis = ProjectAnalysis(loads_project(_rc_pair_project()), spread=False)
    in_chain = analysis.in_chain("first")
    assert not hasattr(in_chain, "why") or in_chain.why is None  # a StageAnalysis, not a failure
    f_hz = analysis.f_hz
    _, expected = _closed_forms(f_hz)
    np.testing.assert_allclose(in_chain.response, expected, rtol=1e-9)
    # Poles of the loaded first section: the roots of the chain denominator
    # s²R1C1R2C2 + s(R1C1 + R2C2 + R1C2) + 1 (the second section's node is inside the load).
    a, b, c = R1 * C1 * R2 * C2, R1 * C1 + R2 * C2 + R1 * C2, 1.0
    expected_poles = np.sort(np.roots([a, b, c]).real)
    poles = np.sort(np.asarray(in_chain.poles_rad_s).real)
    np.testing.assert_allclose(poles, expected_poles, rtol=1e-6)


def test_check_values_follow_the_metric_table() -> None:
    # A first-order corner lies at 1/(2πRC). Source: any circuits text.
    checks = json.dumps([
        {"id": "corner", "text": "Corner of the first section alone", "metric": "f_high_3db_hz",
         "where": "isolated", "max": 1e6},
        {"id": "at-corner", "text": "Gain in chain at 1 kHz", "metric": "gain_db", "where": "in_chain",
         "at_hz": 1000, "min": -20},
    ])
    project = loads_project(_rc_pair_project(extra_checks=checks))
    analysis = ProjectAnalysis(project, spread=False)
    value, why = analysis.metric_value("f_high_3db_hz", "isolated", "first", None)
    assert why is None
    # A low-pass corner is where |H|² falls to half its DC value, whatever ref_hz (10 Hz) says.
    f_c = 1 / (2 * math.pi * R1 * C1)
    assert value == pytest.approx(f_c, rel=1e-9)
    value, why = analysis.metric_value("gain_db", "in_chain", "first", 1000.0)
    _, first = _closed_forms(np.array([1000.0]))
    assert value == pytest.approx(20 * math.log10(abs(first[0])), abs=1e-9)
    # The stage in chain sees Z_in of the second section: R2 + 1/(sC2) at the reference (10 Hz).
    value, why = analysis.metric_value("zin_ohm", "in_chain", "second", None)
    assert value == pytest.approx(abs(R2 + 1 / (2j * math.pi * 10 * C2)), rel=1e-9)
    # Metrics without a value say why.
    value, why = analysis.metric_value("phase_margin_deg", "isolated", "first", None)
    assert value is None and "op-amp" in (why or "")


def test_signed_loading_error_at_its_largest_deviation() -> None:
    # Source: nodal analysis (closed forms above): the second RC section loads the first, so in chain
    # the first section's gain falls below its isolated 1/(1 + sR1C1); the loading error in chain minus
    # isolated is negative, largest where |20·log10(ratio)| peaks on the grid.
    project = loads_project(_rc_pair_project())
    analysis = ProjectAnalysis(project, spread=False)
    stage = project.stage("first")
    assert stage is not None
    document = analysis.stage_document(stage)
    f_hz = analysis.f_hz
    _, first = _closed_forms(f_hz)
    isolated = 1 / (1 + 2j * math.pi * f_hz * R1 * C1)
    error_db = 20 * np.log10(np.abs(first / isolated))
    worst = int(np.argmax(np.abs(error_db)))
    assert document["loading_error_db"] == pytest.approx(error_db[worst], abs=1e-9)
    assert document["loading_error_db"] < 0
    assert document["loading_error_f_hz"] == pytest.approx(f_hz[worst], rel=1e-12)
    assert document["loading_error_db_max"] == pytest.approx(abs(error_db[worst]), abs=1e-9)
    value, why = analysis.metric_value("loading_error_db", "in_chain", "first", None)
    assert why is None and value == pytest.approx(error_db[worst], abs=1e-9)


def test_resistive_load_changes_the_last_stage_in_chain_only() -> None:
    load = 20e3
    project = loads_project(_rc_pair_project(load_r=load))
    f_hz = [100.0, 5e3, 60e3]
    s = 2j * math.pi * np.array(f_hz)
    # Second section loaded by R_L: (R_L ∥ 1/(sC2)) / (R2 + R_L ∥ 1/(sC2)).
    shunt = 1 / (s * C2 + 1 / load)
    _, second, why = response_points(project, f_hz, "second", in_chain=True)
    assert why is None and second is not None
    np.testing.assert_allclose(second, shunt / (R2 + shunt), rtol=1e-9)


@pytest.mark.parametrize("path", DEMOS, ids=lambda p: p.name.split(".")[0])
def test_stage_in_chain_agrees_with_the_port_relation_cascade(path: Path) -> None:
    # Cross-check inside the engine (REFERENCES.md): two independent routes to the same numbers.
    analysis = ProjectAnalysis(load_project(path), spread=False)
    chain = analysis.chain
    for entry in chain.stages:
        in_chain = analysis.in_chain(entry.stage_id)
        if entry.in_chain is None:
            assert not hasattr(in_chain, "response")
            continue
        np.testing.assert_allclose(in_chain.response, entry.in_chain, rtol=1e-7)


@pytest.mark.parametrize("path", DEMOS, ids=lambda p: p.name.split(".")[0])
def test_the_document_has_every_key_of_design_section_6(path: Path) -> None:
    document = analyze_project(load_project(path), path)
    assert document["file"] == str(path)
    assert len(document["sha256"]) == 64
    metric_keys = ("gain_db", "peak_gain_db", "f_low_3db_hz", "f_high_3db_hz", "peaking_db", "poles", "zeros",
                   "step", "loops")
    for stage in document["stages"]:
        for key in ("id", "name", "isolated", "in_chain", "from_input", "loading_error_db_max",
                    "loading_error_db", "loading_error_f_hz", "zin_ohm_at_ref", "zout_ohm_at_ref", "checks"):
            assert key in stage
        for where in ("isolated", "in_chain", "from_input"):
            metrics = stage[where]
            assert metrics is not None, stage.get(f"{where}_why")
            for key in metric_keys:
                assert key in metrics
                if metrics[key] is None:
                    assert metrics[f"{key}_why"], (stage["id"], where, key)
            for key in ("rise_s", "overshoot_pct", "settle_1pct_s", "final"):
                assert key in metrics["step"]
            for pole in metrics["poles"]:
                assert set(pole) >= {"re", "im", "f_hz", "q"}
                if pole["q"] is None:
                    assert pole["q_why"], (stage["id"], where, pole)
            # The contract: every M names its pass-band reference.
            reference = metrics["ref"]
            assert reference["kind"] in ("dc", "hf", "midband", "ref_hz")
            assert set(reference) >= {"kind", "f_hz", "gain_db", "shape", "note"}
            if reference["f_hz"] is None:
                assert reference["f_hz_why"]
        for check in stage["checks"]:
            if check["metric"] in ("f_low_3db_hz", "f_high_3db_hz", "peaking_db", "attenuation_db"):
                assert check["ref"]["kind"] in ("dc", "hf", "midband", "ref_hz"), check
    chain = document["chain"]
    for key in (*metric_keys, "noise", "snr_db", "alias_attenuation_db", "headroom", "spread"):
        assert key in chain
    for key in ("out_rms_v", "out_density_v_rthz_at_ref", "in_rms", "band_hz", "top_sources"):
        assert key in chain["noise"]
    for key in ("seed", "samples", "yield_pct"):
        assert key in chain["spread"]
    # Every finite-gain op-amp of the demos has a phase margin in chain.
    for loop in chain["loops"]:
        assert loop["phase_margin_deg"] is not None, loop


def test_hydrophone_low_corner_fails_only_in_chain() -> None:
    # The piezo element's 3.3 nF meets the buffer's 2.2 MΩ bias resistor only in chain: a
    # high-pass corner near 1/(2π·2.2 MΩ·(3.3 nF + 150 pF)) ≈ 21 Hz appears. Source: first-order
    # corner 1/(2πRC), any circuits text.
    project = load_project(DEMOS[0])
    analysis = ProjectAnalysis(project, spread=False)
    isolated, _ = analysis.metric_value("gain_db", "isolated", "sensor", 20.0)
    in_chain, _ = analysis.metric_value("gain_db", "in_chain", "sensor", 20.0)
    assert isolated is not None and in_chain is not None
    assert isolated > -1.0 > in_chain
    # Closed form with an ideal buffer (bias resistor only); the op-amp's few pF of input
    # capacitance against 153 pF of cable move it by well under 0.1 dB.
    s = 2j * math.pi * 20.0
    c_element, r_leak, c_cable, r_bias = 3.3e-9, 10e9, 150e-12, 2.2e6
    z_series = 1 / (s * c_element + 1 / r_leak)
    z_shunt = 1 / (s * c_cable + 1 / r_bias)
    assert in_chain == pytest.approx(20 * math.log10(abs(z_shunt / (z_series + z_shunt))), abs=0.1)


def test_greenhouse_transimpedance_margin_fails_only_in_chain() -> None:
    # The photodiode's junction capacitance at the summing node lowers the feedback factor and
    # the phase margin of the transimpedance loop (common practice, no source).
    analysis = ProjectAnalysis(load_project(DEMOS[1]), spread=False)
    isolated, _ = analysis.metric_value("phase_margin_deg", "isolated", "tia", None)
    in_chain, _ = analysis.metric_value("phase_margin_deg", "in_chain", "tia", None)
    assert isolated is not None and in_chain is not None
    assert isolated > 45.0 > in_chain


def test_greenhouse_photodiode_corner_is_referred_to_its_dc_transimpedance() -> None:
    # Source: first-order corner 1/(2πRC), any circuits text: the diode model (200 MΩ ∥ 470 pF, read from
    # the demo file) is a 1.69 Hz low-pass; its corner is 3 dB below its DC transimpedance of 200 MΩ
    # (166 dBΩ), not 3 dB below its gain at ref_hz = 1 kHz (which put it at 1.41 kHz with 54 dB of peaking).
    project = load_project(DEMOS[1])
    stage = project.stage("diode")
    assert stage is not None
    values = {part.ref: part.value.si for part in stage.parts if part.value is not None}
    corner = 1 / (2 * math.pi * values["R1"] * values["C1"])
    analysis = ProjectAnalysis(project, spread=False)
    document = analysis.stage_document(stage)["isolated"]
    assert document["f_high_3db_hz"] == pytest.approx(corner, rel=1e-9)
    assert document["peaking_db"] == pytest.approx(0.0, abs=1e-9)
    assert document["ref"]["kind"] == "dc"
    assert document["ref"]["gain_db"] == pytest.approx(20 * math.log10(values["R1"]), abs=1e-9)


def test_analyze_command_prints_the_document() -> None:
    result = subprocess.run([sys.executable, "-m", "stagewise", "analyze", str(DEMOS[1]), "--json"],
                            capture_output=True, text=True, check=False, timeout=300)
    assert result.returncode == 0, result.stderr
    document = json.loads(result.stdout)
    assert [stage["id"] for stage in document["stages"]] == [s.id for s in load_project(DEMOS[1]).stages]


def test_response_command_in_chain_and_errors(tmp_path: Path) -> None:
    path = tmp_path / "pair.stagewise.json"
    path.write_text(_rc_pair_project(), encoding="utf-8")
    result = subprocess.run([sys.executable, "-m", "stagewise", "response", str(path), "--stage", "first",
                             "--in-chain", "--freqs", "1k,23k", "--json"],
                            capture_output=True, text=True, check=False, timeout=120)
    assert result.returncode == 0, result.stderr
    points = json.loads(result.stdout)["points"]
    _, expected = _closed_forms(np.array([1e3, 23e3]))
    for point, value in zip(points, expected, strict=True):
        assert point["re"] == pytest.approx(value.real, rel=1e-9)
        assert point["im"] == pytest.approx(value.imag, rel=1e-9)
        assert point["mag_db"] == pytest.approx(20 * math.log10(abs(value)), abs=1e-9)
        assert point["phase_deg"] == pytest.approx(math.degrees(np.angle(value)), abs=1e-9)
    bad = subprocess.run([sys.executable, "-m", "stagewise", "response", str(path), "--freqs", "1k,abc"],
                         capture_output=True, text=True, check=False, timeout=120)
    assert bad.returncode == 2
    assert bad.stderr.count("\n") == 1 and "Traceback" not in bad.stderr


def test_bandwidth_check_on_an_rc_low_pass_is_not_fooled_by_ref_hz() -> None:
    # Source: first-order corner 1/(2πRC), any circuits text: 1 kΩ and 1 µF give 159.15 Hz. With ref_hz at
    # 1 kHz, a corner taken 3 dB below the gain there would read 1.42 kHz and meet "bandwidth ≥ 1 kHz";
    # by the trade's definition (3 dB below the DC gain) the check is not met.
    project = loads_project(json.dumps({
        "format": "stagewise-project", "version": 1, "title": "RC low-pass",
        "settings": {"f_min_hz": 1, "f_max_hz": 1e6, "points_per_decade": 50, "ref_hz": 1000},
        "stages": [{"id": "rc", "name": "RC", "ports": {"in": "in", "out": "out"},
                    "parts": [{"ref": "R1", "type": "R", "nodes": ["in", "out"], "value": "1k"},
                              {"ref": "C1", "type": "C", "nodes": ["out", "0"], "value": "1u"}],
                    "checks": [{"id": "bw", "text": "Bandwidth at least 1 kHz", "metric": "f_high_3db_hz",
                                "where": "isolated", "min": 1000}]}],
    }))
    from stagewise.review.checks import evaluate_project
    from stagewise.review.words import CheckState

    result = evaluate_project(project, ProjectAnalysis(project, spread=False))[0]
    assert result.state is CheckState.NOT_MET
    assert result.value == pytest.approx(1 / (2 * math.pi * 1e3 * 1e-6), rel=1e-9)
    assert result.reference == "re DC gain 0.00 dB"
