"""Port relations of single stages against the two-port equations written by hand.

A relation P(s)·(V_in, I_in, V_out, I_out) = 0 (currents into the stage) is right when it has
rank two and every port solution of the stage, derived by hand, satisfies it.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from stagewise.engine.mna import CircuitError, assemble
from stagewise.engine.ports import I_IN, I_OUT, V_IN, V_OUT, reduce_stage, reduce_stage_terminated
from stagewise.model.project import OpampModel, Part, Project, Stage
from stagewise.model.values import Quantity

q = Quantity.of
F_HZ = np.logspace(0, 6, 19)
S = 2j * math.pi * F_HZ


def relation_of(stage: Stage, project: Project | None = None) -> np.ndarray:
    project = project or Project("ports", stages=[stage])
    return reduce_stage(assemble(stage, project), F_HZ, stage_id=stage.id).p


def assert_solutions(relation: np.ndarray, solutions: list[np.ndarray], tolerance: float = 1e-12) -> None:
    """Each solution (F, 4) satisfies P·w = 0, and P has rank two at every frequency."""
    for solution in solutions:
        residual = np.einsum("fij,fj->fi", relation, solution)
        size = np.linalg.norm(relation, axis=2) * np.linalg.norm(solution, axis=1)[:, None]
        assert np.max(np.abs(residual) / size) < tolerance
    singular_values = np.linalg.svd(relation, compute_uv=False)
    assert np.min(singular_values[:, 1] / singular_values[:, 0]) > 1e-14


def port_vector(v_in: object, i_in: object, v_out: object, i_out: object) -> np.ndarray:
    return np.stack([np.broadcast_to(np.asarray(x, dtype=complex), S.shape) for x in (v_in, i_in, v_out, i_out)],
                    axis=1)


def test_shunt_stage_with_one_node_for_both_ports() -> None:
    r, c = 3.9e6, 68e-12
    stage = Stage("pd", "shunt", ports={"in": "n", "out": "n"},
                  parts=[Part("R1", "R", ["n", "0"], q(r)), Part("C1", "C", ["n", "0"], q(c))])
    y = 1 / r + S * c
    # Source: Nilsson & Riedel, Electric Circuits (KCL at the one node): V_in = V_out = V and
    # I_in + I_out = Y·V with Y = 1/R + sC.
    assert_solutions(relation_of(stage), [port_vector(1.0, y, 1.0, 0.0), port_vector(0.0, 1.0, 0.0, -1.0)])


def test_series_rc_two_port() -> None:
    r, c = 4.7e3, 33e-9
    stage = Stage("rc", "rc", parts=[Part("R1", "R", ["in", "out"], q(r)), Part("C1", "C", ["out", "0"], q(c))])
    # Source: Nilsson & Riedel, Electric Circuits: output open, V_out = V_in/(1 + sRC) and
    # I_in = sC·V_in/(1 + sRC); input open (I_in = 0), V_in = V_out = I_out/(sC).
    h = 1 / (1 + S * r * c)
    assert_solutions(relation_of(stage), [port_vector(1.0, S * c * h, h, 0.0),
                                          port_vector(1 / (S * c), 0.0, 1 / (S * c), 1.0)])


def test_ideal_follower_output_and_input_without_current() -> None:
    r_bias = 1.0e6
    stage = Stage("buf", "buffer", parts=[Part("RB", "R", ["in", "0"], q(r_bias)),
                                          Part("U1", "opamp", ["in", "out", "out"], model="ideal")])
    # Source: ideal op-amp rules (v+ = v−, no input current; any output current), e.g.
    # Nilsson & Riedel, Electric Circuits, ch. 5: V_out = V_in, I_in = V_in/R_bias, I_out free.
    relation = relation_of(stage)
    assert_solutions(relation, [port_vector(1.0, 1 / r_bias, 1.0, 0.0), port_vector(0.0, 0.0, 0.0, 1.0)])
    bare = Stage("bare", "no bias", parts=[Part("U1", "opamp", ["in", "out", "out"], model="ideal")])
    reduced = reduce_stage(assemble(bare, Project("p", stages=[bare])), F_HZ)
    assert reduced.input_current_zero and not reduced.input_voltage_zero
    assert_solutions(reduced.p, [port_vector(1.0, 0.0, 1.0, 0.0), port_vector(0.0, 0.0, 0.0, 1.0)])


def test_virtual_ground_input() -> None:
    r_f = 47e3
    stage = Stage("tia", "tia", drive="current", parts=[
        Part("RF", "R", ["in", "out"], q(r_f)), Part("U1", "opamp", ["0", "in", "out"], model="ideal")])
    reduced = reduce_stage(assemble(stage, Project("p", stages=[stage])), F_HZ)
    # Source: ideal op-amp rules: the inverting input is held at 0 V, all input current flows
    # through RF: V_in = 0, V_out = −RF·I_in, I_out free.
    assert reduced.input_voltage_zero and not reduced.input_current_zero
    assert reduced.imposed == (I_IN, I_OUT)
    assert_solutions(reduced.p, [port_vector(0.0, 1.0, -r_f, 0.0), port_vector(0.0, 0.0, 0.0, 1.0)])


def test_finite_opamp_inverting_stage_and_any_terminations() -> None:
    model = OpampModel(a0_db=q(100), gbw_hz=q("5M"), rout_ohm=q(75))
    r_in, r_f = 10e3, 33e3
    stage = Stage("inv", "inverting", parts=[
        Part("RI", "R", ["in", "m"], q(r_in)), Part("RF", "R", ["m", "out"], q(r_f)),
        Part("U1", "opamp", ["0", "m", "out"], model="g")])
    project = Project("p", opamp_models={"g": model}, stages=[stage])
    system = assemble(stage, project)
    base = reduce_stage(system, F_HZ)
    assert base.imposed == (V_IN, I_OUT)
    # The same relation whatever the terminations: imposing (I_in, V_out) at every other
    # frequency must describe the same two-dimensional set of port solutions.
    alternate = np.arange(len(F_HZ)) % 2 == 0
    other = reduce_stage_terminated(system, base, alternate, alternate)
    assert other is not None and other.per_frequency
    null_space = np.linalg.svd(other.p)[2].conj()[:, 2:, :]  # (F, 2, 4): rows span the solutions
    assert_solutions(base.p, [null_space[:, 0, :], null_space[:, 1, :]], tolerance=1e-9)
    # Source: ideal-limit check, common practice: with A0 = 1e5 the open-circuit gain is
    # −RF/RI within (1 + RF/RI)/A0 at low frequency.
    open_gain = _open_circuit_gain(base.p[0])
    assert open_gain == pytest.approx(-r_f / r_in, rel=(1 + r_f / r_in) / 1e5 * 1.01)


def _open_circuit_gain(relation: np.ndarray) -> complex:
    # V_in = 1, I_out = 0: solve the two rows for (I_in, V_out).
    matrix = relation[:, [I_IN, V_OUT]]
    return complex(np.linalg.solve(matrix, -relation[:, V_IN])[1])


def test_ports_at_ground_or_floating_are_refused() -> None:
    grounded = Stage("g", "grounded", ports={"in": "0", "out": "out"},
                     parts=[Part("R1", "R", ["0", "out"], q(1e3))])
    with pytest.raises(CircuitError, match="node 0"):
        reduce_stage(assemble(grounded, Project("p", stages=[grounded])), F_HZ, stage_id="g")
    floating = Stage("f", "floating", parts=[Part("R1", "R", ["in", "out"], q(1e3)),
                                             Part("C1", "C", ["x", "y"], q(1e-9))])
    with pytest.raises(CircuitError, match='stage "f"'):
        reduce_stage(assemble(floating, Project("p", stages=[floating])), F_HZ, stage_id="f")
