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


def test_from_input_column_overlays_the_chain_seen_from_its_drive(window) -> None:  # type: ignore[no-untyped-def]
    # Common practice, no source: the chain's drive to a stage's output is the product of the stages
    # before it as they sit, so the trace of the last stage seen from the input is the whole chain;
    # the middle stage's trace is checked against the engine's cascade at the same frequencies.
    from PySide6.QtCore import Qt

    from stagewise.engine.analysis import response_points
    from stagewise.ui.chain_tree import COLUMN_FROM_INPUT
    from stagewise.ui.overlays import FROM_INPUT

    item = window.tree._stage_items["amp"]
    item.setCheckState(COLUMN_FROM_INPUT, Qt.CheckState.Checked)  # widget → selection
    assert window.overlays.stage_shown("amp", FROM_INPUT)
    window.overlays.set_stage("adc", FROM_INPUT, True)  # selection → widget
    assert window.tree._stage_items["adc"].checkState(COLUMN_FROM_INPUT) == Qt.CheckState.Checked
    assert window.wait_until_idle(60, formula=False)
    window.response_view.refresh()
    drawn = window.response_view.trace_data("amp:from_input")
    assert drawn is not None
    f_hz, mag_db, _ = drawn
    project = window.document.project
    unit, values, why = response_points(project, list(f_hz[::40]), "amp", from_input=True)
    assert why is None and values is not None
    np.testing.assert_allclose(mag_db[::40], 20 * np.log10(np.abs(values)), atol=1e-9)
    last = window.response_view.trace_data("adc:from_input")
    chain = window.response_view.trace_data("chain")
    assert last is not None and chain is not None
    np.testing.assert_allclose(last[1], chain[1], atol=1e-9)


def test_review_panel_names_the_reference_beside_a_corner(qtbot, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    # Common practice, no source: a corner is read against a stated reference; the greenhouse demo's
    # Sallen-Key low-pass (unity gain, DC gain 1 = 0 dB) has its corner check shown "re DC gain 0.00 dB".
    import shutil

    from conftest import make_window

    path = tmp_path / "greenhouse.stagewise.json"
    shutil.copyfile(GREENHOUSE, path)
    window = make_window(qtbot, path)
    try:
        window.document.set_current_stage("lpf")
        assert window.wait_until_idle(60, formula=False)
        table = window.review_panel.checks
        rows = {table.item(row, 0).text(): row for row in range(table.rowCount())}
        assert "re DC gain 0.00 dB" in table.item(rows["corner"], 3).text()
        assert "re DC gain 0.00 dB" in table.item(rows["peak"], 3).text()
        assert "re " not in table.item(rows["pm"], 3).text()  # a phase margin has no pass-band reference
    finally:
        window.shutdown()


def test_the_spread_summary_names_the_reference_of_its_corner_range() -> None:
    # Common practice, no source: a low-pass corner is 3 dB below its DC gain; the greenhouse chain
    # is a transimpedance low-pass, so the words name its DC gain in dBΩ beside the corner range.
    project = load_project(GREENHOUSE)
    context = analyses.Context()
    context.begin(project, None)
    summary = analyses.chain_spread(project, context).summary
    assert "Upper corner" in summary and "against its own pass-band gain; nominal re DC gain" in summary
    assert "dBΩ" in summary
