"""The third place of every stage: the chain seen from its input (`from_input`).

A transimpedance stage behind a photodiode: at its own port (V_out/I_in) it looks the same
isolated and in chain, because the current that enters it is what it converts; only from the
chain's input does the diode capacitance's effect on the loop show. Component values are ours.
"""

from __future__ import annotations

import json
import math
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from stagewise.engine.analysis import ProjectAnalysis, response_points
from stagewise.files.project_file import loads_project
from stagewise.review.checks import evaluate_project
from stagewise.review.words import CheckState

TWO_PI = 2.0 * math.pi
RF_OHM, CD_F, RSH_OHM = 10e3, 100e-12, 100e9     # our own transimpedance and diode model
GBW_HZ, A0_DB = 10e6, 160.0                      # near-integrator op-amp: A(s) ≈ ωt/s above 1 mHz


def _project(checks: list[dict[str, object]] | None = None) -> str:
    return json.dumps({
        "format": "stagewise-project", "version": 1, "title": "Photodiode transimpedance",
        "settings": {"f_min_hz": 10, "f_max_hz": 100e6, "points_per_decade": 80, "temperature_c": 25,
                     "ref_hz": 1000, "noise_band_hz": [10, 1e6], "seed": 2},
        "input": {"drive": "current", "amplitude": "1u"},
        "opamp_models": {"fast": {"a0_db": A0_DB, "gbw_hz": GBW_HZ}},
        "stages": [
            {"id": "diode", "name": "Photodiode", "drive": "current", "ports": {"in": "pd", "out": "pd"},
             "parts": [{"ref": "CD", "type": "C", "nodes": ["pd", "0"], "value": CD_F},
                       {"ref": "RSH", "type": "R", "nodes": ["pd", "0"], "value": RSH_OHM}]},
            {"id": "tia", "name": "Transimpedance", "drive": "current", "ports": {"in": "m", "out": "out"},
             "parts": [{"ref": "RF", "type": "R", "nodes": ["m", "out"], "value": RF_OHM},
                       {"ref": "U1", "type": "opamp", "nodes": ["0", "m", "out"], "model": "fast"}],
             "checks": checks or []},
        ],
    })


def _second_order() -> tuple[float, float]:
    # Source: the published second-order analysis of a transimpedance amplifier with a single-pole
    # op-amp A(s) = ωt/s and no feedback capacitor (common practice, handbook formula, e.g. Graeme,
    # "Photodiode Amplifiers: Op Amp Solutions", 1996, ch. 2): Zt = −Rf/(1 + s/ωt + s²·Rf·Cd/ωt), so
    # ωn = sqrt(ωt/(Rf·Cd)) (f_n = sqrt(GBW/(2π·Rf·Cd))) and Q = ωt/ωn = sqrt(ωt·Rf·Cd).
    omega_t = TWO_PI * GBW_HZ
    omega_n = math.sqrt(omega_t / (RF_OHM * CD_F))
    return omega_n, omega_t / omega_n


def test_transimpedance_peaks_from_the_input_as_the_second_order_form_predicts() -> None:
    omega_n, quality = _second_order()
    assert quality > 5  # a badly peaking design: the point of the test
    analysis = ProjectAnalysis(loads_project(_project()), spread=False)
    stage = analysis.project.stage("tia")
    assert stage is not None
    document = analysis.stage_document(stage)
    seen = document["from_input"]
    assert seen["unit"] == "Ω"
    # Source: same form: DC transimpedance Rf (reference, dBΩ) and the resonant peak over it,
    # 20·log10(Q/sqrt(1 − 1/(4Q²))) at ωn·sqrt(1 − 1/(2Q²)) (Ogata, Modern Control Engineering, ch. 7)
    assert seen["ref"]["kind"] == "dc"
    assert seen["ref"]["gain_db"] == pytest.approx(20 * math.log10(RF_OHM), abs=1e-4)
    assert seen["peaking_db"] == pytest.approx(20 * math.log10(quality / math.sqrt(1 - 1 / (4 * quality**2))),
                                               abs=2e-3)
    assert seen["peak_hz"] == pytest.approx(omega_n * math.sqrt(1 - 1 / (2 * quality**2)) / TWO_PI, rel=1e-3)
    # Source: Ogata, ch. 5: step overshoot exp(−πζ/sqrt(1 − ζ²)), ζ = 1/(2Q)
    zeta = 1 / (2 * quality)
    assert seen["step"]["overshoot_pct"] == pytest.approx(100 * math.exp(-math.pi * zeta / math.sqrt(1 - zeta**2)),
                                                          rel=2e-3)
    pair = [pole for pole in seen["poles"] if pole["im"] > 0]
    assert len(pair) == 1
    assert pair[0]["f_hz"] == pytest.approx(omega_n / TWO_PI, rel=1e-3)
    assert pair[0]["q"] == pytest.approx(quality, rel=1e-3)
    # At its own port the stage hides it: V_out/I_in in chain equals isolated, no peaking to speak of
    # (Source: same form with Cd = 0: Zt = −Rf/(1 + s/ωt), a single pole).
    assert document["in_chain"]["peaking_db"] < 0.01
    assert document["isolated"]["peaking_db"] < 0.01


def test_from_input_metrics_are_check_values() -> None:
    omega_n, quality = _second_order()
    checks = [{"id": "peak", "text": "No more than 3 dB of peaking seen from the diode", "metric": "peaking_db",
               "where": "from_input", "max": 3},
              {"id": "over", "text": "Overshoot below 20 %", "metric": "overshoot_pct", "where": "from_input",
               "max": 20},
              {"id": "own", "text": "At its own port", "metric": "peaking_db", "where": "in_chain", "max": 3}]
    project = loads_project(_project(checks))
    results = {r.check_id: r for r in evaluate_project(project, ProjectAnalysis(project, spread=False))}
    assert results["peak"].state is CheckState.NOT_MET and results["over"].state is CheckState.NOT_MET
    assert results["own"].state is CheckState.MET
    assert results["peak"].reference is not None and "re DC gain 80.00 dBΩ" in results["peak"].reference
    # Source: as above, the second-order peak over the DC transimpedance
    assert results["peak"].value == pytest.approx(20 * math.log10(quality / math.sqrt(1 - 1 / (4 * quality**2))),
                                                  abs=2e-3)


def test_from_input_response_points_match_the_second_order_form(tmp_path: Path) -> None:
    omega_n, quality = _second_order()
    frequencies = [1e3, 300e3, 1.2e6, 5e6]
    project = loads_project(_project())
    unit, values, why = response_points(project, frequencies, "tia", from_input=True)
    assert why is None and values is not None and unit == "Ω"
    s = 1j * TWO_PI * np.array(frequencies)
    # Source: the second-order form above (the op-amp's finite A0 and the 100 GΩ shunt move it by < 1e-4)
    expected = -RF_OHM / (1 + s / (quality * omega_n) + (s / omega_n) ** 2)
    np.testing.assert_allclose(values, expected, rtol=1e-4)
    path = tmp_path / "tia.stagewise.json"
    path.write_text(_project(), encoding="utf-8")
    result = subprocess.run([sys.executable, "-m", "stagewise", "response", str(path), "--stage", "tia",
                             "--from-input", "--freqs", "1k,1.2M", "--json"],
                            capture_output=True, text=True, check=False, timeout=120)
    assert result.returncode == 0, result.stderr
    document = json.loads(result.stdout)
    assert document["unit"] == "Ω" and "from the chain input" in document["what"]
    assert document["points"][1]["mag_db"] == pytest.approx(20 * math.log10(abs(expected[2])), abs=1e-3)
    refused = subprocess.run([sys.executable, "-m", "stagewise", "response", str(path), "--from-input",
                              "--freqs", "1k"], capture_output=True, text=True, check=False, timeout=120)
    assert refused.returncode == 2 and "--from-input needs --stage" in refused.stderr


def test_last_stage_from_input_is_the_whole_chain() -> None:
    # Common practice, no source: the chain's drive to its last output is the chain response itself.
    analysis = ProjectAnalysis(loads_project(_project()), spread=False)
    document = analysis.document()
    last = document["stages"][-1]["from_input"]
    for key in ("peak_gain_db", "peaking_db", "f_high_3db_hz"):
        assert last[key] == pytest.approx(document["chain"][key], rel=1e-12)
