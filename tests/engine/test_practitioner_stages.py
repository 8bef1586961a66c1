"""Stages a practitioner draws without a part on node 0: series R, series C, a bare follower.

Each is referenced to node 0 by its voltage drive and by the op-amp's output, so it is
solvable; each is checked against its closed form.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pytest

from stagewise.engine.analysis import ProjectAnalysis, response_points
from stagewise.files.codec import decode
from stagewise.model.project import Project
from stagewise.model.validate import validate

TWO_PI = 2 * math.pi


def chain(*stages: dict[str, Any], models: dict[str, Any] | None = None) -> Project:
    project = decode({
        "format": "stagewise-project", "version": 1, "title": "practitioner stages",
        "settings": {"f_min_hz": 1, "f_max_hz": "10M", "points_per_decade": 40, "ref_hz": 1000},
        "input": {"drive": "voltage", "amplitude": "10m"},
        "opamp_models": models or {},
        "stages": list(stages),
    })
    assert validate(project) == []
    return project


def series(stage_id: str, kind: str, value: float) -> dict[str, Any]:
    return {"id": stage_id, "name": stage_id, "ports": {"in": "in", "out": "out"},
            "parts": [{"ref": f"{kind}1", "type": kind, "nodes": ["in", "out"], "value": value}]}


def shunt_load(r_ohm: float) -> dict[str, Any]:
    return {"id": "load", "name": "load", "ports": {"in": "in", "out": "in"},
            "parts": [{"ref": "RL", "type": "R", "nodes": ["in", "0"], "value": r_ohm}]}


def test_a_new_projects_default_stage_one_resistor_from_in_to_out_loads_and_analyses() -> None:
    project = chain(series("stage-1", "R", 1e3))
    analysis = ProjectAnalysis(project, spread=False)
    # Common practice, no source: an unloaded series resistor passes its input unchanged.
    value, why = analysis.metric_value("gain_db", "isolated", "stage-1", 1000.0)
    assert why is None and value == pytest.approx(0.0, abs=1e-12)
    assert analysis.findings() == []


def test_series_resistor_into_a_load_is_a_voltage_divider() -> None:
    r_ohm, load_ohm = 470.0, 2.2e3
    project = chain(series("cable", "R", r_ohm), shunt_load(load_ohm))
    _, values, why = response_points(project, [10.0, 1e3, 1e5], "cable", in_chain=True)
    assert why is None and values is not None
    # Source: voltage divider, R_L/(R + R_L) (any circuits text, e.g. Nilsson & Riedel).
    np.testing.assert_allclose(values, load_ohm / (r_ohm + load_ohm), rtol=1e-12)


def test_series_capacitor_sensor_into_a_load_is_a_first_order_high_pass() -> None:
    c_f, load_ohm = 2.2e-9, 1e6
    project = chain(series("sensor", "C", c_f), shunt_load(load_ohm))
    f_hz = np.array([3.0, 72.0, 1e3, 1e5])
    _, values, why = response_points(project, list(f_hz), "sensor", in_chain=True)
    assert why is None and values is not None
    # Source: series C into R to node 0: H(s) = sRC/(1 + sRC), corner 1/(2πRC) (any circuits text).
    s = 1j * TWO_PI * f_hz
    np.testing.assert_allclose(values, s * load_ohm * c_f / (1 + s * load_ohm * c_f), rtol=1e-9)
    analysis = ProjectAnalysis(project, spread=False)
    corner, reason = analysis.metric_value("f_low_3db_hz", "in_chain", "sensor", None)
    assert reason is None and corner == pytest.approx(1 / (TWO_PI * load_ohm * c_f), rel=1e-6)
    # Unloaded, the capacitor passes its input unchanged: stable, 0 dB.
    verdict = analysis.stability("isolated", "sensor")
    assert verdict is not None and verdict.stable
    gain, _ = analysis.metric_value("gain_db", "isolated", "sensor", 1000.0)
    assert gain == pytest.approx(0.0, abs=1e-9)


def test_bare_follower_is_a_single_pole_closed_loop() -> None:
    a0, gbw_hz = 10 ** (96 / 20), 4e6
    follower = {"id": "buf", "name": "follower", "ports": {"in": "in", "out": "out"},
                "parts": [{"ref": "U1", "type": "opamp", "nodes": ["in", "out", "out"], "model": "m"}]}
    project = chain(follower, models={"m": {"a0_db": 96, "gbw_hz": gbw_hz}})
    f_hz = np.array([10.0, 1e4, 1e6, 5e6])
    _, values, why = response_points(project, list(f_hz), "buf")
    assert why is None and values is not None
    # Source: Black's feedback formula with β = 1: H = A/(1 + A), A(s) = A0/(1 + s·A0/ω_gbw).
    a = a0 / (1 + 1j * f_hz * a0 / gbw_hz)
    np.testing.assert_allclose(values, a / (1 + a), rtol=1e-9)
    analysis = ProjectAnalysis(project, spread=False)
    corner, _ = analysis.metric_value("f_high_3db_hz", "isolated", "buf", None)
    # The closed-loop pole sits at GBW·(1 + A0)/A0; its half-power point there too.
    assert corner == pytest.approx(gbw_hz * (1 + a0) / a0, rel=1e-6)
