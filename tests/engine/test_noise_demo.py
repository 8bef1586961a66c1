"""The hydrophone demo, whole chain merged: noise budget, loop margins, headroom, converter, spread."""

from __future__ import annotations

import math
from pathlib import Path

import pytest

from stagewise.engine.chain import merged_system
from stagewise.engine.converter import converter_review, converter_to_json
from stagewise.engine.headroom import headroom, headroom_to_json
from stagewise.engine.loops import chain_loops, loops_to_json, stage_loops
from stagewise.engine.noise import analyze_noise, noise_to_json
from stagewise.files.project_file import load_project
from stagewise.model.project import Project

DEMO = Path(__file__).resolve().parents[2] / "projects" / "hydrophone.stagewise.json"


@pytest.fixture(scope="module")
def project() -> Project:
    return load_project(DEMO)


def test_noise_budget_is_set_by_the_front_end(project: Project) -> None:
    merged = merged_system(project)
    result = analyze_noise(merged.system, project, current_drive=merged.current_drive)
    gain_stage = merged.stage_ids.index("gain")
    front = tuple(stage_id + ":" for stage_id in merged.stage_ids[: gain_stage + 1])
    back = tuple(stage_id + ":" for stage_id in merged.stage_ids[gain_stage + 1:])
    # Source: H. T. Friis, "Noise figures of radio receivers", Proc. IRE 32, 419-422 (1944): noise
    # added after a gain stage counts divided by that gain, so the stages up to and including the
    # first gain stage set the budget, and the filters after it add little.
    assert result.sources[0].ref.startswith(front)
    assert sum(source.share_pct for source in result.sources if source.ref.startswith(back)) < 5.0
    # The op-amp after the sensor sees the sensor's bias resistor: a designer expects both the
    # gain stage's op-amp noise and the bias resistor among the top three.
    top = {source.name for source in result.sources[:3]}
    assert "buffer:R1 thermal" in top
    document = noise_to_json(result, project.converter)
    assert document["band_hz"] == [20.0, 5000.0]
    assert {"source", "ref", "kind", "rms_v", "share_pct"} == set(document["top_sources"][0])
    # Common practice, no source: uncorrelated sources add in power.
    assert math.sqrt(sum(s.out_rms_v**2 for s in result.sources)) == pytest.approx(result.out_rms_v, rel=1e-12)
    # The chain's SNR cannot beat the converter's ideal SNR by much while the chain noise is this
    # far above its LSB/√12 (IEEE Std 1241: 6.02·N + 1.76 dB).
    assert document["snr_noise_only_db"] is not None and document["ideal_converter_snr_db"] == pytest.approx(98.08)


def test_every_finite_opamp_has_a_phase_margin_isolated_and_in_chain(project: Project) -> None:
    merged = merged_system(project)
    finite = [opamp.ref for opamp in merged.system.opamps]
    assert len(finite) == 5
    chain = {entry["ref"]: entry for entry in loops_to_json(chain_loops(project))}
    isolated = {}
    for stage in project.active_stages:
        for entry in loops_to_json(stage_loops(stage, project)):
            isolated[f"{stage.id}:{entry['ref']}"] = entry
    for ref in finite:
        for entry in (chain[ref], isolated[ref]):
            # Common practice, no source: a loop for acceptable ringing has >= 45° phase margin.
            assert entry["phase_margin_deg"] is not None and 45.0 <= entry["phase_margin_deg"] < 180.0
            assert entry["crossover_hz"] is not None and entry["crossover_hz"] > 0
    # Common practice, no source: an op-amp output with output resistance driving the next
    # stage's capacitive input gains a pole in its loop, so the buffer loses margin in chain.
    assert chain["buffer:U1"]["phase_margin_deg"] < isolated["buffer:U1"]["phase_margin_deg"]


def test_headroom_and_converter_figures_exist_for_the_demo(project: Project) -> None:
    merged = merged_system(project)
    entries = headroom_to_json(headroom(merged.system, project, current_drive=merged.current_drive))
    assert len(entries) == 5
    for entry in entries:
        assert entry["peak_v"] is not None and entry["swing_margin_v"] is not None
        assert entry["slew_margin"] is not None and entry["slew_margin"] > 1
    noise = analyze_noise(merged.system, project, current_drive=merged.current_drive)
    document = converter_to_json(converter_review(merged.system, project, current_drive=merged.current_drive,
                                                  noise=noise))
    assert document["alias_attenuation_db"] is not None and document["alias_attenuation_db"] > 0
    # Source: IEEE Std 1241, LSB = FSR / 2^N.
    assert document["lsb_v"] == pytest.approx(4.096 / 2**16)
