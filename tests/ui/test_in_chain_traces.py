"""The traces the views draw for a stage in chain carry the stage's own unit."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from stagewise.files.project_file import load_project
from stagewise.model.values import Quantity
from stagewise.ui import analyses

GREENHOUSE = Path(__file__).resolve().parents[2] / "projects" / "greenhouse.stagewise.json"


def test_current_driven_stage_in_chain_is_a_transimpedance() -> None:
    # Common practice, no source: at low frequency a transimpedance stage gives −Rf volts per
    # ampere entering its summing node; the demo's feedback resistor is 1 MΩ (120 dBΩ), so where
    # the stage sits (after the photodiode) its trace must read about 120 dBΩ, not a voltage ratio.
    project = load_project(GREENHOUSE)
    stage = project.stage("tia")
    assert stage is not None and stage.drive == "current"
    context = analyses.Context()
    context.begin(project, None)
    trace = analyses.in_chain_response(stage, project, context)
    assert trace.unit == "Ω"
    low = trace.f_hz < 10.0
    np.testing.assert_allclose(trace.mag_db[low], 120.0, atol=0.01)
    alone = analyses.isolated_response(stage, project, context)
    assert alone.unit == trace.unit


def test_an_edit_reduces_only_the_edited_stage_again() -> None:
    # The views reuse the chain engine's port relations across snapshots (cached by fingerprint).
    project = load_project(GREENHOUSE)
    context = analyses.Context()
    context.begin(project, None)
    for stage in project.stages:
        analyses.in_chain_response(stage, project, context)
    before = context.engine.reductions
    gain = project.stage("gain")
    assert gain is not None
    resistor = next(part for part in gain.parts if part.type == "R")
    resistor.value = Quantity.of(resistor.value.si * 1.1)
    context.begin(project, None)
    for stage in project.stages:
        analyses.in_chain_response(stage, project, context)
    assert context.engine.reductions == before + 1
