"""Op-amp stages as formulas in the part symbols: the ideal form, then the finite-gain factor."""

from __future__ import annotations

import math

import numpy as np
import pytest

from stagewise.engine.symbolic import evaluate_symbolic, finite_gain_form, symbolic_form
from stagewise.files.project_file import loads_project
from stagewise.present.formula import finite_gain_lines, polynomial, pretty

# A non-inverting amplifier of our own: R2 = 47k from out to in−, R1 = 2k2 from in− to ground,
# a single-pole op-amp model (A0 = 100 dB, GBW = 2 MHz), no output resistance.
PROJECT = """{
  "format": "stagewise-project", "version": 1, "title": "t", "revision": "A",
  "settings": {"f_min_hz": 1, "f_max_hz": 1e6, "points_per_decade": 20, "temperature_c": 25, "ref_hz": 2000,
               "noise_band_hz": [10, 20000], "seed": 1},
  "input": {"drive": "voltage", "amplitude": "10m"},
  "converter": {"fs_hz": 96000, "bits": 16, "full_scale_vpp": 5},
  "load": {"r_ohm": null, "c_f": null},
  "opamp_models": {"single-pole": {"a0_db": 100, "gbw_hz": "2M"}},
  "stages": [
    {"id": "amp", "name": "Non-inverting", "ports": {"in": "in", "out": "out"},
     "parts": [
       {"ref": "R2", "type": "R", "nodes": ["out", "n"], "value": "47k"},
       {"ref": "R1", "type": "R", "nodes": ["n", "0"], "value": "2k2"},
       {"ref": "U1", "type": "opamp", "nodes": ["in", "n", "out"], "model": "single-pole"}
     ]}
  ],
  "audit": []
}"""


def test_ideal_form_and_feedback_factor_of_a_non_inverting_amplifier() -> None:
    project = loads_project(PROJECT, "test")
    stage = project.stages[0]
    document = finite_gain_form(stage, project)
    assert document is not None
    ideal = document["ideal"]
    # Source: ideal op-amp rules (virtual short, no input current): H = 1 + R2/R1, no s at all.
    assert ideal["denominator"] == ["1"]
    value = complex(evaluate_symbolic(symbolic_form(stage, project), np.array([1e-3]))[0])
    assert abs(value) == pytest.approx(1 + 47e3 / 2.2e3, rel=1e-3)  # finite A0 = 1e5 costs 2e-4
    text = pretty(ideal["numerator"][0])
    assert "R2" in text and "R1" in text and "*" not in text
    (opamp,) = document["opamps"]
    # Common practice, no source: the feedback factor of a non-inverting amplifier is R1/(R1 + R2).
    assert opamp["beta"] == pytest.approx(2.2e3 / (2.2e3 + 47e3), rel=1e-6)
    # Source: Black (1934): H = (1/β)·1/(1 + 1/(A·β)) with A(s) = A0/(1 + s·A0/ω_GBW), exact here.
    a0, gbw, f = 1e5, 2e6, 2000.0
    a = a0 / (1 + 1j * f * a0 / gbw)
    beta = 2.2e3 / 49.2e3
    factor = 1 / (1 + 1 / (a * beta))
    assert document["factor_db_at_ref"] == pytest.approx(20 * math.log10(abs(factor)), abs=1e-9)
    assert document["factor_deg_at_ref"] == pytest.approx(math.degrees(np.angle(factor)), abs=1e-7)
    # Common practice, no source: the loop crosses 1 near β·GBW for a single-pole op-amp.
    assert opamp["crossover_hz"] == pytest.approx(beta * gbw, rel=0.01)


def test_the_renderer_prints_mathematics_not_programmer_notation() -> None:
    project = loads_project(PROJECT, "test")
    document = finite_gain_form(project.stages[0], project)
    assert document is not None
    lines = finite_gain_lines(document)
    joined = "\n".join(lines)
    assert "1/(A(s)·β)" in joined and "**" not in joined and "e+" not in joined
    # Common practice, no source: powers as superscripts, products with a middle dot.
    assert polynomial(["4/7", "C1*R1**2", "1.5e+8"]) == "4/7·s² + C1·R1²·s + 1.5·10⁸"
    assert pretty("1/(2*pi*sqrt(C1)*sqrt(R1))") == "1/(2·π·√(C1)·√(R1))"
