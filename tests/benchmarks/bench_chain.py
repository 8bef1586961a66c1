"""Chain composition: the port-relation cascade against a dense solve of the merged circuit,
and an incremental update (one part edited) against a full recompute.

Both use a chain of 10 stages of about 10 nodes each (an RC ladder of eight sections and a
finite-gain op-amp buffer per stage, our own values) at 2000 frequencies.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from run import Benchmark

from stagewise.engine.chain import ChainEngine, merged_system
from stagewise.engine.sweep import drive
from stagewise.model.project import Load, OpampModel, Part, Project, Settings, Stage
from stagewise.model.values import Quantity

STAGES = 10
SECTIONS = 8
POINTS = 2000


def ladder_chain(stages: int = STAGES, sections: int = SECTIONS) -> Project:
    """A chain of RC ladders, each ending in a finite op-amp buffer (10 nodes + 1 state per stage)."""
    model = OpampModel(a0_db=Quantity.of(110), gbw_hz=Quantity.of("8M"), rout_ohm=Quantity.of(40))
    chain = []
    for index in range(stages):
        parts = []
        previous = "in"
        for section in range(1, sections + 1):
            node = f"n{section}"
            resistance = 1e3 * (1.0 + 0.37 * ((index + section) % 5))
            capacitance = 1e-9 * (1.0 + 0.21 * ((2 * index + section) % 7))
            parts.append(Part(f"R{section}", "R", [previous, node], Quantity.of(resistance)))
            parts.append(Part(f"C{section}", "C", [node, "0"], Quantity.of(capacitance)))
            previous = node
        parts.append(Part("U1", "opamp", [previous, "out", "out"], model="buf"))
        chain.append(Stage(f"s{index + 1}", f"Ladder {index + 1}", parts=parts))
    settings = Settings(f_min_hz=Quantity.of(1), f_max_hz=Quantity.of("10M"),
                        points_per_decade=int(math.ceil((POINTS - 1) / 7)))
    project = Project("benchmark chain", settings=settings, opamp_models={"buf": model}, stages=chain,
                      load=Load(Quantity.of("10k"), Quantity.of("100p")))
    return project


def _frequencies() -> np.ndarray:
    return np.logspace(0, 7, POINTS)


def _sweep_setup() -> dict[str, Any]:
    project = ladder_chain()
    merged = merged_system(project)
    return {"project": project, "driven": drive(merged.system, current=False),
            "interfaces": list(merged.interface_indices), "f_hz": _frequencies()}


def _ours_sweep(context: Any) -> object:
    # A fresh engine: every stage reduced, then the cascade (no cache help).
    return ChainEngine().analyze(context["project"], context["f_hz"]).interface_response


def _merged_dense(context: Any) -> object:
    driven = context["driven"]
    s = 2j * np.pi * context["f_hz"]
    matrices = driven.g[None, :, :] + s[:, None, None] * driven.c[None, :, :]
    right = np.broadcast_to(driven.b.astype(complex)[None, :, None], (len(s), driven.b.size, 1))
    return np.linalg.solve(matrices, right)[:, context["interfaces"], 0]


def _incremental_setup() -> dict[str, Any]:
    project = ladder_chain()
    engine = ChainEngine()
    f_hz = _frequencies()
    engine.analyze(project, f_hz)
    part = project.stages[STAGES // 2].parts[3]
    return {"project": project, "engine": engine, "f_hz": f_hz, "part": part, "edits": [0]}


def _edit(context: Any) -> None:
    # One capacitor changed to a value never used before, so every call is a real edit that
    # no cache can answer.
    context["edits"][0] += 1
    context["part"].value = Quantity.of(1.5e-9 * (1.0 + 1e-3 * context["edits"][0]))


def _incremental(context: Any) -> object:
    _edit(context)
    return context["engine"].analyze(context["project"], context["f_hz"])


def _full(context: Any) -> object:
    _edit(context)
    return ChainEngine().analyze(context["project"], context["f_hz"])


def benchmarks() -> list[Benchmark]:
    return [
        Benchmark(
            name="chain_sweep_vs_merged",
            ours=_ours_sweep,
            baseline=_merged_dense,
            setup=_sweep_setup,
            goal_ratio=0.25,
            note=f"{STAGES} stages x ~10 nodes, {POINTS} points: port relations + cascade (every interface, "
                 "stages isolated and in chain, impedances) vs np.linalg.solve on the stacked merged matrices",
        ),
        Benchmark(
            name="incremental_vs_full",
            ours=_incremental,
            baseline=_full,
            setup=_incremental_setup,
            goal_ratio=0.15,
            note="one capacitor edited: cached engine (re-reduces one stage) vs a fresh engine",
        ),
    ]
