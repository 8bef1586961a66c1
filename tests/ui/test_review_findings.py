"""The review panel shows automatic findings (an unstable stage) beside the checks."""

from __future__ import annotations

import json
from pathlib import Path

from conftest import make_window

# R1 1k in→p, R2 10k p→out, op-amp + input on p, − on node 0 (positive feedback); values of our own.
UNSTABLE = {
    "format": "stagewise-project", "version": 1, "title": "positive feedback",
    "settings": {"f_min_hz": 1, "f_max_hz": "1M", "points_per_decade": 30, "ref_hz": 1000},
    "input": {"drive": "voltage", "amplitude": "10m"},
    "opamp_models": {"m": {"a0_db": 100, "gbw_hz": "1M"}},
    "stages": [{
        "id": "pf", "name": "positive feedback", "ports": {"in": "in", "out": "out"},
        "parts": [{"ref": "R1", "type": "R", "nodes": ["in", "p"], "value": "1k"},
                  {"ref": "R2", "type": "R", "nodes": ["p", "out"], "value": "10k"},
                  {"ref": "U1", "type": "opamp", "nodes": ["p", "0", "out"], "model": "m"}],
        "checks": [{"id": "pm", "text": "Phase margin", "metric": "phase_margin_deg", "where": "isolated",
                    "min": 45}],
    }],
}


def test_unstable_stage_shows_its_finding_and_a_check_without_value(qtbot, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    path = tmp_path / "unstable.stagewise.json"
    path.write_text(json.dumps(UNSTABLE), encoding="utf-8")
    window = make_window(qtbot, path)
    try:
        window.document.set_current_stage("pf")
        assert window.wait_until_idle(60, formula=False)
        panel = window.review_panel
        # Common practice, no source: a loop with a closed-loop pole in the right half-plane has
        # no phase margin to speak of; the panel says why and names the pole.
        assert panel.check_state("pm") == "no value"
        assert panel.findings.isVisible()
        text = panel.findings.text()
        assert text.startswith("UNSTABLE") and "right-half-plane pole" in text
    finally:
        window.shutdown()


def test_a_value_with_another_parts_unit_is_refused_in_the_parts_table(window) -> None:  # type: ignore[no-untyped-def]
    window.document.set_current_stage("rc")
    window.parts_table.edit_cell("R1", "value", "10nF")
    # Common practice, no source: farads are a capacitance; a resistor's value is in ohms.
    assert window.document.project.stage("rc").part("R1").value.raw == "3k3"
    assert '"10nF" is a capacitance, a resistor takes ohms' in window.parts_table.feedback.text()
    assert not window.document.is_modified


def test_the_greenhouse_over_range_and_clipping_are_shown_in_the_review_panel(qtbot, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    # 1 µA into the 1 MΩ transimpedance and a gain of 2 is about 2 V peak at a converter of ±1.65 V,
    # and the two op-amps before it need more than their swing. Common practice, no source:
    # converter headroom = 20·log10(full-scale peak / signal peak), negative when over range.
    demo = Path(__file__).resolve().parents[2] / "projects" / "greenhouse.stagewise.json"
    path = tmp_path / "greenhouse.stagewise.json"
    path.write_text(demo.read_text(encoding="utf-8"), encoding="utf-8")
    window = make_window(qtbot, path)
    try:
        window.document.set_current_stage("adc")
        assert window.wait_until_idle(60, formula=False)
        panel = window.review_panel
        assert panel.findings.isVisible()
        lines = panel.findings.text().splitlines()
        assert any(line.startswith("OVER-RANGE: the converter input is over-range") for line in lines)
        assert panel.check_state("converter-range") == "not met"
        # Each clipping op-amp is shown on the page of the stage that holds it (with the chain's findings).
        window.document.set_current_stage("tia")
        assert window.wait_until_idle(60, formula=False)
        lines = panel.findings.text().splitlines()
        assert [line for line in lines if line.startswith("CLIPS")] == [
            line for line in lines if line.startswith("CLIPS: op-amp tia:U1 clips")]
        assert any(line.startswith("CLIPS: op-amp tia:U1 clips") for line in lines)
        assert any(line.startswith("OVER-RANGE") for line in lines)
    finally:
        window.shutdown()
