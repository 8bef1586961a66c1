"""The Monte Carlo's cost is bounded: a million samples are reduced with a note, a circuit too
large for any useful number of samples gets no spread and says why; nothing runs for minutes."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

import stagewise.engine.spread as spread
from stagewise.engine.analysis import ProjectAnalysis
from stagewise.files.project_file import loads_project

GREENHOUSE = Path(__file__).resolve().parents[2] / "projects" / "greenhouse.stagewise.json"


def _greenhouse(samples: int) -> ProjectAnalysis:
    document = json.loads(GREENHOUSE.read_text(encoding="utf-8"))
    document["settings"]["mc_samples"] = samples
    return ProjectAnalysis(loads_project(json.dumps(document), "greenhouse.stagewise.json"))


def test_a_million_samples_are_reduced_to_the_bound_with_a_note(monkeypatch: pytest.MonkeyPatch) -> None:
    # Common practice, no source: a long computation is bounded and says what it did instead.
    monkeypatch.setattr(spread, "WORK_BOUND", 3e8)  # keeps the test short; the rule is the same
    result = _greenhouse(1_000_000).spread
    assert isinstance(result, dict), result
    assert spread.MIN_BOUNDED_SAMPLES <= result["samples"] < 1_000_000
    notes = " ".join(result["notes"])
    assert f"{result['samples']} of the 1000000 samples asked" in notes and "settings.mc_samples" in notes


def test_samples_within_the_bound_are_all_drawn() -> None:
    result = _greenhouse(300).spread
    assert isinstance(result, dict) and result["samples"] == 300
    assert not any("samples asked" in note for note in result["notes"])


def test_a_circuit_too_large_for_the_bound_has_no_spread_and_says_why() -> None:
    sections = 100
    parts = []
    for index in range(sections):
        a = "in" if index == 0 else f"n{index}"
        b = "out" if index == sections - 1 else f"n{index + 1}"
        parts.append({"ref": f"R{index + 1}", "type": "R", "nodes": [a, b], "value": "4k7", "tol": "1%"})
        parts.append({"ref": f"C{index + 1}", "type": "C", "nodes": [b, "0"], "value": "2n2", "tol": "5%"})
    document = {"format": "stagewise-project", "version": 1, "title": "Ladder",
                "stages": [{"id": "ladder", "name": "Ladder", "ports": {"in": "in", "out": "out"}, "parts": parts}]}
    result = ProjectAnalysis(loads_project(json.dumps(document), "ladder.stagewise.json")).spread
    why = getattr(result, "why", "")
    assert "the spread is not computed" in why and "200 toleranced terms" in why
