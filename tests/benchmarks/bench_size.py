"""Cost against size: a 100-section RC ladder and a 200-stage chain analysed whole (``analyze``).

Goals (stated in seconds on this machine class): the ladder's ``analyze`` ≤ 3 s, the chain's ≤ 10 s.
The baseline is a fixed workload (one batched complex solve of 2000 systems of 48 unknowns,
about 90 ms on the reference machine, DESIGN section 10), so the ratio shows how loaded the
machine was. The chain's places are as large as (the rest of) the chain: 602 unknowns for the
whole chain driven. Its sweeps are linear in the length (a sparse LU per frequency,
``sweep.solve_batched``), every stage seen from the chain's input reads one shared sweep, a stage
in chain takes its response from the port-relation cascade, and zeros and step responses are not
computed above ``stage.MODEL_MAX_UNKNOWNS`` (120): what remains cubic is the chain's own poles,
once (see the cost table in DEVELOPERS.md). Before that, the whole ``analyze`` grew with the
fourth power of the length (30 stages 4.2 s, 50 stages 10.9 s, 100 stages 67 s of CPU).
"""

from __future__ import annotations

from typing import Any

import numpy as np
from run import Benchmark

from stagewise.engine.analysis import ProjectAnalysis
from stagewise.model.project import OpampModel, Part, Project, Stage
from stagewise.model.values import Quantity


def rc_ladder(sections: int = 100) -> Project:
    """One stage: ``sections`` series-R, shunt-C sections (4k7, 2n2, our own values), toleranced."""
    parts = []
    for index in range(sections):
        a = "in" if index == 0 else f"n{index}"
        b = "out" if index == sections - 1 else f"n{index + 1}"
        parts.append(Part(f"R{index + 1}", "R", [a, b], Quantity.of("4k7"), tol=Quantity.of("1%")))
        parts.append(Part(f"C{index + 1}", "C", [b, "0"], Quantity.of("2n2"), tol=Quantity.of("5%")))
    return Project(f"RC ladder of {sections} sections", stages=[Stage("ladder", "RC ladder", parts=parts)])


def buffered_chain(stages: int = 200) -> Project:
    """``stages`` stages, each an RC low-pass (3k3, 470p) into a finite op-amp follower."""
    model = OpampModel(a0_db=Quantity.of(105), gbw_hz=Quantity.of("12M"), rout_ohm=Quantity.of(60))
    chain = [Stage(f"s{index + 1}", f"Buffered RC {index + 1}", parts=[
        Part("R1", "R", ["in", "mid"], Quantity.of("3k3"), tol=Quantity.of("1%")),
        Part("C1", "C", ["mid", "0"], Quantity.of("470p"), tol=Quantity.of("5%")),
        Part("U1", "opamp", ["mid", "out", "out"], model="follower"),
    ]) for index in range(stages)]
    return Project(f"Chain of {stages} buffered stages", opamp_models={"follower": model}, stages=chain)


def _analyze(project: Any) -> object:
    return ProjectAnalysis(project).document()


def _reference_workload(_: Any) -> object:
    generator = np.random.default_rng(7)
    matrices = generator.standard_normal((2000, 48, 48)) + 1j * generator.standard_normal((2000, 48, 48))
    return np.linalg.solve(matrices, np.ones((2000, 48, 1), dtype=complex))


def benchmarks() -> list[Benchmark]:
    return [Benchmark("ladder_100_analyze", _analyze, _reference_workload, setup=rc_ladder, goal_seconds=3.0,
                      repeats=2, note="analyze of a 100-section RC ladder (200 toleranced parts)"),
            Benchmark("chain_200_analyze", _analyze, _reference_workload, setup=buffered_chain,
                      goal_seconds=10.0, repeats=1, note="analyze of a 200-stage buffered chain")]
