"""Stages that cannot be solved: a reason naming the node or part, never an exception (DESIGN 3.3)."""

from __future__ import annotations

import numpy as np

from stagewise.engine.diagnostics import diagnose
from stagewise.engine.mna import assemble
from stagewise.engine.stage import analyze_stage, response_at
from stagewise.model.project import OpampModel, Part, Project, Stage
from stagewise.model.values import Quantity


def q(value: float) -> Quantity:
    return Quantity(value, float(value))


def part(ref: str, kind: str, nodes: list[str], value: float | None = None, **extra: str) -> Part:
    return Part(ref, kind, nodes, None if value is None else q(value), **extra)


def why_of(parts: list[Part], drive: str = "voltage", ports: dict[str, str] | None = None) -> str:
    stage = Stage("bad", "bad", drive=drive, ports=ports or {"in": "in", "out": "out"}, parts=parts)
    analysis = analyze_stage(stage, Project("p", stages=[stage]))
    assert analysis.why is not None
    assert analysis.response is None and analysis.poles_rad_s is None
    return analysis.why


def test_floating_node_is_named() -> None:
    # Source: Vlach & Singhal, Computer Methods for Circuit Analysis and Design (modified nodal analysis): a node with no
    # conductive path to the reference leaves its voltage undetermined (here it meets only an op-amp input
    # and a controlled-source input)
    why = why_of([part("R1", "R", ["in", "out"], 1e3), part("R2", "R", ["out", "0"], 1e3),
                  part("G1", "vccs", ["out", "0", "lost", "0"], 1e-3),
                  part("U1", "opamp", ["lost", "m", "m"], model="ideal"), part("R3", "R", ["m", "0"], 1e3)])
    assert 'node "lost" floats' in why
    assert '"out"' not in why and '"m"' not in why


def test_loop_of_voltage_defined_branches_is_named() -> None:
    # Source: Vlach & Singhal, Computer Methods for Circuit Analysis and Design: voltage sources in a loop leave the loop current undetermined
    why = why_of([part("R1", "R", ["in", "0"], 1e3), part("E1", "vcvs", ["out", "0", "in", "0"], 2.0),
                  part("E2", "vcvs", ["out", "0", "in", "0"], 2.0), part("R2", "R", ["out", "0"], 1e3)])
    assert '"E1"' in why and '"E2"' in why and "loop" in why


def test_ideal_op_amp_without_feedback_is_named() -> None:
    # Source: the nullor (Tellegen; Carlin, 1964): without feedback its output is undetermined
    why = why_of([part("R1", "R", ["in", "0"], 10e3), part("R2", "R", ["out", "0"], 10e3),
                  part("U1", "opamp", ["in", "0", "out"], model="ideal")])
    assert '"U1"' in why and "no feedback" in why


def test_voltage_drive_into_a_virtual_ground_is_refused_and_current_drive_works() -> None:
    # Source: ideal op-amp rules (any op-amp text): with v+ grounded, feedback holds v− at 0 V, so an
    # ideal voltage source there contradicts the circuit; a current source does not: V/I = −Rf.
    parts = [part("RF", "R", ["in", "out"], 22e3), part("U1", "opamp", ["0", "in", "out"], model="ideal")]
    why = why_of(parts)
    assert '"in"' in why and '"U1"' in why and "virtual ground" in why and '"drive": "current"' in why
    stage = Stage("tia", "tia", drive="current", parts=parts)
    analysis = analyze_stage(stage, Project("p", stages=[stage]))
    assert analysis.why is None
    assert np.allclose(response_at(analysis, 1e3), -22e3, rtol=1e-12)


def test_the_rest_of_the_project_still_analyses() -> None:
    # Common practice, no source: one bad stage does not stop the others
    bad = Stage("bad", "bad", parts=[part("R1", "R", ["in", "0"], 1e3), part("R2", "R", ["out", "0"], 1e3),
                                     part("U1", "opamp", ["in", "0", "out"], model="ideal")])
    good = Stage("good", "good", parts=[part("R1", "R", ["in", "out"], 1e3), part("C1", "C", ["out", "0"], 1e-6)])
    project = Project("p", stages=[bad, good])
    results = [analyze_stage(stage, project) for stage in project.stages]
    assert results[0].why is not None and results[0].why.startswith('stage "bad"')
    assert results[1].why is None and results[1].response is not None


def test_missing_model_and_bad_control_become_reasons() -> None:
    # Common practice, no source: a reference to something that is not there is named
    stage = Stage("m", "m", parts=[part("R1", "R", ["in", "out"], 1e3),
                                   part("U1", "opamp", ["out", "x", "x"], model="not-in-project")])
    analysis = analyze_stage(stage, Project("p", stages=[stage]))
    assert analysis.why is not None and "not-in-project" in analysis.why
    stage = Stage("c", "c", parts=[part("R1", "R", ["in", "out"], 1e3),
                                   part("F1", "cccs", ["out", "0"], 2.0, control="R9")])
    analysis = analyze_stage(stage, Project("p", stages=[stage]))
    assert analysis.why is not None and "R9" in analysis.why


def test_output_that_does_not_respond() -> None:
    # Source: Nilsson & Riedel: a balanced Wheatstone bridge (R1/R2 = R3/R4) gives zero across its
    # detector diagonal at every frequency
    why = why_of([part("R1", "R", ["in", "a"], 1e3), part("R2", "R", ["a", "0"], 2e3),
                  part("R3", "R", ["in", "b"], 5e3), part("R4", "R", ["b", "0"], 10e3),
                  part("E1", "vcvs", ["out", "0", "a", "b"], 1.0)])
    assert "does not respond" in why


def test_solvable_stages_have_no_diagnosis() -> None:
    # Common practice, no source: a follower with a finite op-amp model is well posed
    stage = Stage("f", "f", parts=[part("U1", "opamp", ["in", "out", "out"], model="m")])
    project = Project("p", opamp_models={"m": OpampModel(a0_db=q(100.0), gbw_hz=q(1e6))}, stages=[stage])
    assert diagnose(assemble(stage, project), current_drive=False) is None


def test_values_the_matrix_cannot_hold_become_reasons() -> None:
    # Common practice, no source: a 0 Ω resistor (infinite conductance) and an op-amp without bandwidth
    # cannot be stamped; the part is named instead of a division by zero escaping
    why = why_of([part("R1", "R", ["in", "out"], 0.0), part("R2", "R", ["out", "0"], 1e3)])
    assert "R1" in why and "0 Ω" in why
    stage = Stage("z", "z", parts=[part("U1", "opamp", ["in", "out", "out"], model="flat")])
    project = Project("p", opamp_models={"flat": OpampModel(a0_db=q(100.0), gbw_hz=q(0.0))}, stages=[stage])
    analysis = analyze_stage(stage, project)
    assert analysis.why is not None and "U1" in analysis.why and "gbw_hz" in analysis.why
