"""Buffered chains against python-control's series connection of the stage transfer functions.

Where every stage output is an ideal op-amp output, no stage loads the one before it, so the
chain response is exactly the product of the stages' own transfer functions. Each stage's
transfer function is written from its published formula with our own component values, and
python-control multiplies and evaluates them independently of our engine.
"""

from __future__ import annotations

import math

import control
import numpy as np

from stagewise.engine.chain import ChainEngine
from stagewise.model.project import Load, Part, Project, Stage
from stagewise.model.values import Quantity

q = Quantity.of
F_HZ = np.logspace(0, 6, 61)
OMEGA = 2 * math.pi * F_HZ

R_LP, C_LP = 5.6e3, 12e-9
SK_R1, SK_R2, SK_C1, SK_C2 = 8.2e3, 15e3, 3.9e-9, 1.8e-9  # C1 feedback, C2 to ground
R_HP, C_HP = 39e3, 220e-9
BLOCK_GAIN, BLOCK_POLE_HZ, BLOCK_ZERO_HZ = 3.3, 27e3, 2.1e3


def buffered_chain() -> Project:
    low_pass = Stage("lp", "RC low-pass + follower", parts=[
        Part("R1", "R", ["in", "a"], q(R_LP)), Part("C1", "C", ["a", "0"], q(C_LP)),
        Part("U1", "opamp", ["a", "out", "out"], model="ideal")])
    sallen_key = Stage("sk", "Sallen-Key low-pass", parts=[
        Part("R1", "R", ["in", "a"], q(SK_R1)), Part("R2", "R", ["a", "b"], q(SK_R2)),
        Part("C1", "C", ["a", "out"], q(SK_C1)), Part("C2", "C", ["b", "0"], q(SK_C2)),
        Part("U1", "opamp", ["b", "out", "out"], model="ideal")])
    high_pass = Stage("hp", "RC high-pass + follower", parts=[
        Part("C1", "C", ["in", "a"], q(C_HP)), Part("R1", "R", ["a", "0"], q(R_HP)),
        Part("U1", "opamp", ["a", "out", "out"], model="ideal")])
    block = Stage("drv", "Driver block", kind="block", gain=q(BLOCK_GAIN), zeros_hz=[q(BLOCK_ZERO_HZ)],
                  poles_hz=[q(BLOCK_POLE_HZ), q(BLOCK_POLE_HZ * 3)], zin_r_ohm=q("10M"), zout_ohm=q(0))
    return Project("buffered", stages=[low_pass, sallen_key, high_pass, block], load=Load(q("1k"), q("2n")))


def stage_transfer_functions() -> list[control.TransferFunction]:
    # Source: any circuits text (Nilsson & Riedel, Electric Circuits): RC low-pass 1/(sRC + 1),
    # RC high-pass sRC/(sRC + 1); an ideal follower has gain 1.
    low_pass = control.tf([1.0], [R_LP * C_LP, 1.0])
    high_pass = control.tf([R_HP * C_HP, 0.0], [R_HP * C_HP, 1.0])
    # Source: Sallen & Key (1955): unity-gain low-pass ω0 = 1/√(R1R2C1C2),
    # Q = √(R1R2C1C2)/(C2(R1+R2)) with C2 the capacitor to ground; H = ω0²/(s² + s·ω0/Q + ω0²).
    w0 = 1 / math.sqrt(SK_R1 * SK_R2 * SK_C1 * SK_C2)
    quality = math.sqrt(SK_R1 * SK_R2 * SK_C1 * SK_C2) / (SK_C2 * (SK_R1 + SK_R2))
    sallen_key = control.tf([w0**2], [1.0, w0 / quality, w0**2])
    # Common practice, no source: a behavioural block is its stated gain times the normalised
    # factors of its real zeros and poles, K·(1 + s/ωz)/((1 + s/ωp1)(1 + s/ωp2)).
    wz, wp = 2 * math.pi * BLOCK_ZERO_HZ, 2 * math.pi * BLOCK_POLE_HZ
    block = control.tf([BLOCK_GAIN / wz, BLOCK_GAIN], np.polymul([1 / wp, 1.0], [1 / (3 * wp), 1.0]))
    return [low_pass, sallen_key, high_pass, block]


def test_buffered_chain_equals_series_of_stage_functions() -> None:
    result = ChainEngine().analyze(buffered_chain(), F_HZ)
    functions = stage_transfer_functions()
    # Reference library: control 0.10.2, series and frequency_response.
    expected = control.frequency_response(control.series(*functions), OMEGA).complex
    np.testing.assert_allclose(result.response, expected, rtol=1e-9)
    running = np.ones(len(F_HZ), dtype=complex)
    for index, (entry, function) in enumerate(zip(result.stages, functions, strict=True), start=1):
        own = control.frequency_response(function, OMEGA).complex
        np.testing.assert_allclose(entry.isolated, own, rtol=1e-9)
        np.testing.assert_allclose(entry.in_chain_v_per_v, own, rtol=1e-9)
        assert entry.loading_error_db_max is not None and entry.loading_error_db_max < 1e-9
        running = running * own
        np.testing.assert_allclose(result.interface_response[:, index], running, rtol=1e-9)
