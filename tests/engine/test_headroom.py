"""Headroom and slew at op-amp outputs, against the closed-loop response written out by hand."""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pytest

from stagewise.engine.headroom import headroom, headroom_to_json
from stagewise.engine.mna import assemble
from stagewise.files.codec import decode
from stagewise.model.project import Project

TWO_PI = 2 * math.pi


def stage(parts: list[dict[str, Any]], model: dict[str, Any], amplitude: str | None = "50m") -> Project:
    return decode({
        "format": "stagewise-project", "version": 1, "title": "headroom test",
        "settings": {"f_min_hz": 10, "f_max_hz": "200k", "points_per_decade": 50},
        "input": {"drive": "voltage", "amplitude": amplitude},
        "opamp_models": {"m": model},
        "stages": [{"id": "s", "name": "stage", "ports": {"in": "in", "out": "out"}, "parts": parts}],
    })


NON_INVERTING = [
    {"ref": "U1", "type": "opamp", "nodes": ["in", "n", "out"], "model": "m"},
    {"ref": "RF", "type": "R", "nodes": ["out", "n"], "value": "82k"},
    {"ref": "RG", "type": "R", "nodes": ["n", "0"], "value": "2k7"},
]


def closed_loop(f_hz: np.ndarray, a0: float, gbw_hz: float, beta: float) -> np.ndarray:
    # Source: negative feedback, H = A/(1 + A·β) with the single-pole A(s) = A0/(1 + s·A0/ω_gbw)
    # (any op-amp text; Black's feedback formula).
    a = a0 / (1 + 1j * f_hz * a0 / gbw_hz)
    return a / (1 + a * beta)


@pytest.mark.parametrize(("swing", "bias"), [([-4.5, 4.8], 0.0), ([0.1, 4.9], 2.5)])
def test_peak_swing_margin_and_slew_of_a_non_inverting_stage(swing: list[float], bias: float) -> None:
    model = {"a0_db": 100, "gbw_hz": "1M", "swing_v": swing, "slew_v_per_s": "0.5M"}
    project = stage(NON_INVERTING, model)
    (result,) = headroom(assemble(project.stages[0], project), project, current_drive=False)
    grid = np.logspace(1, math.log10(2e5), int(math.ceil(math.log10(2e4) * 50)) + 1)
    h = np.abs(closed_loop(grid, 1e5, 1e6, 2.7 / (82 + 2.7))) * 0.05
    assert result.peak_v == pytest.approx(h.max(), rel=1e-9)
    assert result.at_hz == pytest.approx(10.0)  # the response only falls with frequency
    # Common practice, no source: a sine of peak V at f slews at most 2πf·V.
    slope = TWO_PI * grid * h
    assert result.slew_needed_v_per_s == pytest.approx(slope.max(), rel=1e-9)
    assert result.slew_margin == pytest.approx(0.5e6 / slope.max(), rel=1e-9)
    # The same margin in percent of the need: 100·(SR − needed)/needed.
    entry = headroom_to_json([result])[0]
    assert entry["slew_margin_pct"] == pytest.approx(100 * (0.5e6 - slope.max()) / slope.max(), rel=1e-9)
    # Margin to the nearer limit from the documented bias point.
    assert result.bias_v == pytest.approx(bias)
    assert result.swing_margin_v == pytest.approx(min(swing[1] - bias, bias - swing[0]) - h.max(), rel=1e-9)


def test_ideal_opamp_and_missing_data_are_null_with_reasons() -> None:
    parts = [{"ref": "U2", "type": "opamp", "nodes": ["in", "n", "out"], "model": "ideal"},
             {"ref": "RF", "type": "R", "nodes": ["out", "n"], "value": "30k"},
             {"ref": "RG", "type": "R", "nodes": ["n", "0"], "value": "10k"}]
    project = stage(parts, {"a0_db": 100, "gbw_hz": "1M"})
    (result,) = headroom(assemble(project.stages[0], project), project, current_drive=False)
    # Common practice, no source: an ideal non-inverting stage has gain 1 + RF/RG at every frequency.
    assert result.peak_v == pytest.approx(0.05 * 4, rel=1e-12)
    entry = headroom_to_json([result])[0]
    assert entry["swing_margin_v"] is None and "ideal op-amp" in entry["swing_margin_v_why"]
    assert entry["slew_margin"] is None and "ideal op-amp" in entry["slew_margin_why"]
    no_amplitude = stage(NON_INVERTING, {"a0_db": 100, "gbw_hz": "1M"}, amplitude=None)
    (missing,) = headroom(assemble(no_amplitude.stages[0], no_amplitude), no_amplitude, current_drive=False)
    assert missing.peak_v is None and missing.peak_why == "the project's input amplitude is not given"
    entry = headroom_to_json([missing])[0]
    assert entry["peak_v"] is None and entry["peak_v_why"] == "the project's input amplitude is not given"
