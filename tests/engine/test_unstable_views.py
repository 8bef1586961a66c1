"""An unstable place is said to be unstable wherever its figures are shown (DESIGN 4: stability).

The positive-feedback stage (R1 1 kΩ in→p, R2 10 kΩ p→out, op-amp + on p, − on node 0; A0 100 dB,
GBW 1 MHz) has a closed-loop pole at (GBW/A0)·(A0·β − 1) ≈ 90.9 kHz, β = R1/(R1 + R2), in the
right half-plane. Source: Black's feedback formula (H. S. Black, 1934) with the sign of positive
feedback. Its H(jω) is still the formula's value, so `response` prints points, and must say the
verdict beside them; the pass-band reference goes with the figures taken against it.
"""

from __future__ import annotations

import json
import math
import subprocess
import sys
from pathlib import Path
from typing import Any

import control  # type: ignore[import-untyped]
import numpy as np
import pytest

from stagewise.engine.analysis import analyze_project
from stagewise.engine.metrics import reference_words
from stagewise.files.codec import decode

TWO_PI = 2 * math.pi
STAGE: dict[str, Any] = {
    "id": "pf", "name": "positive feedback", "ports": {"in": "in", "out": "out"},
    "parts": [{"ref": "R1", "type": "R", "nodes": ["in", "p"], "value": "1k"},
              {"ref": "R2", "type": "R", "nodes": ["p", "out"], "value": "10k"},
              {"ref": "U1", "type": "opamp", "nodes": ["p", "0", "out"], "model": "m"}],
    "checks": [{"id": "bw", "text": "bandwidth", "metric": "f_high_3db_hz", "where": "isolated", "min": "10k"}],
}
PROJECT: dict[str, Any] = {
    "format": "stagewise-project", "version": 1, "title": "unstable views",
    "settings": {"f_min_hz": 1, "f_max_hz": "1M", "points_per_decade": 20, "ref_hz": 1000},
    "input": {"drive": "voltage", "amplitude": "10m"},
    "opamp_models": {"m": {"a0_db": 100, "gbw_hz": "1M"}},
    "stages": [STAGE],
}


def _pole_hz() -> float:
    # Reference library: control 0.10.2, feedback(sign=+1) then poles.
    a0 = 1e5
    closed = control.feedback(control.tf([a0], [a0 / (TWO_PI * 1e6), 1]), 1e3 / 11e3, sign=1)
    return float(np.max(np.real(control.poles(closed)))) / TWO_PI


def _response(path: Path, *extra: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "stagewise", "response", str(path), "--freqs", "10,1k", *extra],
                          capture_output=True, text=True, timeout=120, check=False)


@pytest.fixture
def unstable_file(tmp_path: Path) -> Path:
    path = tmp_path / "unstable.stagewise.json"
    path.write_text(json.dumps(PROJECT), encoding="utf-8")
    return path


@pytest.mark.parametrize("place", [("--stage", "pf"), ("--stage", "pf", "--in-chain"),
                                   ("--stage", "pf", "--from-input"), ()])
def test_response_json_carries_the_stability_verdict_beside_the_points(unstable_file: Path,
                                                                       place: tuple[str, ...]) -> None:
    result = _response(unstable_file, *place, "--json")
    assert result.returncode == 0, result.stderr
    document = json.loads(result.stdout)
    assert len(document["points"]) == 2  # the documented contract stays: points with f_hz, re, im…
    assert set(document["points"][0]) == {"f_hz", "re", "im", "mag_db", "phase_deg"}
    stability = document["stability"]
    assert stability["verdict"] == "unstable"
    assert "right-half-plane pole" in stability["why"]
    assert stability["poles"][0]["f_hz"] == pytest.approx(_pole_hz(), rel=1e-6)


def test_response_table_warns_under_its_title_that_the_system_is_unstable(unstable_file: Path) -> None:
    result = _response(unstable_file, "--stage", "pf")
    assert result.returncode == 0, result.stderr
    lines = result.stdout.splitlines()
    assert lines[1].startswith("warning: stage pf isolated is unstable: a right-half-plane pole at 90.9 kHz")
    assert sum("warning" in line for line in lines) == 1


def test_a_stable_response_says_stable_and_prints_no_warning(tmp_path: Path) -> None:
    # Common practice, no source: a 1 kΩ/1 µF RC low-pass has one pole at −1/(RC), left half-plane.
    rc = {**PROJECT, "opamp_models": {}, "stages": [{
        "id": "rc", "name": "RC", "ports": {"in": "in", "out": "out"},
        "parts": [{"ref": "R1", "type": "R", "nodes": ["in", "out"], "value": "1k"},
                  {"ref": "C1", "type": "C", "nodes": ["out", "0"], "value": "1u"}]}]}
    path = tmp_path / "rc.stagewise.json"
    path.write_text(json.dumps(rc), encoding="utf-8")
    document = json.loads(_response(path, "--stage", "rc", "--json").stdout)
    assert document["stability"]["verdict"] == "stable" and document["stability"]["why"] is None
    assert "warning" not in _response(path, "--stage", "rc").stdout


def test_an_unstable_place_has_no_reference_gain_beside_its_nulled_figures() -> None:
    document = analyze_project(decode(json.loads(json.dumps(PROJECT))), spread=False)
    stage = document["stages"][0]
    for where in ("isolated", "in_chain", "from_input"):
        metrics = stage[where]
        assert metrics["gain_db"] is None and metrics["f_high_3db_hz"] is None
        reference = metrics["ref"]
        # The contract's keys stay; the gain is null with the same reason as the figures.
        assert set(reference) >= {"kind", "f_hz", "gain_db"}
        assert reference["gain_db"] is None and reference["gain_db_why"] == metrics["gain_db_why"]
        assert reference_words(reference) == "no pass-band reference: unstable"
    chain = document["chain"]
    assert chain["ref"]["gain_db"] is None and "unstable" in chain["ref"]["gain_db_why"]
    check = stage["checks"][0]
    assert check["state"] == "no value" and check["ref"]["gain_db"] is None


def test_a_transimpedance_table_reads_its_magnitude_in_dbohm(tmp_path: Path) -> None:
    # Source: ideal op-amp rules (virtual ground), any op-amp text: a 100 kΩ feedback resistor on
    # the inverting input, current-driven, gives V_out/I_in = −100 kΩ, 20·log10(1e5) = 100 dBΩ.
    tia = {**PROJECT, "opamp_models": {}, "input": {"drive": "current", "amplitude": "1u"}, "stages": [{
        "id": "tia", "name": "TIA", "drive": "current", "ports": {"in": "n", "out": "out"},
        "parts": [{"ref": "U1", "type": "opamp", "nodes": ["0", "n", "out"], "model": "ideal"},
                  {"ref": "R1", "type": "R", "nodes": ["n", "out"], "value": "100k"}]}]}
    path = tmp_path / "tia.stagewise.json"
    path.write_text(json.dumps(tia), encoding="utf-8")
    lines = _response(path, "--stage", "tia").stdout.splitlines()
    assert "magnitude (dBΩ)" in lines[1]
    assert lines[2].split()[2] == f"{20 * math.log10(1e5):.3f}"
