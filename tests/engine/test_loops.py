"""Loop gain at the op-amp's gain state, against python-control on the equivalent loop transfer function."""

from __future__ import annotations

import math
from typing import Any

import control  # type: ignore[import-untyped]
import numpy as np
import pytest

from stagewise.engine.loops import IDEAL_WHY, loops_to_json, stage_loops
from stagewise.files.codec import decode
from stagewise.model.project import Project

TWO_PI = 2 * math.pi


def non_inverting(model: dict[str, Any], rf: float, rg: float, load_f: float | None = None) -> Project:
    parts: list[dict[str, Any]] = [
        {"ref": "U1", "type": "opamp", "nodes": ["in", "n", "out"], "model": "m"},
        {"ref": "RF", "type": "R", "nodes": ["out", "n"], "value": rf},
        {"ref": "RG", "type": "R", "nodes": ["n", "0"], "value": rg},
    ]
    if load_f is not None:
        parts.append({"ref": "CL", "type": "C", "nodes": ["out", "0"], "value": load_f})
    return decode({
        "format": "stagewise-project", "version": 1, "title": "loop test",
        "opamp_models": {"m": model},
        "stages": [{"id": "s", "name": "stage", "ports": {"in": "in", "out": "out"}, "parts": parts}],
    })


def open_loop(a0_db: float, gbw_hz: float, p2_hz: float | None) -> Any:
    a0 = 10 ** (a0_db / 20)
    wp1 = TWO_PI * gbw_hz / a0
    a = control.tf([a0], [1 / wp1, 1])
    if p2_hz is not None:
        a = a * control.tf([1], [1 / (TWO_PI * p2_hz), 1])
    return a


def test_two_pole_non_inverting_matches_stability_margins() -> None:
    rf, rg = 12e3, 3.3e3
    project = non_inverting({"a0_db": 104, "gbw_hz": "6M", "p2_hz": "9M"}, rf, rg)
    (result,) = stage_loops(project.stages[0], project)
    # T(s) = A(s)·Rg/(Rf+Rg) with A(s) = A0/((1 + s/ωp1)(1 + s/ωp2)): no loading (ideal output).
    loop = open_loop(104, 6e6, 9e6) * (rg / (rf + rg))
    # Reference library: control 0.10.2, stability_margins
    gm, pm, _, _, wgc = control.stability_margins(loop)[:5]
    assert result.crossover_hz == pytest.approx(wgc / TWO_PI, rel=1e-6)
    assert result.phase_margin_deg == pytest.approx(pm, abs=1e-4)
    # Two poles: the phase only tends to −180°, python-control reports an infinite gain margin.
    assert math.isinf(gm)
    assert result.gain_margin_db is None and "never reaches −180°" in (result.gain_margin_why or "")
    # The swept T itself equals the transfer function at every frequency.
    expected = control.frequency_response(loop, TWO_PI * result.f_hz[::50])
    assert np.allclose(result.loop_gain[::50], np.asarray(expected.complex).ravel(), rtol=1e-9)


def test_output_resistance_into_load_capacitance_gives_a_gain_margin() -> None:
    rf, rg, rout, cl = 22e3, 2.7e3, 75.0, 4.7e-9
    project = non_inverting({"a0_db": 98, "gbw_hz": "3M", "p2_hz": "12M", "rout_ohm": rout}, rf, rg, cl)
    (result,) = stage_loops(project.stages[0], project)
    # The output node: (x − v)/rout = v·(s·CL + 1/(Rf+Rg)), so v = x·(Rf+Rg)/((Rf+Rg) + rout + s·rout·CL·(Rf+Rg)).
    rt = rf + rg
    loop = open_loop(98, 3e6, 12e6) * control.tf([rt], [rout * cl * rt, rt + rout]) * (rg / rt)
    # Reference library: control 0.10.2, stability_margins
    # returns gm, pm, sm, wpc (phase crossover, rad/s), wgc (gain crossover, rad/s), wms.
    gm, pm, _, wpc, wgc = control.stability_margins(loop)[:5]
    assert result.crossover_hz == pytest.approx(wgc / TWO_PI, rel=1e-6)
    assert result.phase_margin_deg == pytest.approx(pm, abs=1e-4)
    assert result.phase_crossover_hz == pytest.approx(wpc / TWO_PI, rel=1e-6)
    assert result.gain_margin_db == pytest.approx(20 * math.log10(gm), abs=1e-5)


def test_ideal_opamp_reports_no_loop() -> None:
    project = decode({
        "format": "stagewise-project", "version": 1, "title": "ideal",
        "stages": [{"id": "s", "name": "buffer", "ports": {"in": "in", "out": "out"},
                    "parts": [{"ref": "U9", "type": "opamp", "nodes": ["in", "out", "out"], "model": "ideal"}]}],
    })
    results = stage_loops(project.stages[0], project)
    document = loops_to_json(results)
    # Common practice, no source: a nullor has infinite gain; there is no finite loop gain.
    assert document == [{"ref": "U9", "crossover_hz": None, "phase_margin_deg": None, "gain_margin_db": None,
                         "phase_crossover_hz": None, "crossover_hz_why": IDEAL_WHY,
                         "phase_margin_deg_why": IDEAL_WHY, "gain_margin_db_why": IDEAL_WHY,
                         "phase_crossover_hz_why": IDEAL_WHY}]


def test_a_loop_crossing_unit_gain_three_times_reports_its_smallest_phase_margin() -> None:
    # A series R-L-C notch from the feedback node to node 0 pulls β (and |T|) below 1 around
    # 10 kHz, so |T| crosses 1 down, up and down again (the last near GBW·β).
    rf, rg, rs, inductance, capacitance = 10e3, 10e3, 50.0, 10e-3, 25.3e-9
    project = decode({
        "format": "stagewise-project", "version": 1, "title": "notched loop",
        "opamp_models": {"m": {"a0_db": 100, "gbw_hz": "1M"}},
        "stages": [{"id": "s", "name": "stage", "ports": {"in": "in", "out": "out"}, "parts": [
            {"ref": "U1", "type": "opamp", "nodes": ["in", "n", "out"], "model": "m"},
            {"ref": "RF", "type": "R", "nodes": ["out", "n"], "value": rf},
            {"ref": "RG", "type": "R", "nodes": ["n", "0"], "value": rg},
            {"ref": "RS", "type": "R", "nodes": ["n", "a"], "value": rs},
            {"ref": "L1", "type": "L", "nodes": ["a", "b"], "value": inductance},
            {"ref": "C1", "type": "C", "nodes": ["b", "0"], "value": capacitance}]}],
    })
    (result,) = stage_loops(project.stages[0], project)
    s = control.tf("s")
    notch = rs + s * inductance + 1 / (s * capacitance)
    ground = rg * notch / (rg + notch)
    loop = control.minreal(open_loop(100, 1e6, None) * ground / (rf + ground), verbose=False)
    # Reference library: control 0.10.2, stability_margins (returnall lists every crossing; the
    # single answer is the smallest phase margin).
    every = control.stability_margins(loop, returnall=True)
    assert len(every[1]) == 3
    _, pm, _, _, _ = control.stability_margins(loop)[:5]
    assert result.phase_margin_deg == pytest.approx(pm, abs=1e-4)
    assert result.phase_margin_deg < max(every[1]) - 30  # not the margin at the highest crossing
    assert result.crossover_hz == pytest.approx(max(every[4]) / TWO_PI, rel=1e-6)
