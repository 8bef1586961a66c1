"""Stage fingerprints: blind to prose and formatting, sensitive to anything that decides behaviour."""

from __future__ import annotations

import json
from collections.abc import Callable
from typing import Any

import pytest
from review_helpers import base_document, project_from

from stagewise.files.project_file import loads_project
from stagewise.model.fingerprint import stage_fingerprint
from stagewise.model.project import Project


def _prints(project: Project) -> dict[str, str]:
    return {stage.id: stage_fingerprint(stage, project) for stage in project.stages}


BASE = _prints(project_from(base_document()))


def test_fingerprint_is_a_sha256_hex_digest() -> None:
    # Source: FIPS 180-4, SHA-256 digests are 256 bits (64 hexadecimal digits).
    assert all(len(value) == 64 and int(value, 16) >= 0 for value in BASE.values())
    assert BASE["rc"] != BASE["buf"]


def test_reformatting_and_key_order_do_not_change_it() -> None:
    document = base_document()
    text = json.dumps(document, indent=7, sort_keys=True)
    assert _prints(loads_project(text)) == BASE
    compact = json.dumps(document, separators=(",", ":"))
    assert _prints(loads_project(compact)) == BASE


def _edit(change: Callable[[dict[str, Any]], None]) -> dict[str, str]:
    document = base_document()
    change(document)
    return _prints(project_from(document))


def _set(path: list[Any], value: Any) -> Callable[[dict[str, Any]], None]:
    def change(document: dict[str, Any]) -> None:
        target: Any = document
        for key in path[:-1]:
            target = target[key]
        target[path[-1]] = value
    return change


PROSE_EDITS = {
    "stage name": _set(["stages", 0, "name"], "Input RC filter"),
    "notes": _set(["stages", 0, "notes"], "moved closer to the connector"),
    "check text": _set(["stages", 0, "checks", 0, "text"], "Corner frequency high enough"),
    "comment": _set(["stages", 0, "comments"], [{"author": "Ana", "time": "2026-11-02T08:00:00Z",
                                                 "text": "why 3k3?", "resolved": False}]),
    "sign-off": _set(["stages", 0, "signoffs"], [{"name": "Ana", "role": "lead", "verdict": "accept", "note": "",
                                                  "time": "2026-11-02T08:00:00Z", "fingerprint": "0" * 64}]),
    "manual answer": _set(["stages", 0, "checks", 2, "answer"], {"answer": "yes", "by": "Ana",
                                                                 "time": "2026-11-02T08:00:00Z"}),
    "waiver": _set(["stages", 0, "checks", 0, "waiver"], {"by": "Ana", "time": "2026-11-02T08:00:00Z",
                                                          "justification": "corner set by the next stage"}),
    "value typed another way": _set(["stages", 0, "parts", 0, "value"], 3300),
    "value with prefix and unit": _set(["stages", 0, "parts", 1, "value"], "4.7nF"),
    "title": _set(["title"], "Another title"),
    "model not used by the stage": _set(["opamp_models", "unused-1M", "gbw_hz"], "2M"),
    "parts listed in another order": lambda document: document["stages"][0]["parts"].reverse(),
    "checks listed in another order": lambda document: document["stages"][0]["checks"].reverse(),
}


@pytest.mark.parametrize("name", sorted(PROSE_EDITS))
def test_prose_and_records_do_not_change_it(name: str) -> None:
    # Common practice, no source: a sign-off binds to the design, not to its description (DESIGN 4).
    assert _edit(PROSE_EDITS[name]) == BASE


BEHAVIOUR_EDITS = {
    "resistor value": (_set(["stages", 0, "parts", 0, "value"], "3k6"), "rc"),
    "capacitor tolerance": (_set(["stages", 0, "parts", 1, "tol"], "10%"), "rc"),
    "node": (_set(["stages", 0, "parts", 1, "nodes"], ["in", "0"]), "rc"),
    "port": (_set(["stages", 0, "ports"], {"in": "in", "out": "in"}), "rc"),
    "op-amp model parameter": (_set(["opamp_models", "test-5M", "gbw_hz"], "6M"), "buf"),
    "op-amp output resistance": (_set(["opamp_models", "test-5M", "rout_ohm"], 45), "buf"),
    "op-amp model choice": (_set(["stages", 1, "parts", 1, "model"], "ideal"), "buf"),
    "check minimum": (_set(["stages", 0, "checks", 0, "min"], "9k5"), "rc"),
    "check maximum": (_set(["stages", 0, "checks", 1, "max"], 0.1), "rc"),
    "check frequency": (_set(["stages", 0, "checks", 1, "at_hz"], 200), "rc"),
    "check metric": (_set(["stages", 1, "checks", 0, "metric"], "gain_margin_db"), "buf"),
    "stage drive": (_set(["stages", 0, "drive"], "current"), "rc"),
}


@pytest.mark.parametrize("name", sorted(BEHAVIOUR_EDITS))
def test_behaviour_changes_change_only_that_stage(name: str) -> None:
    change, stage_id = BEHAVIOUR_EDITS[name]
    after = _edit(change)
    assert after[stage_id] != BASE[stage_id]
    others = {key for key in BASE if key != stage_id}
    assert all(after[key] == BASE[key] for key in others)
