"""`stagewise check` fails an unstable design and lists what fails without a check (DESIGN 4, 6)."""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Any

import pytest

from stagewise import cli

DEMOS = Path(__file__).resolve().parents[2] / "projects"

POSITIVE_FEEDBACK: dict[str, Any] = {
    "format": "stagewise-project", "version": 1, "title": "positive feedback",
    "settings": {"f_min_hz": 1, "f_max_hz": "1M", "points_per_decade": 40, "ref_hz": 1000},
    "input": {"drive": "voltage", "amplitude": "10m"},
    "opamp_models": {"m": {"a0_db": 100, "gbw_hz": "1M"}},
    "stages": [{
        "id": "pf", "name": "non-inverting, positive feedback", "ports": {"in": "in", "out": "out"},
        "parts": [{"ref": "R1", "type": "R", "nodes": ["in", "p"], "value": "1k"},
                  {"ref": "R2", "type": "R", "nodes": ["p", "out"], "value": "10k"},
                  {"ref": "U1", "type": "opamp", "nodes": ["p", "0", "out"], "model": "m"}],
        "checks": [{"id": "pm", "text": "Phase margin at least 45 degrees", "metric": "phase_margin_deg",
                    "where": "isolated", "min": 45}],
    }],
}


def _run(capsys: pytest.CaptureFixture[str], *arguments: str) -> tuple[int, str]:
    status = cli.main(list(arguments))
    return status, capsys.readouterr().out


def test_check_fails_the_positive_feedback_stage_and_names_its_right_half_plane_pole(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = tmp_path / "unstable.stagewise.json"
    path.write_text(json.dumps(POSITIVE_FEEDBACK), encoding="utf-8")
    status, out = _run(capsys, "check", str(path))
    assert status == 1
    # The closed loop 1 − A(s)·β = 0 with A(s) = A0/(1 + s·A0/ω_gbw), β = 1k/11k puts a real pole
    # at f = (GBW/A0)·(A0·β − 1) ≈ 90.9 kHz in the right half-plane.
    # Source: Black's feedback formula (H. S. Black, 1934) with the sign of positive feedback.
    pole_hz = 1e6 / 1e5 * (1e5 / 11 - 1)
    assert f"right-half-plane pole at {pole_hz / 1e3:.1f} kHz" in out
    assert "met" not in out.split("pm", 1)[1].split("\n", 1)[0].replace("no value", "")
    assert "UNSTABLE" in out
    status, out = _run(capsys, "check", str(path), "--json")
    document = json.loads(out)
    assert status == 1
    assert document["checks"][0]["state"] == "no value"
    assert any(item["kind"] == "unstable" and item["stage"] == "pf" for item in document["findings"])


def test_check_lists_the_greenhouse_over_range_and_clipping(capsys: pytest.CaptureFixture[str]) -> None:
    status, out = _run(capsys, "check", str(DEMOS / "greenhouse.stagewise.json"), "--json")
    document = json.loads(out)
    assert status == 1
    kinds = [item["kind"] for item in document["findings"]]
    assert "over_range" in kinds
    clipping = sorted(item["ref"] for item in document["findings"] if item["kind"] == "swing")
    assert clipping == ["gain:U1", "tia:U1"]
    # The reviewer's own checks on the same figures exist and agree.
    states = {(item["stage"], item["id"]): item for item in document["checks"]}
    headroom = states[("adc", "converter-range")]
    assert headroom["state"] == "not met" and headroom["value"] < 0
    # 1 µA into 1 MΩ and a gain of 2 is 2 V peak against ±1.65 V: about −1.7 dB.
    # Common practice, no source: converter headroom = 20·log10(full-scale peak / signal peak).
    assert headroom["value"] == pytest.approx(20 * math.log10(1.65 / 2.0), abs=0.3)


def test_a_chain_that_cannot_be_analysed_fails_check_even_without_checks(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # An ideal inverting input (+ on node 0) used as a voltage-driven input port: the op-amp holds
    # that node at 0 V, so a voltage source there has no solution.
    # Common practice, no source: an ideal op-amp with feedback keeps v− = v+ (virtual ground).
    document = {"format": "stagewise-project", "version": 1, "title": "virtual ground",
                "stages": [{"id": "tia", "name": "TIA", "ports": {"in": "n", "out": "out"},
                            "parts": [{"ref": "U1", "type": "opamp", "nodes": ["0", "n", "out"], "model": "ideal"},
                                      {"ref": "R1", "type": "R", "nodes": ["n", "out"], "value": "10k"}]}]}
    path = tmp_path / "virtual-ground.stagewise.json"
    path.write_text(json.dumps(document), encoding="utf-8")
    status, out = _run(capsys, "check", str(path))
    assert status == 1
    assert "NOT ANALYSED" in out and "held at a fixed voltage" in out
