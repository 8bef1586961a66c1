"""Other outputs of one sampled system (readouts), and the Monte Carlo's progress and cancel hook."""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

import numpy as np
import pytest

import stagewise.engine.spread as spread
from stagewise.engine.analysis import ProjectAnalysis
from stagewise.engine.mna import assemble
from stagewise.engine.spread import Readout, SpreadCancelled, YieldLimit, monte_carlo, place_samples
from stagewise.files.codec import decode
from stagewise.files.project_file import load_project
from stagewise.model.project import Project
from stagewise.review.words import SPREAD_CANCELLED, SPREAD_FOLLOWS

TWO_PI = 2 * math.pi
R1, R2, R3, C3 = 3.3e3, 6.8e3, 12e3, 4.7e-9


def ladder(**settings: Any) -> Project:
    """in —R1— a —R2— out, R3 ∥ C3 from out to 0: two outputs of one circuit."""
    return decode({
        "format": "stagewise-project", "version": 1, "title": "readouts",
        "settings": {"f_min_hz": 10, "f_max_hz": 1e6, "ref_hz": 100, "seed": 3, **settings},
        "stages": [{"id": "s", "name": "ladder", "ports": {"in": "in", "out": "out"}, "parts": [
            {"ref": "R1", "type": "R", "nodes": ["in", "a"], "value": R1, "tol": "5%"},
            {"ref": "R2", "type": "R", "nodes": ["a", "out"], "value": R2, "tol": "2%"},
            {"ref": "R3", "type": "R", "nodes": ["out", "0"], "value": R3, "tol": "1%"},
            {"ref": "C3", "type": "C", "nodes": ["out", "0"], "value": C3, "tol": "10%"},
        ]}],
    })


def node_a_gain(m: np.ndarray, f_hz: float) -> np.ndarray:
    """|V(a)/V(in)| of each sample: R1 in series with R2 + (R3 ∥ C3)."""
    r1, r2, r3, c3 = R1 * m[:, 0], R2 * m[:, 1], R3 * m[:, 2], C3 * m[:, 3]
    z_load = r3 / (1 + 1j * TWO_PI * f_hz * r3 * c3)
    return np.abs((r2 + z_load) / (r1 + r2 + z_load))


def test_a_readout_gives_each_samples_gain_at_another_node() -> None:
    project = ladder(mc_samples=300)
    system = assemble(project.stages[0], project)
    node_a = system.node_index["a"]
    limit = YieldLimit("gain_db", min=-20.0, at_hz=1e4, label="a at 10 kHz")
    result = monte_carlo(system, project, current_drive=False, worst_case=False, phase_margins=False,
                         readouts={"a": Readout(node_a, (limit,))})
    samples = result.readouts["a"]
    m = result.sample_values.multipliers
    assert samples.multipliers is not None and np.array_equal(samples.multipliers, m)  # the same draws
    # Source: voltage divider with impedances R and 1/(jωC) (any circuits text).
    assert np.allclose(10 ** (samples.metric("gain_db", 1e4) / 20), node_a_gain(m, 1e4), rtol=1e-10)
    assert np.allclose(10 ** (samples.gain_db / 20), node_a_gain(m, 100.0), rtol=1e-10)
    # A gain check needs no sweep: the band figures were not evaluated there, and say so.
    assert not samples.band
    with pytest.raises(KeyError, match="not evaluated at this place"):
        samples.metric("f_high_3db_hz")
    # The same stability verdict as the main output (one system, one judgement).
    assert samples.stable is not None and result.sample_values.stable is not None
    assert np.array_equal(samples.stable, result.sample_values.stable)


def test_a_readout_with_a_corner_check_has_its_own_refined_corner() -> None:
    project = ladder(mc_samples=200)
    system = assemble(project.stages[0], project)
    result = monte_carlo(system, project, current_drive=False, worst_case=False, phase_margins=False)
    m = result.sample_values.multipliers
    by_ref = dict(zip(result.parts, m.T, strict=True))
    limit = YieldLimit("f_high_3db_hz", min=1.0, label="out corner")
    places = place_samples(system, project, current_drive=False, multipliers_by_ref=by_ref, samples=200,
                           readouts={"out": Readout(system.output_index, (limit,))})
    corner = places["out"].f_high_3db_hz
    # Source: R1 + R2 feeding R3 ∥ C3 is a first-order low-pass with its pole at
    # (R1 + R2 + R3) / (2π·(R1 + R2)·R3·C3); its −3 dB corner (against the DC gain) is there.
    r12, r3, c3 = (R1 * m[:, 0] + R2 * m[:, 1]), R3 * m[:, 2], C3 * m[:, 3]
    assert np.allclose(corner, (r12 + r3) / (TWO_PI * r12 * r3 * c3), rtol=1e-8)
    assert places["out"].band


def test_a_second_readout_of_the_same_output_finds_the_same_corner_from_the_shared_poles() -> None:
    # The pass band of every readout after the first is found with the first one's poles (one
    # pencil): the corner read there must still be the circuit's.
    project = ladder(mc_samples=150)
    system = assemble(project.stages[0], project)
    limit = YieldLimit("f_high_3db_hz", min=1.0, label="out corner")
    result = monte_carlo(system, project, current_drive=False, worst_case=False, phase_margins=False,
                         readouts={"again": Readout(system.output_index, (limit,))})
    m = result.sample_values.multipliers
    corner = result.readouts["again"].f_high_3db_hz
    # Source: R1 + R2 feeding R3 ∥ C3 is a first-order low-pass with its pole at
    # (R1 + R2 + R3) / (2π·(R1 + R2)·R3·C3); its −3 dB corner (against the DC gain) is there.
    r12, r3, c3 = (R1 * m[:, 0] + R2 * m[:, 1]), R3 * m[:, 2], C3 * m[:, 3]
    assert np.allclose(corner, (r12 + r3) / (TWO_PI * r12 * r3 * c3), rtol=1e-8)


def test_progress_is_monotone_and_reaches_its_total() -> None:
    project = ladder(mc_samples=600)
    system = assemble(project.stages[0], project)
    seen: list[tuple[int, int]] = []

    def progress(done: int, total: int) -> bool:
        seen.append((done, total))
        return False

    result = monte_carlo(system, project, current_drive=False, progress=progress,
                         limits=[YieldLimit("gain_db", min=-20.0, label="gain")])
    assert result.samples == 600
    # Common practice, no source: a progress figure never goes back, never passes its total,
    # and ends complete.
    done = [item[0] for item in seen]
    totals = {item[1] for item in seen}
    assert len(totals) == 1 and len(seen) > 3
    total = totals.pop()
    assert all(later >= earlier for earlier, later in zip(done, done[1:], strict=False))
    assert all(0 <= value <= total for value in done)
    assert done[-1] == total


def test_returning_true_cancels_the_run_between_chunks(monkeypatch: pytest.MonkeyPatch) -> None:
    project = ladder(mc_samples=4000)
    system = assemble(project.stages[0], project)
    solved: list[int] = []
    original = spread._in_chunks

    def counting(count: int, chunk: int, solve_rows: Any, *rest: Any) -> None:
        def counted(start: int, stop: int) -> None:
            solved.append(stop - start)
            solve_rows(start, stop)
        original(count, chunk, counted, *rest)

    monkeypatch.setattr(spread, "_in_chunks", counting)
    calls: list[tuple[int, int]] = []

    def progress(done: int, total: int) -> bool:
        calls.append((done, total))
        return done > 0  # stop at the first chunk counted as done

    with pytest.raises(SpreadCancelled) as raised:
        monte_carlo(system, project, current_drive=False, progress=progress, worst_case=False)
    # Common practice, no source: a cancel stops the loop; no further chunk is started once
    # the callback said stop (the chunks already running on other threads may finish).
    assert raised.value.done == calls[-1][0] < raised.value.total
    assert sum(solved) < 4001  # the sweep of all samples (and the nominal) was not finished


DEMO = Path(__file__).resolve().parents[2] / "projects" / "hydrophone.stagewise.json"


def test_the_project_spread_reports_one_monotone_progress_over_every_place() -> None:
    analysis = ProjectAnalysis(load_project(DEMO))
    seen: list[tuple[int, int]] = []
    analysis.spread_progress = lambda done, total: seen.append((done, total)) or False
    document = analysis.spread
    assert isinstance(document, dict) and document["yield_pct"] is not None
    # Common practice, no source: one figure for the whole run, never going back, ending full.
    done = [item[0] for item in seen]
    assert len({item[1] for item in seen}) == 1
    assert all(later >= earlier for earlier, later in zip(done, done[1:], strict=False))
    assert done[-1] == seen[-1][1] and len(seen) > 10


def test_a_cancelled_project_spread_has_no_yield_and_says_why() -> None:
    analysis = ProjectAnalysis(load_project(DEMO))
    analysis.spread_progress = lambda done, total: done > 0
    # Common practice, no source: a cancelled computation gives no value, with the reason.
    assert analysis.metric_value("yield_pct", "chain", "sensor", None) == (None, SPREAD_CANCELLED)
    deferred = ProjectAnalysis(load_project(DEMO))
    deferred.spread_deferred = SPREAD_FOLLOWS
    assert deferred.metric_value("yield_pct", "chain", "sensor", None) == (None, SPREAD_FOLLOWS)
    assert "spread" not in deferred.__dict__  # nothing of it was computed


def test_a_spread_cancelled_among_the_places_keeps_no_result_of_the_chain() -> None:
    from stagewise.engine.analysis import CHAIN_SHARE

    analysis = ProjectAnalysis(load_project(DEMO))
    # Stop once the chain's run is done and a place of its own is being sampled.
    analysis.spread_progress = lambda done, total: 1000 * CHAIN_SHARE < done < total
    # Common practice, no source: a cancelled computation leaves no part of its result behind.
    assert getattr(analysis.spread, "why", None) == SPREAD_CANCELLED
    assert analysis.spread_result is None


def test_a_place_without_toleranced_parts_counts_every_sample() -> None:
    # Source: voltage divider R2/(R1 + R2) (any circuits text): stage b, 10k over 10k, has no
    # tolerance, so its isolated gain is -6.02 dB in every sample and its check is met by all.
    project = decode({
        "format": "stagewise-project", "version": 1, "title": "one stage without tolerances",
        "settings": {"f_min_hz": 10, "f_max_hz": 1e5, "ref_hz": 100, "seed": 4, "mc_samples": 120},
        "stages": [
            {"id": "a", "name": "toleranced", "ports": {"in": "in", "out": "out"}, "parts": [
                {"ref": "R1", "type": "R", "nodes": ["in", "out"], "value": "2k2", "tol": "5%"},
                {"ref": "R2", "type": "R", "nodes": ["out", "0"], "value": "47k", "tol": "5%"}]},
            {"id": "b", "name": "exact", "ports": {"in": "in", "out": "out"}, "parts": [
                {"ref": "R1", "type": "R", "nodes": ["in", "out"], "value": "10k"},
                {"ref": "R2", "type": "R", "nodes": ["out", "0"], "value": "10k"}],
             "checks": [{"id": "half", "text": "Halves its input", "metric": "gain_db", "where": "isolated",
                         "min": -6.1, "max": -5.9}]},
        ],
    })
    document = ProjectAnalysis(project).spread
    assert isinstance(document, dict)
    assert document["limits"] == [{"label": "b/half", "pass_count": 120, "pass_pct": 100.0}]
    assert document["yield_pct"] == 100.0
