"""Poles, zeros and gain constants from the pencils, against independent libraries and formulas."""

from __future__ import annotations

import math

import control
import numpy as np
import pytest
import scipy
import scipy.signal

from stagewise.engine.mna import assemble
from stagewise.engine.poles import PoleZeroModel, finite_eigenvalues, pole_zero_model, root_table, transfer_at
from stagewise.engine.stage import analyze_stage
from stagewise.engine.sweep import drive
from stagewise.model.project import OpampModel, Part, Project, Stage
from stagewise.model.values import Quantity

TWO_PI = 2.0 * math.pi


def q(value: float) -> Quantity:
    return Quantity(value, float(value))


def part(ref: str, kind: str, nodes: list[str], value: float | None = None, **extra: str) -> Part:
    return Part(ref, kind, nodes, None if value is None else q(value), **extra)


def model_of(parts: list[Part], models: dict[str, OpampModel] | None = None, drive_kind: str = "voltage") -> PoleZeroModel:
    stage = Stage("s", "s", drive=drive_kind, parts=parts)
    analysis = analyze_stage(stage, Project("p", opamp_models=models or {}, stages=[stage]), np.array([1e3]))
    assert analysis.why is None, analysis.why
    assert analysis.model is not None
    return analysis.model


def assert_same_roots(actual: np.ndarray, expected: np.ndarray, rtol: float = 1e-6) -> None:
    assert len(actual) == len(expected), (actual, expected)
    remaining = list(np.asarray(expected, dtype=complex))
    for root in actual:
        distances = [abs(root - other) for other in remaining]
        index = int(np.argmin(distances))
        assert distances[index] <= rtol * max(abs(root), 1e-30), (root, remaining[index])
        remaining.pop(index)


def test_butterworth_ladder_poles_match_scipy() -> None:
    # Source: Zverev, Handbook of Filter Synthesis: 3rd-order Butterworth ladder C=1, L=2, C=1, 1 Ω ends,
    # scaled to our 1 kΩ and 12 kHz.
    # Reference library: scipy 1.17, scipy.signal.butter(3, ωc, analog=True, output="zpk")
    impedance, corner = 1e3, TWO_PI * 12e3
    capacitance, inductance = 1.0 / (impedance * corner), 2.0 * impedance / corner
    model = model_of([part("RS", "R", ["in", "a"], impedance), part("C1", "C", ["a", "0"], capacitance),
                      part("L2", "L", ["a", "out"], inductance), part("C3", "C", ["out", "0"], capacitance),
                      part("RL", "R", ["out", "0"], impedance)])
    _, poles, _ = scipy.signal.butter(3, corner, analog=True, output="zpk")
    assert_same_roots(model.poles_rad_s, poles)
    assert len(model.zeros_rad_s) == 0
    # DC gain 1/2 (matched ends): K = 0.5·∏(−p) = 0.5·ωc³
    assert model.gain == pytest.approx(0.5 * corner**3, rel=1e-9)


def sallen_key(r: float, c1: float, c2: float, input_node: str, output_node: str, tag: str) -> list[Part]:
    return [part(f"R1{tag}", "R", [input_node, f"a{tag}"], r), part(f"R2{tag}", "R", [f"a{tag}", f"b{tag}"], r),
            part(f"C1{tag}", "C", [f"a{tag}", output_node], c1), part(f"C2{tag}", "C", [f"b{tag}", "0"], c2),
            part(f"U{tag}", "opamp", [f"b{tag}", output_node, output_node], model="ideal")]


def test_fourth_order_butterworth_from_two_sallen_key_sections() -> None:
    # Source: Butterworth poles at angles θk = (2k−1)π/(2n) from the negative real axis, so Qk = 1/(2cos θk);
    # unity-gain Sallen-Key with equal R: ω0 = 1/(R·sqrt(C1C2)), Q = sqrt(C1/C2)/2 (Sallen & Key, 1955).
    # Reference library: scipy 1.17, scipy.signal.butter(4, ωc, analog=True, output="zpk")
    order, corner, resistance = 4, TWO_PI * 2.5e3, 10e3
    parts: list[Part] = []
    nodes = ["in", "mid", "out"]
    for k in (1, 2):
        quality = 1.0 / (2.0 * math.cos((2 * k - 1) * math.pi / (2 * order)))
        c2 = 1.0 / (2.0 * quality * corner * resistance)
        c1 = 4.0 * quality**2 * c2
        parts += sallen_key(resistance, c1, c2, nodes[k - 1], nodes[k], str(k))
    model = model_of(parts)
    _, poles, gain = scipy.signal.butter(order, corner, analog=True, output="zpk")
    assert_same_roots(model.poles_rad_s, poles)
    assert model.gain == pytest.approx(gain, rel=1e-9)
    # Source: Williams & Taylor, Electronic Filter Design Handbook, Butterworth section Q values, 4th order:
    # 0.5412 and 1.3066 (value from memory)
    qs = sorted(row["q"] for row in root_table(model.poles_rad_s) if row["q"] is not None and row["im"] > 0)
    assert qs == pytest.approx([0.5412, 1.3066], abs=5e-5)


def test_finite_gbw_amplifier_poles_match_python_control() -> None:
    # Source: H. S. Black (1934): H = A/(1 + Aβ) with A(s) = A0/((1 + s/ωp1)(1 + s/ωp2)), ωp1 = ω_GBW/A0
    # Reference library: control 0.10.2, control.poles and control.zeros of that closed form
    a0_db, gbw, p2, r1, r2 = 90.0, 5e6, 18e6, 1e3, 9.1e3
    models = {"m": OpampModel(a0_db=q(a0_db), gbw_hz=q(gbw), p2_hz=q(p2))}
    model = model_of([part("R1", "R", ["m", "0"], r1), part("R2", "R", ["out", "m"], r2),
                      part("U1", "opamp", ["in", "m", "out"], model="m")], models)
    a0 = 10 ** (a0_db / 20)
    wp1, wp2, beta = TWO_PI * gbw / a0, TWO_PI * p2, r1 / (r1 + r2)
    open_loop = control.tf([a0], np.polymul([1 / wp1, 1], [1 / wp2, 1]))
    closed = control.feedback(open_loop, beta)
    assert_same_roots(model.poles_rad_s, control.poles(closed))
    assert_same_roots(model.zeros_rad_s, control.zeros(closed))


def test_notch_zeros_on_the_axis_match_python_control() -> None:
    # Source: Nilsson & Riedel: R in series, then L and C in series to node 0:
    # H = (1 + s²LC)/(1 + sRC + s²LC)
    # Reference library: control 0.10.2, control.zeros and control.poles
    r, inductance, capacitance = 330.0, 10e-3, 100e-9
    model = model_of([part("R1", "R", ["in", "out"], r), part("L1", "L", ["out", "a"], inductance),
                      part("C1", "C", ["a", "0"], capacitance)])
    reference = control.tf([inductance * capacitance, 0, 1], [inductance * capacitance, r * capacitance, 1])
    assert_same_roots(model.zeros_rad_s, control.zeros(reference))
    assert_same_roots(model.poles_rad_s, control.poles(reference))
    assert model.gain == pytest.approx(1.0, rel=1e-9)


def test_capacitor_across_the_voltage_drive_leaves_one_pole() -> None:
    # Source: Nilsson & Riedel: an ideal source fixes the voltage across a parallel C, so H = 1/(1 + sRC);
    # the capacitor loop through the source is index 2 (a Jordan chain at infinity) and must not
    # produce a spurious finite pole.
    r, c_out, c_in = 4.7e3, 22e-9, 1e-6
    model = model_of([part("C0", "C", ["in", "0"], c_in), part("R1", "R", ["in", "out"], r),
                      part("C1", "C", ["out", "0"], c_out)])
    assert_same_roots(model.poles_rad_s, np.array([-1.0 / (r * c_out)]), rtol=1e-9)
    assert len(model.zeros_rad_s) == 0


def test_compensated_divider_cancels_its_pole_and_zero() -> None:
    # Common practice, no source: a divider R1∥C1 over R2∥C2 with R1C1 = R2C2 is flat at R2/(R1 + R2)
    # (the compensated probe); its pole and zero coincide and must be reported as cancelled.
    r1, c1, r2, c2 = 900e3, 10e-12, 100e3, 90e-12
    model = model_of([part("R1", "R", ["in", "out"], r1), part("C1", "C", ["in", "out"], c1),
                      part("R2", "R", ["out", "0"], r2), part("C2", "C", ["out", "0"], c2)])
    assert len(model.poles_rad_s) == 0 and len(model.zeros_rad_s) == 0
    assert len(model.cancelled) == 1
    pole, zero = model.cancelled[0]
    assert pole.real == pytest.approx(-1.0 / (r1 * c1), rel=1e-6)
    assert zero.real == pytest.approx(-1.0 / (r1 * c1), rel=1e-6)
    assert model.gain == pytest.approx(r2 / (r1 + r2), rel=1e-9)


def test_integrator_pole_is_exactly_at_the_origin() -> None:
    # Source: any op-amp text: H = −1/(sRC): one pole at s = 0, K = −1/(RC)
    r, c = 20e3, 4.7e-9
    model = model_of([part("R1", "R", ["in", "m"], r), part("C1", "C", ["m", "out"], c),
                      part("U1", "opamp", ["0", "m", "out"], model="ideal")])
    assert list(model.poles_rad_s) == [0j]
    assert model.dc_gain is None
    assert model.gain == pytest.approx(-1.0 / (r * c), rel=1e-9)


def test_band_pass_zero_at_origin_and_q() -> None:
    # Source: Williams & Taylor, MFB band-pass: ω0² = (1/R1 + 1/R2)/(R3C1C2), ω0/Q = (C1 + C2)/(R3C1C2),
    # one zero at s = 0
    r1, r2, r3, c1, c2 = 22e3, 1.1e3, 91e3, 3.3e-9, 3.3e-9
    model = model_of([part("R1", "R", ["in", "a"], r1), part("R2", "R", ["a", "0"], r2),
                      part("C1", "C", ["a", "out"], c1), part("C2", "C", ["a", "b"], c2),
                      part("R3", "R", ["b", "out"], r3), part("U1", "opamp", ["0", "b", "out"], model="ideal")])
    omega0 = math.sqrt((1 / r1 + 1 / r2) / (r3 * c1 * c2))
    quality = omega0 / ((c1 + c2) / (r3 * c1 * c2))
    assert list(model.zeros_rad_s) == [0j]
    rows = root_table(model.poles_rad_s)
    assert rows[0]["f_hz"] == pytest.approx(omega0 / TWO_PI, rel=1e-9)
    assert rows[0]["q"] == pytest.approx(quality, rel=1e-9)
    assert rows[0]["im"] == pytest.approx(-rows[1]["im"], rel=1e-12)


def test_generic_pencil_function_on_raw_matrices() -> None:
    # Source: Nilsson & Riedel: two RC sections, the second buffered by an ideal vcvs of gain 1:
    # H = 1/((1 + sR1C1)(1 + sR2C2)). Matrices written out by hand, unknowns
    # [v_in, v_a, v_b, v_out, i_src, i_E]; the composition engine calls the same function.
    r1, c1, r2, c2 = 1e3, 1e-6, 2.7e3, 33e-9
    g = np.zeros((6, 6))
    c = np.zeros((6, 6))
    g[0, 0] += 1 / r1
    g[0, 1] -= 1 / r1
    g[1, 0] -= 1 / r1
    g[1, 1] += 1 / r1
    c[1, 1] += c1
    g[2, 2] += 1 / r2
    g[2, 3] -= 1 / r2
    g[3, 2] -= 1 / r2
    g[3, 3] += 1 / r2
    c[3, 3] += c2
    g[0, 4] = g[4, 0] = 1.0  # the drive
    g[2, 5] = 1.0  # vcvs b = a
    g[5, 2], g[5, 1] = 1.0, -1.0
    b = np.zeros(6)
    b[4] = 1.0
    model = pole_zero_model(g, c, b, 3)
    assert_same_roots(model.poles_rad_s, np.array([-1 / (r1 * c1), -1 / (r2 * c2)]), rtol=1e-9)
    assert model.dc_gain == pytest.approx(1.0, rel=1e-12)


def test_finite_eigenvalues_of_a_regular_standard_pencil() -> None:
    # Reference library: scipy 1.17, scipy.linalg.eigvals(A) for a standard problem (E = I)
    rng = np.random.default_rng(7)
    a = rng.normal(size=(6, 6))
    expected = scipy.linalg.eigvals(-a)
    assert_same_roots(finite_eigenvalues(a, np.eye(6)), expected, rtol=1e-9)


def test_pole_count_is_the_order_of_an_rc_ladder_with_op_amp_buffers() -> None:
    # Source: each buffered RC section adds one real pole at −1/(RC) (Nilsson & Riedel); the op-amp
    # nullors add only infinite eigenvalues, which must all be deflated.
    sections = [(1e3, 100e-9), (2.2e3, 47e-9), (4.7e3, 10e-9), (10e3, 2.2e-9)]
    parts: list[Part] = []
    previous = "in"
    for index, (r, c) in enumerate(sections):
        node, out = f"n{index}", ("out" if index == len(sections) - 1 else f"o{index}")
        parts += [part(f"R{index}", "R", [previous, node], r), part(f"C{index}", "C", [node, "0"], c),
                  part(f"U{index}", "opamp", [node, out, out], model="ideal")]
        previous = out
    model = model_of(parts)
    assert_same_roots(model.poles_rad_s, np.array([-1 / (r * c) for r, c in sections]), rtol=1e-9)
    system = drive(assemble(Stage("s", "s", parts=parts), Project("p")), False)
    assert system.g.shape[0] > 3 * len(sections)  # many infinite eigenvalues were present


def test_minimal_model_reproduces_the_sweep_of_a_deep_stage() -> None:
    # Cross-check inside the engine (REFERENCES): K·∏(s − z)/∏(s − p) against the MNA solve, for ten
    # RC sections each buffered by a two-pole op-amp model with rout (30 poles, relative degree 30).
    # Source: each RC section gives 1/(1 + sRC) (Nilsson & Riedel); each follower A/(1 + A) with the
    # op-amp's A(s) (Black, 1934), so the pole count is 3 per section and there are no finite zeros.
    model_params = OpampModel(a0_db=q(105.0), gbw_hz=q(12e6), p2_hz=q(40e6), rout_ohm=q(30.0))
    parts: list[Part] = []
    previous = "in"
    for index in range(1, 11):
        node, out = f"n{index}", ("out" if index == 10 else f"o{index}")
        parts += [part(f"R{index}", "R", [previous, node], 1e3 * (1.0 + 0.29 * (index % 4))),
                  part(f"C{index}", "C", [node, "0"], 1e-9 * (1.0 + 0.17 * (index % 5))),
                  part(f"U{index}", "opamp", [node, out, out], model="buf")]
        previous = out
    stage = Stage("deep", "deep", parts=parts)
    f_hz = np.logspace(0, 7, 71)
    analysis = analyze_stage(stage, Project("p", opamp_models={"buf": model_params}, stages=[stage]), f_hz)
    assert analysis.model is not None and analysis.response is not None
    assert len(analysis.model.poles_rad_s) == 30 and len(analysis.model.zeros_rad_s) == 0
    rebuilt = analysis.model.evaluate(1j * TWO_PI * f_hz)
    assert np.max(np.abs(rebuilt - analysis.response) / np.abs(analysis.response)) < 1e-6


def test_minimal_model_matches_the_sweep_on_random_circuits() -> None:
    # Cross-check inside the engine (REFERENCES): for random R, L, C networks with ideal and finite
    # op-amps in random places, every solvable one's minimal model K·∏(s − z)/∏(s − p) must give the MNA
    # sweep. Multiple roots and near-cancellations make 1e-4 the honest bound here (1e-9 holds for the
    # well-conditioned stages of the closed-form tests), and a few unstable tangles of op-amps in random
    # places defeat the rank decisions: at most 1 in 20 solvable circuits may miss (a known weakness).
    rng = np.random.default_rng(3)
    models = {"m": OpampModel(a0_db=q(90.0), gbw_hz=q(5e6), p2_hz=q(20e6), rout_ohm=q(40.0))}
    f_hz = np.logspace(0, 7, 40)
    nodes = ["in", "out", "a", "b", "c", "0"]
    checked = misses = 0
    for _ in range(80):
        parts: list[Part] = []
        for number in range(int(rng.integers(4, 9))):
            first, second = rng.choice(len(nodes), 2, replace=False)
            kind = str(rng.choice(["R", "C", "L", "R", "C"]))
            value = {"R": 10 ** rng.uniform(2, 5), "C": 10 ** rng.uniform(-10, -6), "L": 10 ** rng.uniform(-5, -2)}[kind]
            parts.append(part(f"{kind}{number}", kind, [nodes[first], nodes[second]], float(value)))
        for number in range(int(rng.integers(0, 3))):
            plus, minus, out = (str(node) for node in rng.choice(nodes[:5], 3, replace=True))
            parts.append(part(f"U{number}", "opamp", [plus, minus, out], model=str(rng.choice(["ideal", "m"]))))
        parts.append(part("RZ", "R", ["out", "0"], 1e4))
        stage = Stage("r", "random", parts=parts)
        analysis = analyze_stage(stage, Project("p", opamp_models=models, stages=[stage]), f_hz)
        if analysis.why is not None:
            continue
        assert analysis.model is not None and analysis.response is not None
        rebuilt = analysis.model.evaluate(1j * TWO_PI * f_hz)
        error = np.max(np.abs(rebuilt - analysis.response) / np.abs(analysis.response))
        misses += error >= 1e-4
        checked += 1
    assert checked >= 30
    assert misses <= checked // 20


@pytest.mark.parametrize("name", ["hydrophone", "greenhouse"])
def test_minimal_model_of_the_merged_demo_chains(name: str) -> None:
    # Cross-check inside the engine (REFERENCES): the composition engine hands the merged chain's pencil
    # to pole_zero_model; its model must give the chain's exact sweep over nine decades
    from pathlib import Path

    from stagewise.engine.chain import merged_system
    from stagewise.files.project_file import load_project

    path = Path(__file__).resolve().parents[2] / "projects" / f"{name}.stagewise.json"
    driven = merged_system(load_project(path)).driven()
    model = pole_zero_model(driven.g, driven.c, driven.b, driven.output)
    s = 1j * TWO_PI * np.logspace(-1, 8, 200)
    exact = transfer_at(driven.g, driven.c, driven.b, driven.output, s)
    assert np.max(np.abs(model.evaluate(s) - exact) / np.abs(exact)) < 1e-5
    assert model.fit_error < 1e-4  # not flagged as ill-conditioned (FIT_TOLERANCE)
