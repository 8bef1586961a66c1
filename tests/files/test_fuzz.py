"""Hypothesis fuzzes the loader: random JSON, and valid projects mutated at random places.

Whatever the document, loading ends either in a project or in a clean ProjectFileError whose
every problem names a JSON path; never another exception, never a traceback for the user.
"""

from __future__ import annotations

import copy
import json
from pathlib import Path
from typing import Any

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from stagewise.files.project_file import ProjectFileError, loads_project

PROJECTS = Path(__file__).resolve().parents[2] / "projects"
DEMOS = [json.loads((PROJECTS / name).read_text(encoding="utf-8"))
         for name in ("hydrophone.stagewise.json", "greenhouse.stagewise.json")]
# A pre-release (version 0) document, so that mutations also run through the migration.
VERSION_0 = {
    "version": 0, "title": "Old", "drive": "current", "input": {"amplitude": "1u"},
    "chain": [{"id": "pd", "name": "Photodiode", "drive": "current", "ports": {"in": "a", "out": "a"},
               "parts": [{"ref": "C1", "type": "C", "nodes": ["a", "0"], "value": "100p"}]}],
}
DEMOS.append(VERSION_0)

json_scalars = st.one_of(
    st.none(), st.booleans(), st.integers(min_value=-(10**40), max_value=10**40),
    st.floats(allow_nan=False, allow_infinity=False), st.text(max_size=30),
    st.sampled_from(["4k7", "1Meg", "10nF", "-1", "0", "1e999", "nan", "__import__('os').system('x')",
                     "ideal", "0", "in", "out", "R", "opamp", "vcvs", "cccs", "block", "current"]),
)
json_values = st.recursive(
    json_scalars,
    lambda children: st.one_of(st.lists(children, max_size=5),
                               st.dictionaries(st.text(max_size=12), children, max_size=5)),
    max_leaves=25,
)


def _load_cleanly(text: str) -> None:
    try:
        loads_project(text, "fuzz.stagewise.json")
    except ProjectFileError as error:
        assert error.problems, "a refusal must list at least one problem"
        for problem in error.problems:
            assert isinstance(problem, str) and problem.strip()
        assert "Traceback" not in str(error)


# Common practice, no source: a reader of outside input must refuse garbage cleanly.
@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(json_values)
def test_random_json_gives_a_clean_error(document: Any) -> None:
    _load_cleanly(json.dumps(document))


@settings(max_examples=200, deadline=None)
@given(st.binary(max_size=200))
def test_random_bytes_give_a_clean_error(data: bytes) -> None:
    try:
        loads_project(data, "fuzz.stagewise.json")
    except ProjectFileError as error:
        assert error.problems


def _paths(node: Any, prefix: tuple[Any, ...] = ()) -> list[tuple[Any, ...]]:
    found = [prefix]
    if isinstance(node, dict):
        for key, value in node.items():
            found.extend(_paths(value, (*prefix, key)))
    elif isinstance(node, list):
        for index, value in enumerate(node):
            found.extend(_paths(value, (*prefix, index)))
    return found


@st.composite
def mutated_demo(draw: st.DrawFn) -> Any:
    document = copy.deepcopy(draw(st.sampled_from(DEMOS)))
    for _ in range(draw(st.integers(min_value=1, max_value=4))):
        paths = _paths(document)
        path = draw(st.sampled_from(paths[1:]))
        parent = document
        for piece in path[:-1]:
            parent = parent[piece]
        action = draw(st.sampled_from(["replace", "delete", "add-key", "duplicate"]))
        if action == "replace":
            parent[path[-1]] = draw(json_values)
        elif action == "delete":
            del parent[path[-1]]
        elif action == "add-key" and isinstance(parent, dict):
            parent[draw(st.text(min_size=1, max_size=8))] = draw(json_scalars)
        elif action == "duplicate" and isinstance(parent, list):
            parent.append(copy.deepcopy(parent[path[-1]]))
    return document


@settings(max_examples=400, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(mutated_demo())
def test_mutated_demo_gives_a_project_or_a_clean_error(document: Any) -> None:
    _load_cleanly(json.dumps(document, ensure_ascii=False))
