"""The symbolic transfer function: standard-form parameters and agreement with the numeric sweep."""

from __future__ import annotations

import json
import math
import re

import numpy as np
import pytest
import sympy

from stagewise.engine.stage import analyze_stage
from stagewise.engine.symbolic import evaluate_symbolic, symbolic_form
from stagewise.model.project import OpampModel, Part, Project, Stage
from stagewise.model.values import Quantity

F_HZ = np.logspace(0, 6, 25)


def q(value: float) -> Quantity:
    return Quantity(value, float(value))


def part(ref: str, kind: str, nodes: list[str], value: float | None = None, **extra: str) -> Part:
    return Part(ref, kind, nodes, None if value is None else q(value), **extra)


def positive(*names: str) -> list[sympy.Symbol]:
    return [sympy.Symbol(name, positive=True) for name in names]


def project_with(stage: Stage, models: dict[str, OpampModel] | None = None) -> Project:
    return Project("symbolic", opamp_models=models or {}, stages=[stage])


def assert_matches_sweep(stage: Stage, project: Project, time_limit_s: float = 5.0, rtol: float = 1e-9) -> None:
    # Cross-check inside the engine (REFERENCES): the symbolic form evaluated numerically vs the MNA sweep
    form = symbolic_form(stage, project, time_limit_s)
    assert form.ok, form.why
    analysis = analyze_stage(stage, project, F_HZ)
    assert analysis.response is not None
    error = np.max(np.abs(evaluate_symbolic(form, F_HZ) - analysis.response) / np.abs(analysis.response))
    assert error <= rtol, f"relative error {error:.3g}"


def test_rc_low_pass_form() -> None:
    # Source: any circuits text: 1/(1 + sRC) = (1/(RC))/(s + 1/(RC)); first-order low-pass, K = 1, ω0 = 1/(RC)
    stage = Stage("rc", "rc", parts=[part("R1", "R", ["in", "out"], 3.3e3), part("C1", "C", ["out", "0"], 47e-9)])
    form = symbolic_form(stage, project_with(stage))
    r1, c1 = positive("R1", "C1")
    assert not form.numeric and form.why is None
    assert [sympy.simplify(a - b) for a, b in zip(form.denominator, [1, 1 / (r1 * c1)], strict=True)] == [0, 0]
    assert sympy.simplify(form.numerator[0] - 1 / (r1 * c1)) == 0
    (section,) = form.sections
    assert section.kind == "low-pass"
    assert sympy.simplify(section.gain - 1) == 0
    assert sympy.simplify(section.omega0_rad_s - 1 / (r1 * c1)) == 0


def test_unity_gain_sallen_key_parameters() -> None:
    # Source: Sallen & Key (1955): ω0 = 1/sqrt(R1R2C1C2), Q = sqrt(R1R2C1C2)/(C2(R1 + R2)), C2 to ground
    stage = Stage("sk", "sk", parts=[
        part("R1", "R", ["in", "a"], 12e3), part("R2", "R", ["a", "b"], 33e3),
        part("C1", "C", ["a", "out"], 10e-9), part("C2", "C", ["b", "0"], 1.5e-9),
        part("U1", "opamp", ["b", "out", "out"], model="ideal")])
    project = project_with(stage)
    form = symbolic_form(stage, project)
    r1, r2, c1, c2 = positive("R1", "R2", "C1", "C2")
    (section,) = form.sections
    assert section.kind == "low-pass"
    assert sympy.simplify(section.omega0_rad_s - 1 / sympy.sqrt(r1 * r2 * c1 * c2)) == 0
    assert sympy.simplify(section.q - sympy.sqrt(r1 * r2 * c1 * c2) / (c2 * (r1 + r2))) == 0
    assert sympy.simplify(section.zeta - 1 / (2 * section.q)) == 0
    assert form.denominator[0] == 1
    assert_matches_sweep(stage, project)


def test_multiple_feedback_band_pass_centre_gain() -> None:
    # Source: Williams & Taylor, Electronic Filter Design Handbook, MFB band-pass: centre gain
    # −R3·C2/(R1·(C1 + C2)) (C1 to the output, C2 to the inverting input), ω0² = (1/R1 + 1/R2)/(R3C1C2)
    stage = Stage("bp", "bp", parts=[
        part("R1", "R", ["in", "a"], 18e3), part("R2", "R", ["a", "0"], 910.0),
        part("C1", "C", ["a", "out"], 6.8e-9), part("C2", "C", ["a", "b"], 4.7e-9),
        part("R3", "R", ["b", "out"], 82e3), part("U1", "opamp", ["0", "b", "out"], model="ideal")])
    project = project_with(stage)
    form = symbolic_form(stage, project)
    r1, r2, r3, c1, c2 = positive("R1", "R2", "R3", "C1", "C2")
    (section,) = form.sections
    assert section.kind == "band-pass"
    assert sympy.simplify(section.gain + r3 * c2 / (r1 * (c1 + c2))) == 0
    assert sympy.simplify(section.omega0_rad_s**2 - (1 / r1 + 1 / r2) / (r3 * c1 * c2)) == 0
    assert_matches_sweep(stage, project)


def test_two_buffered_sections_factor_into_their_own_parameters() -> None:
    # Source: Sallen & Key (1955), one section per op-amp: the fourth-order denominator is the product of
    # the two sections' s² + (ω0/Q)s + ω0², each with its own Q formula
    parts: list[Part] = []
    for index, (node_in, node_out) in enumerate((("in", "mid"), ("mid", "out")), start=1):
        parts += [part(f"R{index}a", "R", [node_in, f"a{index}"], 10e3 * index),
                  part(f"R{index}b", "R", [f"a{index}", f"b{index}"], 15e3),
                  part(f"C{index}a", "C", [f"a{index}", node_out], 22e-9 / index),
                  part(f"C{index}b", "C", [f"b{index}", "0"], 2.2e-9),
                  part(f"U{index}", "opamp", [f"b{index}", node_out, node_out], model="ideal")]
    stage = Stage("lp4", "lp4", parts=parts)
    project = project_with(stage)
    form = symbolic_form(stage, project)
    assert form.why is None and len(form.denominator) == 5
    expected = []
    for index in (1, 2):
        ra, rb, ca, cb = positive(f"R{index}a", f"R{index}b", f"C{index}a", f"C{index}b")
        expected.append(sympy.sqrt(ra * rb * ca * cb) / (cb * (ra + rb)))
    found = [section.q for section in form.sections]
    assert len(found) == 2
    for quality in expected:
        assert any(sympy.simplify(quality - candidate) == 0 for candidate in found)
    assert_matches_sweep(stage, project)


def test_finite_op_amp_and_passive_ladder_forms_match_the_sweep() -> None:
    models = {"m": OpampModel(a0_db=q(100.0), gbw_hz=q(10e6), p2_hz=q(40e6), rout_ohm=q(60.0), rin_ohm=q(1e6),
                              cin_diff_f=q(3e-12))}
    inverting = Stage("inv", "inv", parts=[part("R1", "R", ["in", "m"], 2.2e3), part("R2", "R", ["m", "out"], 22e3),
                                           part("C1", "C", ["m", "out"], 100e-12),
                                           part("U1", "opamp", ["0", "m", "out"], model="m")])
    assert_matches_sweep(inverting, project_with(inverting, models), rtol=1e-8)
    impedance, corner = 600.0, 2 * math.pi * 7e3
    ladder = Stage("lc", "lc", parts=[
        part("RS", "R", ["in", "a"], impedance), part("C1", "C", ["a", "0"], 1 / (impedance * corner)),
        part("L2", "L", ["a", "out"], 2 * impedance / corner), part("C3", "C", ["out", "0"], 1 / (impedance * corner)),
        part("RL", "R", ["out", "0"], impedance)])
    assert_matches_sweep(ladder, project_with(ladder))


def test_controlled_sources_and_current_drive_match_the_sweep() -> None:
    stage = Stage("tz", "tz", drive="current", ports={"in": "m", "out": "out"}, parts=[
        part("RF", "R", ["m", "x"], 100e3), part("CF", "C", ["m", "x"], 2.2e-12),
        part("E1", "vcvs", ["x", "0", "0", "m"], 1e4), part("RL", "R", ["x", "y"], 1e3),
        part("F1", "cccs", ["0", "out"], 3.0, control="RL"), part("R3", "R", ["out", "0"], 470.0),
        part("H1", "ccvs", ["y", "0"], 50.0, control="RL")])
    project = project_with(stage)
    form = symbolic_form(stage, project)
    assert form.unit == "Ω"
    assert_matches_sweep(stage, project)


def test_time_limit_falls_back_to_numeric_coefficients() -> None:
    # Cross-check inside the engine: the fallback's coefficients (from the pole/zero model) still give the
    # sweep, and the form says it fell back
    stage = Stage("rc", "rc", parts=[part("R1", "R", ["in", "out"], 1e3), part("C1", "C", ["out", "0"], 1e-6),
                                     part("R2", "R", ["out", "0"], 4.7e3)])
    project = project_with(stage)
    form = symbolic_form(stage, project, time_limit_s=0.0)
    assert form.numeric and form.why is not None and "longer than" in form.why
    assert_matches_sweep(stage, project, time_limit_s=0.0, rtol=1e-9)


def test_block_and_unsolvable_stages() -> None:
    block = Stage("blk", "blk", kind="block", gain=q(2.0), poles_hz=[q(1e3), (q(20e3), q(1.4))])
    form = symbolic_form(block, project_with(block))
    assert form.numeric and form.why is not None
    assert_matches_sweep(block, project_with(block))
    broken = Stage("bad", "bad", parts=[part("R1", "R", ["in", "0"], 1e3), part("R2", "R", ["out", "0"], 1e3),
                                        part("U1", "opamp", ["in", "0", "out"], model="ideal")])
    form = symbolic_form(broken, project_with(broken))
    assert not form.ok and form.why is not None


def test_as_dict_is_json_ready() -> None:
    # Common practice, no source: the report and the CLI print strings, never sympy objects
    stage = Stage("rc", "rc", parts=[part("R1", "R", ["in", "out"], 1e3), part("C1", "C", ["out", "0"], 1e-6)])
    document = symbolic_form(stage, project_with(stage)).as_dict()
    json.dumps(document, allow_nan=False)
    # Source: first-order corner ω0 = 1/(RC)
    assert document["sections"][0]["omega0_rad_s_value"] == pytest.approx(1e3, rel=1e-12)
    assert "R1" in document["transfer"] and "C1" in document["transfer"]


def test_memo_shares_a_formula_between_equal_topologies_but_not_their_values() -> None:
    # Source: any circuits text: RC low-pass ω0 = 1/(RC); CR high-pass H = sRC/(1 + sRC), also ω0 = 1/(RC)
    first = Stage("lp1", "lp1", parts=[part("R1", "R", ["in", "out"], 2.2e3), part("C1", "C", ["out", "0"], 10e-9)])
    second = Stage("lp2", "lp2", parts=[part("R1", "R", ["in", "out"], 6.8e3), part("C1", "C", ["out", "0"], 3.3e-9)])
    high = Stage("hp", "hp", parts=[part("C1", "C", ["in", "out"], 4.7e-9), part("R1", "R", ["out", "0"], 15e3)])
    memo: dict[object, object] = {}
    forms = [symbolic_form(stage, project_with(stage), formulas=memo) for stage in (first, second, high)]
    assert len(memo) == 2  # the two low-passes share one formula; the high-pass has its own
    for form, (r, c) in zip(forms, [(2.2e3, 10e-9), (6.8e3, 3.3e-9), (15e3, 4.7e-9)], strict=True):
        (section,) = form.as_dict()["sections"]
        assert section["omega0_rad_s_value"] == pytest.approx(1 / (r * c), rel=1e-12)
    assert [form.sections[0].kind for form in forms] == ["low-pass", "low-pass", "high-pass"]


def rc_ladder_stage(sections: int) -> Stage:
    """``sections`` series-R (3k9), shunt-C (1n5) sections, our own values."""
    parts = []
    for index in range(sections):
        a = "in" if index == 0 else f"n{index}"
        b = "out" if index == sections - 1 else f"n{index + 1}"
        parts += [part(f"R{index + 1}", "R", [a, b], 3.9e3), part(f"C{index + 1}", "C", [b, "0"], 1.5e-9)]
    return Stage("ladder", "ladder", parts=parts)


def ladder_by_chain_matrices(sections: int, f_hz: np.ndarray) -> np.ndarray:
    # Source: two-port transmission (ABCD) matrices, any network-theory text: a series impedance
    # Z is [[1, Z], [0, 1]], a shunt admittance Y is [[1, 0], [Y, 1]]; cascaded by multiplication,
    # and an unloaded output gives H = 1/A.
    s = 2j * np.pi * f_hz
    total = np.broadcast_to(np.eye(2, dtype=complex), (len(f_hz), 2, 2)).copy()
    for _ in range(sections):
        series = np.zeros_like(total)
        series[:, 0, 0] = series[:, 1, 1] = 1.0
        series[:, 0, 1] = 3.9e3
        shunt = np.zeros_like(total)
        shunt[:, 0, 0] = shunt[:, 1, 1] = 1.0
        shunt[:, 1, 0] = s * 1.5e-9
        total = total @ series @ shunt
    return 1.0 / total[:, 0, 0]


def test_a_formula_too_long_to_read_is_given_numerically_and_says_why() -> None:
    # A 9-section ladder's determinant in part symbols has thousands of terms (it grows like a
    # Fibonacci number): the form stops at the bound instead of running for minutes, and its
    # numeric coefficients still give the ladder's response.
    stage = rc_ladder_stage(9)
    form = symbolic_form(stage, project_with(stage))
    assert form.ok and form.numeric
    assert form.why is not None and "400 of a formula one can read" in form.why
    f_hz = np.logspace(1, 5, 9)
    expected = ladder_by_chain_matrices(9, f_hz)
    np.testing.assert_allclose(evaluate_symbolic(form, f_hz), expected, rtol=1e-6)


def test_a_hundredth_order_stage_prints_no_coefficients_and_says_why() -> None:
    # The product of a 100-section ladder's poles leaves a double's range: its coefficients would
    # print as infinity. The form has none, and says where the roots are.
    stage = rc_ladder_stage(100)
    form = symbolic_form(stage, project_with(stage))
    assert not form.ok and form.numerator == () and form.transfer is None
    assert form.why is not None and "order 100" in form.why and "pole/zero view" in form.why
    # 101 node voltages and the drive's branch current: past the unknowns a formula is tried for.
    assert "102 unknowns" in form.why
    text = json.dumps(form.as_dict())
    # sympy prints an infinity as the token oo (zoo when complex): matched as a word, so the
    # reason's prose ("took longer ...", when the clock stops the elimination first) is no match.
    assert re.search(r"\bz?oo\b", text) is None and "inf" not in text.lower()
