"""Stage engine: an isolated sweep through the public API against bare LAPACK, and the
pole/zero model against a plain generalized eigenvalue call.

The pole/zero goal is in seconds: a plain QZ call cannot tell infinite eigenvalues from poles,
so it is not the same job, only a measure of the machine.

The stage is an RC ladder of ten sections, each buffered by a finite op-amp (two poles, output
resistance): 20 nodes plus 20 op-amp states (our own values), swept at 2000 frequencies.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import scipy.linalg
from run import Benchmark

from stagewise.engine.poles import pole_zero_model
from stagewise.engine.stage import isolated_system, stage_response
from stagewise.model.project import OpampModel, Part, Project, Stage
from stagewise.model.values import Quantity

SECTIONS = 10
POINTS = 2000


def buffered_ladder(sections: int = SECTIONS) -> Project:
    """RC sections, each followed by a finite op-amp follower: 2 nodes and 2 states per section."""
    model = OpampModel(a0_db=Quantity.of(105), gbw_hz=Quantity.of("12M"), p2_hz=Quantity.of("40M"),
                       rout_ohm=Quantity.of(30))
    parts = []
    previous = "in"
    for index in range(1, sections + 1):
        node, out = f"n{index}", ("out" if index == sections else f"o{index}")
        resistance = 1e3 * (1.0 + 0.29 * (index % 4))
        capacitance = 1e-9 * (1.0 + 0.17 * (index % 5))
        parts += [Part(f"R{index}", "R", [previous, node], Quantity.of(resistance)),
                  Part(f"C{index}", "C", [node, "0"], Quantity.of(capacitance)),
                  Part(f"U{index}", "opamp", [node, out, out], model="buf")]
        previous = out
    stage = Stage("ladder", "Buffered ladder", parts=parts)
    return Project("benchmark stage", opamp_models={"buf": model}, stages=[stage])


def _setup() -> dict[str, Any]:
    project = buffered_ladder()
    stage = project.stages[0]
    driven = isolated_system(stage, project)
    f_hz = np.logspace(0, 7, POINTS)
    s = 1j * 2.0 * math.pi * f_hz
    matrices = driven.g[None, :, :] + s[:, None, None] * driven.c[None, :, :]
    right = np.broadcast_to(driven.b.astype(complex)[None, :, None], (POINTS, len(driven.b), 1)).copy()
    return {"project": project, "stage": stage, "f_hz": f_hz, "matrices": matrices, "right": right,
            "driven": driven}


def _ours_sweep(context: Any) -> object:
    return stage_response(context["stage"], context["project"], context["f_hz"])


def _lapack_sweep(context: Any) -> object:
    return np.linalg.solve(context["matrices"], context["right"])


def _ours_poles(context: Any) -> object:
    driven = context["driven"]
    return pole_zero_model(driven.g, driven.c, driven.b, driven.output)


def _eig_poles(context: Any) -> object:
    driven = context["driven"]
    return scipy.linalg.eigvals(driven.g, -driven.c)


def benchmarks() -> list[Benchmark]:
    return [
        Benchmark(
            name="stage_sweep_vs_lapack",
            ours=_ours_sweep,
            baseline=_lapack_sweep,
            setup=_setup,
            goal_ratio=3.0,
            note="2000-point isolated sweep of a 20-node stage (assembly included) vs one batched "
                 "numpy.linalg.solve of the already-assembled stacked matrices",
        ),
        Benchmark(
            name="stage_poles_vs_qz",
            ours=_ours_poles,
            baseline=_eig_poles,
            setup=_setup,
            goal_seconds=0.25,
            note="minimal pole/zero model of the 41-unknown stage (deflation of the infinite eigenvalues, "
                 "poles, Rosenbrock zeros through a relative degree of 30, cancellation, gain); the baseline, "
                 "one plain QZ call for the poles alone, only shows the machine's speed",
        ),
    ]
