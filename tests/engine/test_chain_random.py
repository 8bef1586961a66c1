"""Port-relation cascade against the merged whole-chain circuit on random chains (hypothesis).

The merged circuit (every stage's pencil joined at its interfaces, load stamped, one dense
solve per frequency) is the exact reference of DESIGN 3.4/3.6; the cascade of port relations
must give the same interface voltages to 1e-8 relative (rounding amplified by the op-amps' open-loop
gain, see the bound's comment). A few chains are also checked against 40-digit solves (mpmath).
"""

from __future__ import annotations

import math

import mpmath
import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from stagewise.engine.chain import analyze_chain, merged_system
from stagewise.engine.sweep import solve_batched
from stagewise.model.project import InputDrive, Load, OpampModel, Part, Project, Stage
from stagewise.model.values import Quantity

F_HZ = np.logspace(0, 6, 25)
MODELS = {
    "fast": OpampModel(a0_db=Quantity.of(106), gbw_hz=Quantity.of("12M"), rout_ohm=Quantity.of(60)),
    "slow": OpampModel(a0_db=Quantity.of(94), gbw_hz=Quantity.of("1.1M"), p2_hz=Quantity.of("9M"),
                       rout_ohm=Quantity.of(0), rin_ohm=Quantity.of("2M"), cin_cm_f=Quantity.of("3p")),
}


def value(low_exponent: float, high_exponent: float) -> st.SearchStrategy[Quantity]:
    return st.floats(low_exponent, high_exponent).map(lambda exponent: Quantity.of(float(f"{10**exponent:.4g}")))


resistors = value(2, 6)
capacitors = value(-11, -6)
inductors = value(-5, -2)
opamp_models = st.sampled_from(["ideal", "fast", "slow"])


@st.composite
def rc_stage(draw: st.DrawFn) -> list[Part]:
    if draw(st.booleans()):  # low-pass: series R, shunt C
        return [Part("R1", "R", ["in", "out"], draw(resistors)), Part("C1", "C", ["out", "0"], draw(capacitors))]
    return [Part("C1", "C", ["in", "out"], draw(capacitors)), Part("R1", "R", ["out", "0"], draw(resistors))]


@st.composite
def rlc_stage(draw: st.DrawFn) -> list[Part]:
    return [Part("R1", "R", ["in", "a"], draw(resistors)), Part("L1", "L", ["a", "out"], draw(inductors)),
            Part("C1", "C", ["out", "0"], draw(capacitors)), Part("R2", "R", ["out", "0"], draw(resistors))]


@st.composite
def opamp_stage(draw: st.DrawFn) -> list[Part]:
    model = draw(opamp_models)
    if draw(st.booleans()):  # non-inverting with a bias resistor and a feedback capacitor
        return [Part("RB", "R", ["in", "0"], draw(resistors)),
                Part("RF", "R", ["out", "m"], draw(resistors)), Part("RG", "R", ["m", "0"], draw(resistors)),
                Part("CF", "C", ["out", "m"], draw(value(-12, -9))),
                Part("U1", "opamp", ["in", "m", "out"], model=model)]
    return [Part("RI", "R", ["in", "m"], draw(resistors)), Part("RF", "R", ["m", "out"], draw(resistors)),
            Part("CF", "C", ["m", "out"], draw(value(-12, -9))),
            Part("U1", "opamp", ["0", "m", "out"], model=model)]


@st.composite
def transconductor_stage(draw: st.DrawFn) -> list[Part]:
    # A current output: high output impedance, so the next stage's input sets the voltage.
    return [Part("RI", "R", ["in", "0"], draw(resistors)),
            Part("G1", "vccs", ["0", "out", "in", "0"], draw(value(-5, -2))),
            Part("RO", "R", ["out", "0"], draw(value(4, 7))), Part("CO", "C", ["out", "0"], draw(value(-12, -10)))]


@st.composite
def transimpedance_stage(draw: st.DrawFn, ideal_allowed: bool) -> list[Part]:
    # Its input is a virtual ground (exactly so with an ideal op-amp, which a zero-impedance
    # output before it could not drive: that chain has no solution).
    model = draw(opamp_models if ideal_allowed else st.just("fast"))
    return [Part("RF", "R", ["in", "out"], draw(resistors)), Part("CF", "C", ["in", "out"], draw(value(-12, -9))),
            Part("U1", "opamp", ["0", "in", "out"], model=model)]


@st.composite
def shunt_stage(draw: st.DrawFn) -> list[Part]:
    return [Part("R1", "R", ["n", "0"], draw(resistors)), Part("C1", "C", ["n", "0"], draw(capacitors))]


@st.composite
def chain(draw: st.DrawFn) -> Project:
    count = draw(st.integers(1, 5))
    stages = []
    for index in range(count):
        kind = draw(st.sampled_from(["rc", "rlc", "opamp", "shunt", "block", "gm", "tia"]))
        stage_id = f"s{index}"
        if kind == "shunt":
            stages.append(Stage(stage_id, kind, ports={"in": "n", "out": "n"}, parts=draw(shunt_stage())))
        elif kind == "block":
            stages.append(Stage(stage_id, kind, kind="block", gain=draw(value(-1, 1)),
                                poles_hz=[draw(value(2, 5))], zin_r_ohm=draw(value(3, 6)),
                                zin_c_f=draw(value(-12, -9)), zout_ohm=draw(value(0, 3))))
        elif kind == "tia":
            soft_before = not stages or stages[-1].name in ("rc", "rlc", "gm")
            stages.append(Stage(stage_id, kind, parts=draw(transimpedance_stage(soft_before))))
        else:
            builder = {"rc": rc_stage, "rlc": rlc_stage, "opamp": opamp_stage, "gm": transconductor_stage}[kind]
            stages.append(Stage(stage_id, kind, parts=draw(builder())))
    load = Load(draw(st.none() | resistors), draw(st.none() | capacitors))
    # A voltage source cannot drive a virtual ground: a chain that starts at one is current-driven.
    drive = "current" if stages[0].name == "tia" else draw(st.sampled_from(["voltage", "current"]))
    return Project("random chain", input=InputDrive(drive), opamp_models=dict(MODELS), stages=stages, load=load)


def merged_interfaces(project: Project, f_hz: np.ndarray) -> np.ndarray:
    merged = merged_system(project)
    driven = merged.driven()
    solution = solve_batched(driven.g, driven.c, driven.b.astype(complex), 2j * math.pi * f_hz)
    return solution[:, list(merged.interface_indices)]


@settings(max_examples=120, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(chain())
def test_cascade_matches_merged_circuit(project: Project) -> None:
    result = analyze_chain(project, F_HZ)
    reference = merged_interfaces(project, F_HZ)
    # Reference library: numpy 2, numpy.linalg.solve (LAPACK gesv) on the merged circuit.
    # Relative to each value, except where a value is a million times below the largest
    # interface voltage at that frequency: a dense solve itself is only accurate to rounding
    # of the largest unknown there (see the 40-digit check below).
    # The bound is 1e-8, not the 40-digit test's 1e-9: a port relation of a stage around a
    # finite op-amp holds terms that cancel to about 1/A0 (A0 up to 2e5 here), so the cascade's
    # rounding is that much above a double's; an op-amp stage into a transimpedance stage
    # (input current-driven, 1 Hz) gave 1.4e-9 at the output, where the dense solve was within
    # 1.4e-16 of a 40-digit solve.
    floor = 1e-6 * np.max(np.abs(reference), axis=1, keepdims=True)
    error = np.abs(result.interface_response - reference) / np.maximum(np.abs(reference), floor)
    assert np.max(error) < 1e-8


def mp_interfaces(project: Project, f_hz: list[float]) -> np.ndarray:
    merged = merged_system(project)
    driven = merged.driven()
    mpmath.mp.dps = 40
    rows = []
    for frequency in f_hz:
        s = mpmath.mpc(0, 2 * mpmath.pi * mpmath.mpf(frequency))
        matrix = mpmath.matrix(driven.g.tolist()) + s * mpmath.matrix(driven.c.tolist())
        x = mpmath.lu_solve(matrix, mpmath.matrix(driven.b.tolist()))
        rows.append([complex(x[index]) for index in merged.interface_indices])
    return np.array(rows)


@settings(max_examples=12, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(chain())
def test_cascade_matches_forty_digit_solve(project: Project) -> None:
    points = [3.0, 470.0, 52e3, 880e3]
    result = analyze_chain(project, points)
    # Reference library: mpmath 1.3, lu_solve at 40 digits on the merged circuit.
    exact = mp_interfaces(project, points)
    floor = 1e-9 * np.max(np.abs(exact), axis=1, keepdims=True)
    error = np.abs(result.interface_response - exact) / np.maximum(np.abs(exact), floor)
    assert np.max(error) < 1e-8  # the cascade's rounding, see test_cascade_matches_merged_circuit
