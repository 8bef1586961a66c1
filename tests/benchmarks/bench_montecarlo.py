"""Monte Carlo over tolerances on the hydrophone demo, whole active chain merged.

``montecarlo_vs_floor``: the spread analysis of 1000 samples × 200 frequencies (response only:
envelopes, gain at ref and the refined −3 dB corners) against the bare batched LAPACK solves of
the same number of already assembled dense sample matrices — what a dense per-sample solve
cannot go below. Ours uses low-rank (Woodbury) updates of the nominal solves, so it may beat
that floor.

``montecarlo_demo``: the whole Monte Carlo run as ``analyze`` does it (also the phase margin of
every op-amp in every sample and the extreme-vertex worst case), goal 2 s on this machine class;
the baseline is the same floor.

``montecarlo_yield_demo``: the project's spread with its yield as ``analyze``, ``check`` and the
packet compute it (``ProjectAnalysis.spread``: the chain and the nine places of the demo's
checks, the project's own 500 samples) against the same floor (1000 samples on the chain
alone), goal a ratio of 0.6. The places on the chain's pencil are read from the chain's solves
and point-gain places solve only their points: measured here 0.50 s, ratio 0.31 on a quiet
machine (0.34-0.55 under load); one Monte Carlo per place, as before, measured 0.95 s, ratio
0.59 quiet (about 1.0 under load). The ratio rises with the machine's load.

``montecarlo_million_asked``: ``analyze`` of the hydrophone demo with ``mc_samples`` set to
1,000,000, goal 12 s on this machine class. The Monte Carlo is bounded by its estimated cost
(``spread.bounded_samples``, about 8 s of one core): the spread, its yield and the bench
measurement's envelope each draw fewer samples and say so. Before the bound covered the
envelope, this took 180 s (and 112 s before any bound).

The floor solves a pre-assembled block of 100 real samples × 200 frequencies ten times over
(the same 200 000 solves; LAPACK's time does not depend on the values), which keeps its memory
near 0.3 GB instead of 2.9 GB.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

import numpy as np
from run import Benchmark

from stagewise.engine.chain import merged_system
from stagewise.engine.spread import monte_carlo, sample_multipliers, tolerance_model
from stagewise.files.project_file import load_project

DEMO = Path(__file__).resolve().parents[2] / "projects" / "hydrophone.stagewise.json"
SAMPLES = 1000
POINTS = 200
BLOCK = 100


def _setup() -> dict[str, Any]:
    project = load_project(DEMO)
    merged = merged_system(project)
    settings = project.settings
    f_hz = np.logspace(math.log10(settings.f_min_hz.si), math.log10(settings.f_max_hz.si), POINTS)
    model = tolerance_model(merged.system, current_drive=merged.current_drive)
    multipliers = sample_multipliers(model.tol, BLOCK, settings.seed, settings.mc_distribution)
    g, c = model.matrices(multipliers)
    s = 2j * math.pi * f_hz
    matrices = (g[:, None, :, :] + s[None, :, None, None] * c[:, None, :, :]).reshape(-1, model.size, model.size)
    rhs = np.broadcast_to(model.b.astype(complex)[None, :, None], (matrices.shape[0], model.size, 1)).copy()
    return {"project": project, "merged": merged, "f_hz": f_hz, "matrices": matrices, "rhs": rhs}


def _floor(context: object) -> object:
    assert isinstance(context, dict)
    result = None
    for _ in range(SAMPLES // BLOCK):
        result = np.linalg.solve(context["matrices"], context["rhs"])
    return result


def _response_only(context: object) -> object:
    assert isinstance(context, dict)
    merged = context["merged"]
    return monte_carlo(merged.system, context["project"], current_drive=merged.current_drive, f_hz=context["f_hz"],
                       samples=SAMPLES, phase_margins=False, worst_case=False)


def _whole_run(context: object) -> object:
    assert isinstance(context, dict)
    merged = context["merged"]
    return monte_carlo(merged.system, context["project"], current_drive=merged.current_drive, f_hz=context["f_hz"],
                       samples=SAMPLES)


def _project_spread(context: object) -> object:
    from stagewise.engine.analysis import ProjectAnalysis

    assert isinstance(context, dict)
    analysis = ProjectAnalysis(context["project"])
    return analysis.spread


def _million_asked(context: object) -> object:
    import dataclasses

    from stagewise.engine.analysis import ProjectAnalysis

    assert isinstance(context, dict)
    project = context["project"]
    asked = dataclasses.replace(project, settings=dataclasses.replace(project.settings, mc_samples=1_000_000))
    return ProjectAnalysis(asked).document()


def benchmarks() -> list[Benchmark]:
    return [
        Benchmark(
            name="montecarlo_vs_floor",
            ours=_response_only,
            baseline=_floor,
            setup=_setup,
            goal_ratio=2.0,
            repeats=3,
            note=f"hydrophone chain, {SAMPLES} samples x {POINTS} points; floor = dense batched LAPACK solves",
        ),
        Benchmark(
            name="montecarlo_demo",
            ours=_whole_run,
            baseline=_floor,
            setup=_setup,
            goal_seconds=2.0,
            repeats=3,
            note="whole run: envelopes, corners, phase margin of 5 op-amps per sample, worst case",
        ),
        Benchmark(
            name="montecarlo_yield_demo",
            ours=_project_spread,
            baseline=_floor,
            setup=_setup,
            goal_ratio=0.6,
            repeats=3,
            note="the project's spread and yield over every check's place (chain + 9 places, 500 samples)",
        ),
        Benchmark(
            name="montecarlo_million_asked",
            ours=_million_asked,
            baseline=_floor,
            setup=_setup,
            goal_seconds=12.0,
            repeats=1,
            note="analyze of the hydrophone demo asked for 1,000,000 samples: bounded, fewer drawn with a note",
        ),
    ]
