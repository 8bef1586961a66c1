"""The chain with loading against hand-derived closed forms.

Every expected value below is derived in the comments from the impedances R, sL and 1/(sC)
with Kirchhoff's laws and the ideal op-amp rules (v+ = v−, no input current). Component values
are our own.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from stagewise.engine.chain import (
    CURRENT_UNIT,
    VOLTAGE_UNIT,
    ChainEngine,
    analyze_chain,
    isolated_response,
    merged_system,
)
from stagewise.engine.mna import CircuitError, assemble
from stagewise.engine.sweep import drive, transfer
from stagewise.model.project import InputDrive, Load, Part, Project, Stage
from stagewise.model.values import Quantity

q = Quantity.of
F_HZ = np.logspace(0, 6, 37)
S = 2j * math.pi * F_HZ
RTOL = 1e-9


def close(actual: object, expected: object) -> None:
    np.testing.assert_allclose(np.asarray(actual), np.asarray(expected), rtol=RTOL, atol=0)


def close_db(actual: object, expected: object) -> None:
    # dB near 0 cannot be compared relatively: 1e-9 dB absolute is 1.2e-10 relative in magnitude.
    np.testing.assert_allclose(np.asarray(actual), np.asarray(expected), rtol=0, atol=1e-9)


def parallel(*impedances: np.ndarray) -> np.ndarray:
    return 1.0 / sum(1.0 / z for z in impedances)


def r_part(ref: str, a: str, b: str, value: float) -> Part:
    return Part(ref, "R", [a, b], q(value))


def c_part(ref: str, a: str, b: str, value: float) -> Part:
    return Part(ref, "C", [a, b], q(value))


def follower(ref: str, plus: str, out: str) -> Part:
    return Part(ref, "opamp", [plus, out, out], model="ideal")


# -- unbuffered RC into RC ---------------------------------------------------------------------

R1, C1, R2, C2 = 6.8e3, 15e-9, 27e3, 2.2e-9


def rc_into_rc() -> Project:
    first = Stage("rc1", "RC one", ports={"in": "in", "out": "mid"},
                  parts=[r_part("R1", "in", "mid", R1), c_part("C1", "mid", "0", C1)])
    second = Stage("rc2", "RC two", parts=[r_part("R2", "in", "out", R2), c_part("C2", "out", "0", C2)])
    return Project("rc into rc", stages=[first, second])


def test_unbuffered_rc_into_rc() -> None:
    result = analyze_chain(rc_into_rc(), F_HZ)
    zc1, zc2 = 1 / (S * C1), 1 / (S * C2)
    # Source: Nilsson & Riedel, Electric Circuits (impedances R, 1/(sC); series/parallel; divider).
    # The second section loads the first: Z_B = R2 + 1/(sC2) in parallel with C1.
    z_b = R2 + zc2
    v_mid = parallel(zc1, z_b) / (R1 + parallel(zc1, z_b))
    v_out = v_mid * zc2 / (R2 + zc2)
    # Expanding: v_out = 1 / (1 + s(R1C1 + R2C2 + R1C2) + s²R1C1R2C2).
    close(v_out, 1 / (1 + S * (R1 * C1 + R2 * C2 + R1 * C2) + S**2 * R1 * C1 * R2 * C2))
    assert result.unit == VOLTAGE_UNIT
    close(result.interface_response[:, 0], np.ones_like(S))
    close(result.interface_response[:, 1], v_mid)
    close(result.response, v_out)
    first, second = result.stages
    # Isolated: each section alone, output open: 1 / (1 + sRC).
    close(first.isolated, 1 / (1 + S * R1 * C1))
    close(second.isolated, 1 / (1 + S * R2 * C2))
    close(first.in_chain_v_per_v, v_mid)
    close(second.in_chain_v_per_v, 1 / (1 + S * R2 * C2))  # nothing loads the last output
    ratio = v_mid * (1 + S * R1 * C1)
    close_db(first.loading_error_db, 20 * np.log10(np.abs(ratio)))
    close(first.loading_error_deg, np.degrees(np.angle(ratio)))
    assert first.loading_error_db_max == pytest.approx(np.max(np.abs(20 * np.log10(np.abs(ratio)))), rel=RTOL)
    assert second.loading_error_db_max == pytest.approx(0.0, abs=1e-9)
    # Impedances: looking back with the source shorted, looking forward into the rest.
    close(result.z_out_ohm[:, 1], parallel(R1 * np.ones_like(S), zc1))
    close(result.z_in_ohm[:, 1], z_b)
    close(result.z_in_ohm[:, 0], R1 + parallel(zc1, z_b))
    close(result.z_out_ohm[:, 2], parallel(R2 + parallel(R1 * np.ones_like(S), zc1), zc2))
    assert np.all(np.abs(result.z_out_ohm[:, 0]) == 0)  # the ideal voltage source, shorted
    assert np.all(np.isinf(result.z_in_ohm[:, 2]))      # no load: open
    close(first.z_in_ohm, result.z_in_ohm[:, 0])
    close(first.z_out_ohm, result.z_out_ohm[:, 1])


# -- sensor capacitance into a biased buffer ---------------------------------------------------

C_SENSOR, R_BIAS = 820e-12, 4.7e6


def sensor_into_buffer() -> Project:
    sensor = Stage("sensor", "Piezo sensor", ports={"in": "in", "out": "out"},
                   parts=[c_part("CS", "in", "out", C_SENSOR)])
    buffer = Stage("buf", "Buffer", parts=[r_part("RB", "in", "0", R_BIAS), follower("U1", "in", "out")])
    return Project("sensor", stages=[sensor, buffer], load=Load(q("1k"), q("1n")))


def test_sensor_capacitance_into_biased_buffer() -> None:
    result = analyze_chain(sensor_into_buffer(), F_HZ)
    # Source: Nilsson & Riedel, Electric Circuits: the sensor's source voltage behind 1/(sCs)
    # divides against R_bias: H = sR_bCs / (1 + sR_bCs); the ideal follower copies it whatever
    # the load (v+ = v−, zero output impedance).
    high_pass = S * R_BIAS * C_SENSOR / (1 + S * R_BIAS * C_SENSOR)
    close(result.interface_response[:, 1], high_pass)
    close(result.response, high_pass)
    sensor, buffer = result.stages
    close(sensor.isolated, np.ones_like(S))  # unloaded: no current through Cs
    close(sensor.in_chain_v_per_v, high_pass)
    close_db(sensor.loading_error_db, 20 * np.log10(np.abs(high_pass)))
    close(buffer.isolated, np.ones_like(S))
    close(buffer.in_chain_v_per_v, np.ones_like(S))
    close(result.z_out_ohm[:, 1], 1 / (S * C_SENSOR))
    close(result.z_in_ohm[:, 1], R_BIAS * np.ones_like(S))
    assert np.max(np.abs(result.z_out_ohm[:, 2])) < 1e-9  # ideal op-amp output
    close(result.z_in_ohm[:, 2], 1 / (1 / 1e3 + S * 1e-9))  # the load, R ∥ C


# -- a divider into a finite input resistance (a behavioural block) ---------------------------

RA, RB, R_IN, POLE_HZ = 22e3, 10e3, 33e3, 4.7e3


def divider_into_block() -> Project:
    divider = Stage("div", "Divider", parts=[r_part("RA", "in", "out", RA), r_part("RB", "out", "0", RB)])
    block = Stage("adc", "Converter input", kind="block", gain=q(2), poles_hz=[q(POLE_HZ)], zin_r_ohm=q(R_IN),
                  zout_ohm=q(0))
    return Project("divider", stages=[divider, block])


def test_divider_into_finite_input_resistance() -> None:
    result = analyze_chain(divider_into_block(), F_HZ)
    # Source: Nilsson & Riedel, Electric Circuits: voltage divider RB ∥ Rin against RA.
    loaded = (RB * R_IN / (RB + R_IN)) / (RA + RB * R_IN / (RB + R_IN))
    unloaded = RB / (RA + RB)
    pole = 1 / (1 + S / (2 * math.pi * POLE_HZ))
    close(result.interface_response[:, 1], loaded * np.ones_like(S))
    close(result.response, 2 * loaded * pole)
    divider, block = result.stages
    close(divider.isolated, unloaded * np.ones_like(S))
    close_db(divider.loading_error_db, 20 * math.log10(loaded / unloaded) * np.ones(len(S)))
    assert np.max(np.abs(divider.loading_error_deg)) < 1e-9
    close(block.isolated, 2 * pole)
    close(block.in_chain_v_per_v, 2 * pole)
    close(result.z_out_ohm[:, 1], RA * RB / (RA + RB) * np.ones_like(S))
    close(result.z_in_ohm[:, 1], R_IN * np.ones_like(S))


# -- current drive into a transimpedance stage -------------------------------------------------

C_DIODE, R_SHUNT, R_F, C_F = 47e-12, 2.0e9, 220e3, 1.2e-12


def photodiode_into_tia() -> Project:
    diode = Stage("pd", "Photodiode", drive="current", ports={"in": "k", "out": "k"},
                  parts=[c_part("CD", "k", "0", C_DIODE), r_part("RSH", "k", "0", R_SHUNT)])
    tia = Stage("tia", "Transimpedance", drive="current",
                parts=[r_part("RF", "in", "out", R_F), c_part("CF", "in", "out", C_F),
                       Part("U1", "opamp", ["0", "in", "out"], model="ideal")])
    return Project("light", input=InputDrive("current"), stages=[diode, tia], load=Load(q("2k"), None))


def test_current_drive_into_transimpedance_stage() -> None:
    result = analyze_chain(photodiode_into_tia(), F_HZ)
    # Source: Nilsson & Riedel, Electric Circuits, and the ideal op-amp rules: the inverting
    # input is a virtual ground, so the diode's C and R carry no current and all of the
    # photocurrent flows through Z_F = RF ∥ 1/(sCF): V_out / I = −RF / (1 + sRF·CF).
    z_f = R_F / (1 + S * R_F * C_F)
    z_diode = R_SHUNT / (1 + S * R_SHUNT * C_DIODE)
    assert result.unit == CURRENT_UNIT
    close(result.response, -z_f)
    assert np.max(np.abs(result.interface_response[:, 1])) < 1e-12 * np.max(np.abs(z_f))
    diode, tia = result.stages
    assert diode.unit == CURRENT_UNIT
    close(diode.isolated, z_diode)  # the shunt model alone: V / I = Z_diode
    # Input and output are one node, held at 0 V by the next input: V_out/V_in is 0/0.
    assert diode.in_chain_v_per_v is None and "0 V" in (diode.in_chain_v_per_v_why or "")
    close(diode.in_chain_ohm, np.zeros_like(S))
    assert diode.loading_error_db is None and "virtual-ground" in (diode.loading_error_why or "")
    assert tia.in_chain_v_per_v is None and "virtual ground" in (tia.in_chain_v_per_v_why or "")
    close(tia.in_chain_ohm, -z_f)
    close(tia.isolated, -z_f)
    assert tia.loading_error_db_max == pytest.approx(0.0, abs=1e-9)
    close(result.z_out_ohm[:, 1], z_diode)  # drive opened: only the diode looks back
    assert np.max(np.abs(result.z_in_ohm[:, 1])) < 1e-9  # a virtual ground
    assert np.all(np.isinf(result.z_out_ohm[:, 0]))  # an ideal current source, opened


def test_voltage_drive_into_virtual_ground_is_refused_and_isolated_says_why() -> None:
    project = photodiode_into_tia()
    tia = project.stages[1]
    project.input = InputDrive("voltage")
    project.stages = [tia]
    with pytest.raises(CircuitError, match="virtual ground"):
        analyze_chain(project, F_HZ)
    tia.drive = "voltage"
    alone = isolated_response(tia, project, F_HZ)
    assert alone.response is None and "virtual ground" in (alone.why or "")


# -- resistive and capacitive loads ------------------------------------------------------------

R_S, C_S, R_LOAD, C_LOAD = 3.3e3, 4.7e-9, 12e3, 680e-12


@pytest.mark.parametrize(("load_r", "load_c"), [(R_LOAD, None), (None, C_LOAD), (R_LOAD, C_LOAD)])
def test_resistive_and_capacitive_loads(load_r: float | None, load_c: float | None) -> None:
    stage = Stage("rc", "RC", parts=[r_part("R1", "in", "out", R_S), c_part("C1", "out", "0", C_S)])
    load = Load(None if load_r is None else q(load_r), None if load_c is None else q(load_c))
    result = analyze_chain(Project("load", stages=[stage], load=load), F_HZ)
    # Source: Nilsson & Riedel, Electric Circuits: admittances in parallel at the output,
    # Y = sC + 1/R_L + sC_L, then the divider R against 1/Y.
    y_out = S * C_S + (0 if load_r is None else 1 / load_r) + (0 if load_c is None else S * load_c)
    expected = (1 / y_out) / (R_S + 1 / y_out)
    close(result.response, expected)
    entry = result.stages[0]
    close(entry.isolated, 1 / (1 + S * R_S * C_S))
    close(entry.in_chain_v_per_v, expected)
    close_db(entry.loading_error_db, 20 * np.log10(np.abs(expected * (1 + S * R_S * C_S))))
    y_load = (0 if load_r is None else 1 / load_r) + (0 if load_c is None else S * load_c)
    close(result.z_in_ohm[:, 1], 1 / y_load)
    close(result.z_out_ohm[:, 1], 1 / (1 / R_S + S * C_S))


# -- bypass, isolated = sweep, caching, evaluation at any frequency ---------------------------


def test_bypassed_stage_is_left_out() -> None:
    project = rc_into_rc()
    middle = Stage("gain", "Gain", kind="block", gain=q(10), zin_r_ohm=q("1k"), zout_ohm=q(0), bypass=True)
    project.stages.insert(1, middle)
    with_bypass = analyze_chain(project, F_HZ)
    without = analyze_chain(rc_into_rc(), F_HZ)
    assert with_bypass.stage_ids == ("rc1", "rc2")
    close(with_bypass.interface_response, without.interface_response)
    with pytest.raises(KeyError, match="bypassed"):
        with_bypass.stage("gain")
    # A bypassed stage still has its isolated response.
    # Common practice, no source: a behavioural block of gain 10 with no poles is flat at 10.
    close(isolated_response(middle, project, F_HZ).response, 10 * np.ones_like(S))
    middle.bypass = False
    assert analyze_chain(project, F_HZ).stage_ids == ("rc1", "gain", "rc2")


def test_isolated_is_the_stage_sweep_and_the_merged_chain_agrees() -> None:
    project = sensor_into_buffer()
    result = analyze_chain(project, F_HZ)
    for stage, entry in zip(project.stages, result.stages, strict=True):
        close(entry.isolated, transfer(drive(assemble(stage, project), current=False), F_HZ))
    merged = merged_system(project)
    close(result.response, transfer(merged.driven(), F_HZ))


def test_editing_one_part_re_reduces_only_its_stage() -> None:
    project = rc_into_rc()
    project.stages.append(Stage("rc3", "RC three", parts=[r_part("R3", "in", "out", 1.5e3),
                                                          c_part("C3", "out", "0", 10e-9)]))
    engine = ChainEngine()
    first = engine.analyze(project, F_HZ)
    assert engine.reductions == 3 and engine.isolated_solves == 3
    engine.analyze(project, F_HZ)
    assert engine.reductions == 3
    project.stages[1].parts[0].value = q("33k")
    second = engine.analyze(project, F_HZ)
    assert engine.reductions == 4 and engine.isolated_solves == 4
    assert not np.allclose(first.response, second.response)
    close(second.response, analyze_chain(project, F_HZ).response)
    project.stages[1].parts[0].value = q("27k")  # back to a value seen before: from the cache
    engine.analyze(project, F_HZ)
    assert engine.reductions == 4
    engine.analyze(project, [10.0, 1e3, 2e4])  # another grid: every stage again
    assert engine.reductions == 7


def test_any_frequencies_match_the_grid_sweep() -> None:
    project = rc_into_rc()
    points = [10.0, 1e3, 2e4]
    at_points = analyze_chain(project, points)
    s = 2j * math.pi * np.array(points)
    close(at_points.response, 1 / (1 + s * (R1 * C1 + R2 * C2 + R1 * C2) + s**2 * R1 * C1 * R2 * C2))
    assert at_points.z_in_ohm.shape == (3, 3)
    with pytest.raises(ValueError, match="finite"):
        analyze_chain(project, [float("nan")])


def test_a_stage_that_is_not_a_two_port_is_named() -> None:
    floating = Stage("bad", "Floating", parts=[r_part("R1", "in", "out", 1e3), c_part("C1", "x", "y", 1e-9)])
    with pytest.raises(CircuitError, match='stage "bad"'):
        analyze_chain(Project("bad", stages=[floating]), F_HZ)


def test_whole_chain_poles_and_step_from_the_merged_circuit() -> None:
    engine = ChainEngine()
    project = rc_into_rc()
    analysis = engine.whole_chain(project, F_HZ)
    assert analysis.why is None and analysis.poles_rad_s is not None
    denominator = [R1 * C1 * R2 * C2, R1 * C1 + R2 * C2 + R1 * C2, 1.0]
    # Reference library: numpy 2, numpy.roots of the hand-derived denominator above.
    expected = np.sort_complex(np.roots(denominator))
    np.testing.assert_allclose(np.sort_complex(analysis.poles_rad_s), expected, rtol=1e-6)
    assert analysis.zeros_rad_s is not None and len(analysis.zeros_rad_s) == 0
    step = engine.step(project)
    # Source: Ogata, Modern Control Engineering, ch. 5 (partial fractions): with real poles
    # p1, p2 and unit DC gain, y(t) = 1 + (p2·e^(p1·t) − p1·e^(p2·t)) / (p1 − p2).
    # Reference library: scipy 1, scipy.optimize.brentq for the 10 %, 90 % and 99 % crossings.
    from scipy.optimize import brentq

    p1, p2 = (float(root.real) for root in expected)

    def crossing(level: float) -> float:
        def y(t: float) -> float:
            return 1 + (p2 * math.exp(p1 * t) - p1 * math.exp(p2 * t)) / (p1 - p2) - level
        return float(brentq(y, 0.0, 100.0 / min(abs(p1), abs(p2)), xtol=1e-16, rtol=1e-13))

    assert step.final == pytest.approx(1.0, rel=1e-9)
    assert step.overshoot_pct == pytest.approx(0.0, abs=1e-6)
    assert step.rise_s == pytest.approx(crossing(0.9) - crossing(0.1), rel=1e-6)
    assert step.settle_1pct_s == pytest.approx(crossing(0.99), rel=1e-6)


def test_current_drive_into_a_high_impedance_input_keeps_full_accuracy() -> None:
    # A current source into a small series resistor and a small capacitor: the stage's input
    # impedance is up to 1e8 times its resistor, where the voltage-driven form of its relation
    # would cancel digits; the engine re-reduces it imposing the input current.
    r, c = 120.0, 8.2e-12
    stage = Stage("rc", "RC", drive="current", parts=[r_part("R1", "in", "out", r), c_part("C1", "out", "0", c)])
    engine = ChainEngine()
    result = engine.analyze(Project("i", input=InputDrive("current"), stages=[stage]), F_HZ)
    # Source: Nilsson & Riedel, Electric Circuits: the whole current flows through R and C in
    # series: V_in = I·(R + 1/(sC)), V_out = I/(sC).
    close(result.interface_response[:, 0], r + 1 / (S * c))
    close(result.response, 1 / (S * c))
    close(result.stages[0].isolated, 1 / (S * c))
    assert engine.refinements == 1


def test_an_ideal_output_into_a_virtual_ground_names_the_interface() -> None:
    buffer = Stage("buf", "Buffer", parts=[r_part("RB", "in", "0", 1e6), follower("U1", "in", "out")])
    tia = Stage("tia", "TIA", parts=[r_part("RF", "in", "out", 10e3),
                                     Part("U1", "opamp", ["0", "in", "out"], model="ideal")])
    # Common practice, no source: an ideal voltage output cannot drive a 0 Ω virtual ground.
    with pytest.raises(CircuitError, match='output of stage "buf".*virtual ground'):
        analyze_chain(Project("conflict", stages=[buffer, tia]), F_HZ)


def test_thirty_buffered_sections_keep_relative_accuracy_deep_in_the_stop_band() -> None:
    r, c = 10e3, 10e-9
    sections = [Stage(f"s{index}", "RC + follower", parts=[
        r_part("R1", "in", "a", r), c_part("C1", "a", "0", c), follower("U1", "a", "out")]) for index in range(30)]
    result = analyze_chain(Project("long", stages=sections), F_HZ)
    # Source: Nilsson & Riedel, Electric Circuits: each buffered section is 1/(1 + sRC); the
    # ideal followers isolate them, so the chain is (1/(1 + sRC))³⁰: |H| = (1 + (ωRC)²)^−15, about
    # 1e-84 at 1 MHz (ωRC ≈ 628).
    expected = (1 / (1 + S * r * c)) ** 30
    assert np.min(np.abs(expected)) < 1e-80
    close(result.response, expected)


def test_isolated_matches_the_stage_engine() -> None:
    from stagewise.engine.stage import analyze_stage

    # Cross-check inside the engine (in addition to the closed forms above): the chain's
    # isolated responses are the numbers the stage engine shows for the same stages.
    for project in (rc_into_rc(), sensor_into_buffer(), divider_into_block(), photodiode_into_tia()):
        result = analyze_chain(project, F_HZ)
        for stage, entry in zip(project.active_stages, result.stages, strict=True):
            alone = analyze_stage(stage, project, F_HZ)
            assert alone.unit == entry.unit
            assert alone.response is not None and entry.isolated is not None
            np.testing.assert_allclose(entry.isolated, alone.response, rtol=1e-12)
