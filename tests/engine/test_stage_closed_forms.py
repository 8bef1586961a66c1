"""Isolated stage responses against closed forms from the literature (DESIGN 3.3, 3.6).

Component values are our own; each expected response is the published formula evaluated with
them. Relative error ≤ 1e-9 everywhere (the conditioning of these small stages allows it).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from stagewise.engine.stage import analyze_stage
from stagewise.model.project import OpampModel, Part, Project, Stage
from stagewise.model.values import Quantity

TWO_PI = 2.0 * math.pi
F_HZ = np.logspace(0, 6, 61)
S = 1j * TWO_PI * F_HZ
RTOL = 1e-9


def q(value: float) -> Quantity:
    return Quantity(value, float(value))


def part(ref: str, kind: str, nodes: list[str], value: float | None = None, **extra: str) -> Part:
    return Part(ref, kind, nodes, None if value is None else q(value), **extra)


def solve(parts: list[Part], drive: str = "voltage", models: dict[str, OpampModel] | None = None,
          out: str = "out") -> np.ndarray:
    stage = Stage("s", "stage under test", drive=drive, ports={"in": "in", "out": out}, parts=parts)
    project = Project("closed forms", opamp_models=models or {}, stages=[stage])
    analysis = analyze_stage(stage, project, F_HZ)
    assert analysis.why is None, analysis.why
    assert analysis.response is not None
    return analysis.response


def assert_close(actual: np.ndarray, expected: np.ndarray, rtol: float = RTOL) -> None:
    error = np.max(np.abs(actual - expected) / np.abs(expected))
    assert error <= rtol, f"relative error {error:.3g}"


# Values of our own choosing.
R_A, R_B, R_C = 3.3e3, 15e3, 6.8e3
C_A, C_B = 47e-9, 6.8e-9
L_A = 22e-3


def test_rc_low_pass() -> None:
    # Source: Nilsson & Riedel, Electric Circuits (impedances R and 1/(sC); voltage divider)
    actual = solve([part("R1", "R", ["in", "out"], R_A), part("C1", "C", ["out", "0"], C_A)])
    assert_close(actual, 1.0 / (1.0 + S * R_A * C_A))


def test_rc_high_pass() -> None:
    # Source: Nilsson & Riedel, Electric Circuits (voltage divider of 1/(sC) and R)
    actual = solve([part("C1", "C", ["in", "out"], C_B), part("R1", "R", ["out", "0"], R_B)])
    assert_close(actual, S * R_B * C_B / (1.0 + S * R_B * C_B))


def test_rl_high_pass() -> None:
    # Source: Nilsson & Riedel, Electric Circuits (impedance sL; voltage divider)
    actual = solve([part("R1", "R", ["in", "out"], R_A), part("L1", "L", ["out", "0"], L_A)])
    assert_close(actual, S * L_A / (R_A + S * L_A))


def test_series_rlc_band_pass() -> None:
    # Source: Nilsson & Riedel, Electric Circuits, series RLC: V_R/V = sRC/(s²LC + sRC + 1)
    resistance = 220.0
    actual = solve([part("L1", "L", ["in", "a"], L_A), part("C1", "C", ["a", "out"], C_A),
                    part("R1", "R", ["out", "0"], resistance)])
    assert_close(actual, S * resistance * C_A / (S**2 * L_A * C_A + S * resistance * C_A + 1.0))


def test_doubly_terminated_butterworth_ladder() -> None:
    # Source: Zverev, Handbook of Filter Synthesis: 3rd-order Butterworth, 1 Ω ends, C=1, L=2, C=1
    # (normalized); |H(jω)| = 0.5/sqrt(1 + ω⁶). Scaled to our own 600 Ω and 7 kHz.
    impedance, corner_rad_s = 600.0, TWO_PI * 7e3
    capacitance = 1.0 / (impedance * corner_rad_s)
    inductance = 2.0 * impedance / corner_rad_s
    actual = solve([
        part("RS", "R", ["in", "a"], impedance),
        part("C1", "C", ["a", "0"], capacitance),
        part("L2", "L", ["a", "out"], inductance),
        part("C3", "C", ["out", "0"], capacitance),
        part("RL", "R", ["out", "0"], impedance),
    ])
    normalized = TWO_PI * F_HZ / corner_rad_s
    assert_close(np.abs(actual), 0.5 / np.sqrt(1.0 + normalized**6))


def sallen_key_unity(r1: float, r2: float, c1: float, c2: float) -> list[Part]:
    """Unity-gain Sallen-Key low-pass; c1 is the feedback capacitor, c2 the one to ground."""
    return [part("R1", "R", ["in", "a"], r1), part("R2", "R", ["a", "b"], r2),
            part("C1", "C", ["a", "out"], c1), part("C2", "C", ["b", "0"], c2),
            part("U1", "opamp", ["b", "out", "out"], model="ideal")]


def test_unity_gain_sallen_key() -> None:
    # Source: Sallen & Key (1955): ω0 = 1/sqrt(R1R2C1C2), Q = sqrt(R1R2C1C2)/(C2(R1+R2)),
    # C2 the capacitor to ground; H = ω0²/(s² + (ω0/Q)s + ω0²)
    r1, r2, c1, c2 = 12e3, 27e3, 22e-9, 3.3e-9
    omega0 = 1.0 / math.sqrt(r1 * r2 * c1 * c2)
    quality = math.sqrt(r1 * r2 * c1 * c2) / (c2 * (r1 + r2))
    actual = solve(sallen_key_unity(r1, r2, c1, c2))
    assert_close(actual, omega0**2 / (S**2 + omega0 / quality * S + omega0**2))


def test_equal_component_sallen_key() -> None:
    # Source: Sallen & Key (1955), equal R and C with gain K = 1 + Rb/Ra: ω0 = 1/(RC), Q = 1/(3 − K),
    # H = K·ω0²/(s² + (ω0/Q)s + ω0²)
    resistance, capacitance, ra, rb = 8.2e3, 10e-9, 10e3, 5.6e3
    gain = 1.0 + rb / ra
    omega0, quality = 1.0 / (resistance * capacitance), 1.0 / (3.0 - gain)
    actual = solve([
        part("R1", "R", ["in", "a"], resistance), part("R2", "R", ["a", "b"], resistance),
        part("C1", "C", ["a", "out"], capacitance), part("C2", "C", ["b", "0"], capacitance),
        part("RA", "R", ["m", "0"], ra), part("RB", "R", ["out", "m"], rb),
        part("U1", "opamp", ["b", "m", "out"], model="ideal"),
    ])
    assert_close(actual, gain * omega0**2 / (S**2 + omega0 / quality * S + omega0**2))


def test_multiple_feedback_low_pass() -> None:
    # Source: Williams & Taylor, Electronic Filter Design Handbook, MFB low-pass (nodal analysis):
    # H = −1/(R1R3C1C2) / (s² + s(1/R1 + 1/R2 + 1/R3)/C1 + 1/(R2R3C1C2)); R2 the feedback resistor,
    # R3 to the inverting input, C1 to ground, C2 the feedback capacitor
    r1, r2, r3, c1, c2 = 4.7e3, 9.1e3, 5.6e3, 33e-9, 2.2e-9
    actual = solve([
        part("R1", "R", ["in", "a"], r1), part("C1", "C", ["a", "0"], c1),
        part("R2", "R", ["a", "out"], r2), part("R3", "R", ["a", "b"], r3),
        part("C2", "C", ["b", "out"], c2), part("U1", "opamp", ["0", "b", "out"], model="ideal"),
    ])
    expected = -(1.0 / (r1 * r3 * c1 * c2)) / (S**2 + S * (1 / r1 + 1 / r2 + 1 / r3) / c1 + 1.0 / (r2 * r3 * c1 * c2))
    assert_close(actual, expected)


def test_multiple_feedback_band_pass() -> None:
    # Source: Williams & Taylor, Electronic Filter Design Handbook, MFB band-pass:
    # H = −(s/(R1C1)) / (s² + s(C1 + C2)/(R3C1C2) + (1/R1 + 1/R2)/(R3C1C2)); C1 to the output,
    # C2 to the inverting input, R3 the feedback resistor
    r1, r2, r3, c1, c2 = 16e3, 750.0, 68e3, 4.7e-9, 4.7e-9
    actual = solve([
        part("R1", "R", ["in", "a"], r1), part("R2", "R", ["a", "0"], r2),
        part("C1", "C", ["a", "out"], c1), part("C2", "C", ["a", "b"], c2),
        part("R3", "R", ["b", "out"], r3), part("U1", "opamp", ["0", "b", "out"], model="ideal"),
    ])
    expected = -(S / (r1 * c1)) / (S**2 + S * (c1 + c2) / (r3 * c1 * c2) + (1 / r1 + 1 / r2) / (r3 * c1 * c2))
    assert_close(actual, expected)


SINGLE_POLE = {"amp": OpampModel(a0_db=q(96.0), gbw_hz=q(3e6), rout_ohm=q(0.0))}


def open_loop(s: np.ndarray, a0_db: float = 96.0, gbw_hz: float = 3e6) -> np.ndarray:
    a0 = 10.0 ** (a0_db / 20.0)
    return a0 / (1.0 + s / (TWO_PI * gbw_hz / a0))


def test_inverting_amplifier_finite_gbw() -> None:
    # Source: H. S. Black, "Stabilized feedback amplifiers" (1934), closed loop with β = R1/(R1+R2):
    # H = −(R2/R1)/(1 + (1 + R2/R1)/A(s)), A(s) = A0/(1 + s/ωp), ωp = ω_GBW/A0
    r1, r2 = 2.2e3, 47e3
    actual = solve([part("R1", "R", ["in", "m"], r1), part("R2", "R", ["m", "out"], r2),
                    part("U1", "opamp", ["0", "m", "out"], model="amp")], models=SINGLE_POLE)
    expected = -(r2 / r1) / (1.0 + (1.0 + r2 / r1) / open_loop(S))
    assert_close(actual, expected)


def test_non_inverting_amplifier_finite_gbw() -> None:
    # Source: H. S. Black (1934): H = A/(1 + A·β), β = R1/(R1 + R2)
    r1, r2 = 1.5e3, 13e3
    actual = solve([part("R1", "R", ["m", "0"], r1), part("R2", "R", ["out", "m"], r2),
                    part("U1", "opamp", ["in", "m", "out"], model="amp")], models=SINGLE_POLE)
    a = open_loop(S)
    beta = r1 / (r1 + r2)
    assert_close(actual, a / (1.0 + a * beta))


def test_integrator() -> None:
    # Source: any op-amp text, inverting integrator with an ideal op-amp: H = −1/(sRC)
    actual = solve([part("R1", "R", ["in", "m"], R_B), part("C1", "C", ["m", "out"], C_B),
                    part("U1", "opamp", ["0", "m", "out"], model="ideal")])
    assert_close(actual, -1.0 / (S * R_B * C_B))


def test_damped_differentiator() -> None:
    # Source: any op-amp text, differentiator with series input resistor: H = −sR2C1/(1 + sR1C1)
    r1, r2, c1 = 1.2e3, 39e3, 15e-9
    actual = solve([part("C1", "C", ["in", "a"], c1), part("R1", "R", ["a", "m"], r1),
                    part("R2", "R", ["m", "out"], r2), part("U1", "opamp", ["0", "m", "out"], model="ideal")])
    assert_close(actual, -S * r2 * c1 / (1.0 + S * r1 * c1))


def test_transimpedance_current_drive() -> None:
    # Source: any op-amp text, transimpedance amplifier with Rf ∥ Cf: V/I = −Rf/(1 + sRfCf) (Ω)
    rf, cf = 270e3, 3.9e-12
    stage = Stage("tia", "tia", drive="current", ports={"in": "m", "out": "out"},
                  parts=[part("RF", "R", ["m", "out"], rf), part("CF", "C", ["m", "out"], cf),
                         part("U1", "opamp", ["0", "m", "out"], model="ideal")])
    analysis = analyze_stage(stage, Project("t", stages=[stage]), F_HZ)
    assert analysis.unit == "Ω"
    assert analysis.response is not None
    assert_close(analysis.response, -rf / (1.0 + S * rf * cf))


def test_vcvs() -> None:
    # Source: Nilsson & Riedel, Electric Circuits, ch. 2 (dependent sources): v = μ·v_x
    actual = solve([part("R1", "R", ["in", "0"], R_A), part("E1", "vcvs", ["out", "0", "in", "0"], -7.5),
                    part("R2", "R", ["out", "0"], R_B)])
    assert_close(actual, np.full(S.shape, -7.5 + 0j))


def test_vccs() -> None:
    # Source: Nilsson & Riedel, ch. 2: i = g·v_x, driven from out+ through the source to out−,
    # into a load R ∥ C: V_out = −g·V_in·R/(1 + sRC)
    gm = 2.5e-3
    actual = solve([part("R1", "R", ["in", "0"], R_A), part("G1", "vccs", ["out", "0", "in", "0"], gm),
                    part("R2", "R", ["out", "0"], R_C), part("C1", "C", ["out", "0"], C_B)])
    assert_close(actual, -gm * R_C / (1.0 + S * R_C * C_B))


def test_ccvs() -> None:
    # Source: Nilsson & Riedel, ch. 2: v = r·i_x, i_x the current of C1 (in -> 0): i_x = sC·V_in
    rm = 4.3e3
    actual = solve([part("C1", "C", ["in", "0"], C_A), part("H1", "ccvs", ["out", "0"], rm, control="C1"),
                    part("R2", "R", ["out", "0"], R_B)])
    assert_close(actual, rm * S * C_A)


def test_cccs() -> None:
    # Source: Nilsson & Riedel, ch. 2: i = β·i_x; i_x the current of R1 (in -> 0) = V_in/R1, driven
    # from out+ (out) to out− (0) through the source, so V_out = −β·(V_in/R1)·R2
    beta = 12.0
    actual = solve([part("R1", "R", ["in", "0"], R_A), part("F1", "cccs", ["out", "0"], beta, control="R1"),
                    part("R2", "R", ["out", "0"], R_C)])
    assert_close(actual, np.full(S.shape, -beta * R_C / R_A + 0j))


def test_cccs_controlled_by_inductor_current() -> None:
    # Source: Nilsson & Riedel, ch. 2 and 6: i_L = V/(R + sL) through R1 then L1 to node 0
    beta = 0.4
    actual = solve([part("R1", "R", ["in", "a"], R_A), part("L1", "L", ["a", "0"], L_A),
                    part("F1", "cccs", ["0", "out"], beta, control="L1"), part("R2", "R", ["out", "0"], R_B)])
    assert_close(actual, beta * R_B / (R_A + S * L_A))


def test_follower_with_full_opamp_model() -> None:
    # Source: nodal analysis (Nilsson & Riedel) of a follower whose op-amp is A(s) behind rout,
    # with differential input admittance Y = 1/rin + s·Cd and common-mode capacitance Ccm at in−:
    # V(1/rout + Y + sCcm + A/rout) = Vin(A/rout + Y), A(s) = A0/((1 + s/ωp1)(1 + s/ωp2))
    a0_db, gbw, p2, rout, rin, cd, ccm = 100.0, 8e6, 25e6, 75.0, 2e6, 4e-12, 6e-12
    models = {"full": OpampModel(a0_db=q(a0_db), gbw_hz=q(gbw), p2_hz=q(p2), rout_ohm=q(rout), rin_ohm=q(rin),
                                 cin_diff_f=q(cd), cin_cm_f=q(ccm))}
    actual = solve([part("U1", "opamp", ["in", "out", "out"], model="full")], models=models)
    a = open_loop(S, a0_db, gbw) / (1.0 + S / (TWO_PI * p2))
    y = 1.0 / rin + S * cd
    expected = (a / rout + y) / (1.0 / rout + y + S * ccm + a / rout)
    assert_close(actual, expected)


@pytest.mark.parametrize("zout", [0.0, 50.0])
def test_behavioural_block(zout: float) -> None:
    # Source: definition of a block's normalized factors (DESIGN 5): H = K(1 + s/ωz)/((1 + s/ω1)
    # (1 + s/(Q·ω0) + s²/ω0²)); a zout in series does nothing unloaded
    gain, fz, f1, f0, quality = 3.5, 150.0, 2.2e3, 40e3, 0.9
    stage = Stage("blk", "block", kind="block", gain=q(gain), zeros_hz=[q(fz)], poles_hz=[q(f1), (q(f0), q(quality))],
                  zin_r_ohm=q(10e3), zin_c_f=q(10e-12), zout_ohm=q(zout))
    analysis = analyze_stage(stage, Project("b", stages=[stage]), F_HZ)
    assert analysis.response is not None
    w0 = TWO_PI * f0
    expected = gain * (1 + S / (TWO_PI * fz)) / ((1 + S / (TWO_PI * f1)) * (1 + S / (quality * w0) + S**2 / w0**2))
    assert_close(analysis.response, expected)


def test_block_with_zero_at_dc() -> None:
    # Source: DESIGN 5: a zero at 0 Hz is s scaled by its section's time constant; with one real
    # pole f1 that is the first-order high-pass K·(s/ω1)/(1 + s/ω1)
    gain, f1 = 2.0, 320.0
    stage = Stage("hp", "block", kind="block", gain=q(gain), zeros_hz=[q(0.0)], poles_hz=[q(f1)])
    analysis = analyze_stage(stage, Project("b", stages=[stage]), F_HZ)
    assert analysis.response is not None
    w1 = TWO_PI * f1
    assert_close(analysis.response, gain * (S / w1) / (1 + S / w1))
