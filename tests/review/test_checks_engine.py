"""Check evaluation with the real analysis engine, against closed forms worked out by hand."""

from __future__ import annotations

import copy
import json
import math
from pathlib import Path
from typing import Any

import pytest

from stagewise.cli import main
from stagewise.files.project_file import load_project, loads_project
from stagewise.review.checks import evaluate_project
from stagewise.review.words import CheckState

analysis = pytest.importorskip("stagewise.engine.analysis")

ROOT = Path(__file__).resolve().parents[2]

R_OHM, C_F = 6800.0, 2.2e-9     # RC low-pass of our own choosing
RF_OHM, RG_OHM = 39e3, 1.3e3    # non-inverting gain 1 + 39k/1k3 = 31
CORNER_HZ = 1 / (2 * math.pi * R_OHM * C_F)
GAIN_DB = 20 * math.log10(1 + RF_OHM / RG_OHM)


def _document(corner_min: float, corner_max: float, gain_min: float, gain_max: float) -> dict[str, Any]:
    return {
        "format": "stagewise-project", "version": 1, "title": "Engine check test",
        "settings": {"f_min_hz": 1, "f_max_hz": 1e6, "points_per_decade": 60, "temperature_c": 25,
                     "ref_hz": 100, "noise_band_hz": [10, 20000], "seed": 1},
        "stages": [
            {"id": "amp", "name": "Gain 31", "ports": {"in": "in", "out": "out"},
             "parts": [{"ref": "U1", "type": "opamp", "nodes": ["in", "n", "out"], "model": "ideal"},
                       {"ref": "R2", "type": "R", "nodes": ["out", "n"], "value": "39k"},
                       {"ref": "R1", "type": "R", "nodes": ["n", "0"], "value": "1k3"},
                       {"ref": "R3", "type": "R", "nodes": ["in", "0"], "value": "100k"}],
             "checks": [{"id": "gain", "text": "Gain", "metric": "gain_db", "where": "isolated", "at_hz": 1000,
                         "min": gain_min, "max": gain_max}]},
            {"id": "rc", "name": "RC", "ports": {"in": "in", "out": "out"},
             "parts": [{"ref": "R1", "type": "R", "nodes": ["in", "out"], "value": "6k8"},
                       {"ref": "C1", "type": "C", "nodes": ["out", "0"], "value": "2n2"}],
             "checks": [{"id": "corner", "text": "Corner", "metric": "f_high_3db_hz", "where": "isolated",
                         "min": corner_min, "max": corner_max},
                        {"id": "at2k", "text": "Loss at 2 kHz", "metric": "gain_db", "where": "isolated",
                         "at_hz": 2000, "min": -1}]},
        ],
    }


def test_engine_values_match_closed_forms_and_set_the_states() -> None:
    project = loads_project(json.dumps(_document(0.99 * CORNER_HZ, 1.01 * CORNER_HZ, GAIN_DB - 0.01,
                                                 GAIN_DB + 0.01)))
    results = {r.check_id: r for r in evaluate_project(project, analysis.metric_provider(project))}
    # Source: first-order RC low-pass, f_c = 1/(2πRC) and |H|² = 1/(1 + (f/f_c)²); any circuits text.
    # A low-pass corner is 3 dB below its DC gain, whatever ref_hz (100 Hz here) says.
    assert results["corner"].value == pytest.approx(CORNER_HZ, rel=1e-9)
    assert results["at2k"].value == pytest.approx(-10 * math.log10(1 + (2000 / CORNER_HZ) ** 2), rel=1e-9)
    # Source: ideal non-inverting amplifier, gain 1 + Rf/Rg (any op-amp text, ideal op-amp rules).
    assert results["gain"].value == pytest.approx(GAIN_DB, abs=1e-9)
    assert {r.state for r in results.values()} == {CheckState.MET}
    # Limits just past the closed-form values: the same engine values are now not met.
    project = loads_project(json.dumps(_document(1.001 * CORNER_HZ, 1.1 * CORNER_HZ, GAIN_DB + 0.001,
                                                 GAIN_DB + 0.1)))
    results = {r.check_id: r for r in evaluate_project(project, analysis.metric_provider(project))}
    assert results["corner"].state is CheckState.NOT_MET and results["gain"].state is CheckState.NOT_MET


def test_check_command_with_the_engine(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = tmp_path / "engine.stagewise.json"
    document = _document(0.99 * CORNER_HZ, 1.01 * CORNER_HZ, GAIN_DB - 0.01, GAIN_DB + 0.01)
    path.write_text(json.dumps(document), encoding="utf-8")
    assert main(["check", str(path)]) == 0
    # Source: an RC low-pass passes DC unchanged (gain 1, 0 dB; any circuits text): the corner is shown
    # beside the reference it was taken against.
    assert "Upper −3 dB corner, isolated (re DC gain 0.00 dB)" in capsys.readouterr().out
    failing = copy.deepcopy(document)
    failing["stages"][1]["checks"][0]["min"] = 1.001 * CORNER_HZ
    path.write_text(json.dumps(failing), encoding="utf-8")
    assert main(["check", str(path)]) == 1
    assert "below the minimum" in capsys.readouterr().out


def test_hydrophone_sensor_in_chain_against_nodal_analysis() -> None:
    project = load_project(ROOT / "projects" / "hydrophone.stagewise.json")
    sensor, buffer = project.stage("sensor"), project.stage("buffer")
    assert sensor is not None and buffer is not None
    values = {part.ref: part.value.si for part in sensor.parts if part.value is not None}
    bias = buffer.part("R1")
    assert bias is not None and bias.value is not None
    model = project.opamp_models["low-noise-jfet-10M"]
    assert model.cin_cm_f is not None
    omega = 2 * math.pi * 20.0
    # Source: nodal analysis at the buffer input (Kirchhoff's current law with impedances R and
    # 1/(jωC)): the element's EMF drives C1 ∥ R1 into C2, the buffer's bias resistor and its
    # common-mode input capacitance; the follower bootstraps its differential input.
    numerator = 1 / values["R1"] + 1j * omega * values["C1"]
    denominator = (1 / values["R1"] + 1 / bias.value.si
                   + 1j * omega * (values["C1"] + values["C2"] + model.cin_cm_f.si))
    expected_db = 20 * math.log10(abs(numerator / denominator))
    results = {(r.stage_id, r.check_id): r for r in evaluate_project(project, analysis.metric_provider(project))}
    in_chain = results[("sensor", "lf-20hz")]
    assert in_chain.value == pytest.approx(expected_db, abs=1e-6)
    assert in_chain.state is CheckState.NOT_MET
    # Isolated, only the cable loads the element: C1/(C1 + C2) with the leakage R1 across C1.
    omega = 2 * math.pi * 1000.0
    isolated = (1 / values["R1"] + 1j * omega * values["C1"]) / (
        1 / values["R1"] + 1j * omega * (values["C1"] + values["C2"]))
    assert results[("sensor", "mid-1k")].value == pytest.approx(20 * math.log10(abs(isolated)), abs=1e-9)


def test_a_transimpedance_gain_is_shown_in_dbohm_where_the_place_is_current_driven() -> None:
    # A 47 kΩ feedback resistor on an ideal op-amp's inverting input, current-driven: V_out/I_in
    # = −47 kΩ, |Z| = 20·log10(47e3) dB re 1 V/A (dBΩ). Behind it, a voltage-driven unity follower
    # in a current-driven chain: alone its gain is V/V (dB), seen from the chain input Ω (dBΩ).
    # Source: ideal op-amp rules (virtual ground), any op-amp text; dBΩ = 20·log10(|Z| / 1 Ω).
    document = {
        "format": "stagewise-project", "version": 1, "title": "TIA units",
        "settings": {"f_min_hz": 1, "f_max_hz": 1e6, "points_per_decade": 20, "ref_hz": 100},
        "input": {"drive": "current", "amplitude": "1u"},
        "stages": [
            {"id": "tia", "name": "TIA", "drive": "current", "ports": {"in": "n", "out": "out"},
             "parts": [{"ref": "U1", "type": "opamp", "nodes": ["0", "n", "out"], "model": "ideal"},
                       {"ref": "R1", "type": "R", "nodes": ["n", "out"], "value": "47k"}],
             "checks": [{"id": "zt", "text": "Zt", "metric": "gain_db", "where": "isolated", "min": 93}]},
            {"id": "buf", "name": "Follower", "ports": {"in": "in", "out": "out"},
             "parts": [{"ref": "U1", "type": "opamp", "nodes": ["in", "out", "out"], "model": "ideal"},
                       {"ref": "R1", "type": "R", "nodes": ["in", "0"], "value": "100k"}],
             "checks": [{"id": "alone", "text": "Unity", "metric": "gain_db", "where": "isolated", "min": -0.1},
                        {"id": "chain", "text": "Zt from the input", "metric": "gain_db", "where": "from_input",
                         "min": 93}]},
        ],
    }
    project = loads_project(json.dumps(document))
    results = {r.check_id: r for r in evaluate_project(project, analysis.metric_provider(project))}
    expected = 20 * math.log10(47e3)
    assert results["zt"].value == pytest.approx(expected, rel=1e-9)
    assert results["zt"].unit == "dBΩ" and results["zt"].limits == "≥ 93 dBΩ"
    assert results["chain"].unit == "dBΩ" and results["chain"].value == pytest.approx(expected, rel=1e-9)
    assert results["alone"].unit == "dB" and results["alone"].value == pytest.approx(0.0, abs=1e-9)
