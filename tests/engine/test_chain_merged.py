"""The merged whole-chain circuit (stage pencils joined at the interfaces) against closed forms."""

from __future__ import annotations

import math

import numpy as np
import pytest

from stagewise.engine.chain import merged_system
from stagewise.engine.mna import CircuitError
from stagewise.engine.sweep import transfer
from stagewise.model.project import Load, Part, Project, Stage
from stagewise.model.values import Quantity

q = Quantity.of
F_HZ = np.logspace(0, 6, 25)
S = 2j * math.pi * F_HZ


def rc_stage(stage_id: str, r: str, c: str, out: str = "out") -> Stage:
    return Stage(stage_id, stage_id, ports={"in": "in", "out": out},
                 parts=[Part("R1", "R", ["in", out], q(r)), Part("C1", "C", [out, "0"], q(c))])


def test_rc_into_rc_merged_matches_hand_derivation() -> None:
    first, second = rc_stage("first", "4k7", "22n", out="mid"), rc_stage("second", "12k", "3n3")
    merged = merged_system(Project("t", stages=[first, second]))
    r1, c1, r2, c2 = 4.7e3, 22e-9, 12e3, 3.3e-9
    # Source: Nilsson & Riedel, Electric Circuits (impedances R, 1/(sC)); by nodal analysis of
    # the two loaded sections: H = 1 / (1 + s(R1C1 + R2C2 + R1C2) + s²R1C1R2C2).
    expected = 1 / (1 + S * (r1 * c1 + r2 * c2 + r1 * c2) + S**2 * r1 * c1 * r2 * c2)
    np.testing.assert_allclose(transfer(merged.driven(), F_HZ), expected, rtol=1e-12)
    system = merged.system
    assert system.node_index["first:mid"] == system.node_index["second:in"]
    assert merged.interface_indices == (system.node_index["first:in"], system.node_index["first:mid"],
                                        system.node_index["second:out"])
    assert {element.ref for element in system.elements} == {"first:R1", "first:C1", "second:R1", "second:C1"}


def test_load_and_bypass_and_shunt_stage() -> None:
    # A shunt stage (ports in = out) between two RC sections, a bypassed stage, and an R ∥ C load.
    shunt = Stage("shunt", "shunt", ports={"in": "n", "out": "n"},
                  parts=[Part("C1", "C", ["n", "0"], q("1n5")), Part("R1", "R", ["n", "0"], q("68k"))])
    skipped = rc_stage("skipped", "1", "1")
    skipped.bypass = True
    project = Project("t", stages=[rc_stage("a", "10k", "0"), skipped, shunt, rc_stage("b", "2k2", "0")],
                      load=Load(q("47k"), q("330p")))
    # Zero-valued capacitors stamp nothing: the two "RC" stages are plain series resistors here.
    merged = merged_system(project)
    assert merged.stage_ids == ("a", "shunt", "b")
    r_a, r_b, c_s, r_s, r_l, c_l = 10e3, 2.2e3, 1.5e-9, 68e3, 47e3, 330e-12
    # Source: Nilsson & Riedel, Electric Circuits: series and parallel impedances, voltage divider.
    z_load = 1 / (1 / r_l + S * c_l)
    z_shunt = 1 / (1 / r_s + S * c_s)
    z_after = 1 / (1 / z_shunt + 1 / (r_b + z_load))
    expected = z_after / (r_a + z_after) * z_load / (r_b + z_load)
    np.testing.assert_allclose(transfer(merged.driven(), F_HZ), expected, rtol=1e-12)
    assert [e.ref for e in merged.system.elements][-2:] == ["load:R", "load:C"]


def test_every_stage_bypassed_is_refused() -> None:
    stage = rc_stage("a", "1k", "1n")
    stage.bypass = True
    with pytest.raises(CircuitError, match="no active stage"):
        merged_system(Project("t", stages=[stage]))
