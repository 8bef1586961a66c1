"""Hypothesis fuzzes the loader: random JSON, and valid projects mutated at random places.

Whatever the document, loading ends either in a project or in a clean ProjectFileError whose
every problem names a JSON path; never another exception, never a traceback for the user.
Whatever a command writes loads again, and text from a file never reaches the terminal as
control characters.
"""

from __future__ import annotations

import copy
import json
from pathlib import Path
from typing import Any

import pytest
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


# -- write then load: anything a command writes loads again ------------------------------------

# Text as a hostile file or user gives it: control characters, bidirectional controls, lone
# surrogates, long unbroken words, newlines.
hostile_text = st.text(
    alphabet=st.one_of(st.characters(codec="utf-8"), st.sampled_from(["\x1b", "\x9b", "\n", "\r", "\x07", "\u202e",
                                                                     "\ud800", "\x00", "\t"])),
    max_size=40,
)


def _text_paths(node: Any, prefix: tuple[Any, ...] = ()) -> list[tuple[Any, ...]]:
    """Paths of every string value (not keys) in a document."""
    if isinstance(node, str):
        return [prefix]
    found: list[tuple[Any, ...]] = []
    if isinstance(node, dict):
        for key, value in node.items():
            found.extend(_text_paths(value, (*prefix, key)))
    elif isinstance(node, list):
        for index, value in enumerate(node):
            found.extend(_text_paths(value, (*prefix, index)))
    return found


def _set(document: Any, path: tuple[Any, ...], value: Any) -> None:
    for piece in path[:-1]:
        document = document[piece]
    document[path[-1]] = value


@st.composite
def demo_with_hostile_text(draw: st.DrawFn) -> Any:
    document = copy.deepcopy(draw(st.sampled_from(DEMOS[:2])))
    paths = _text_paths(document)
    for _ in range(draw(st.integers(min_value=1, max_value=4))):
        path = draw(st.sampled_from(paths))
        _set(document, path, draw(hostile_text))
    return document


def _save_then_load(project: Any, folder: Path) -> None:
    """Save; the saved file must load again (or nothing is written and SaveRefused says why)."""
    from stagewise.files.codec import dumps
    from stagewise.files.project_file import SaveRefused, load_project, save_project

    target = folder / "written.stagewise.json"
    target.unlink(missing_ok=True)
    try:
        save_project(target, project)
    except SaveRefused as error:
        assert error.problems and "\n" not in str(error)
        assert not target.exists()
        return
    again = load_project(target)
    assert dumps(again) == target.read_text(encoding="utf-8")


# Common practice, no source: a program must never write a file its own reader refuses.
@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow,
                                                                  HealthCheck.function_scoped_fixture])
@given(document=mutated_demo(), title=hostile_text, detail=st.dictionaries(st.text(max_size=8), json_scalars,
                                                                              max_size=3))
def test_anything_a_command_writes_loads_again(tmp_path: Path, document: Any, title: str,
                                               detail: dict[str, Any]) -> None:
    from stagewise.review.audit import append_event

    try:
        project = loads_project(json.dumps(document, ensure_ascii=False), "fuzz.stagewise.json")
    except ProjectFileError:
        return
    _save_then_load(project, tmp_path)
    # What commands add: an audit event with a detail, a title typed by a user.
    try:
        append_event(project, "fuzz", "comment", detail)
    except ValueError:
        pass  # refused before anything changed (e.g. a detail that is not finite)
    project.title = title
    _save_then_load(project, tmp_path)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow,
                                                                 HealthCheck.function_scoped_fixture])
@given(document=demo_with_hostile_text())
def test_control_characters_in_any_text_field_never_reach_the_terminal(
        tmp_path: Path, document: Any, capsys: pytest.CaptureFixture[str]) -> None:
    from stagewise.cli import main

    path = tmp_path / "hostile.stagewise.json"
    path.write_text(json.dumps(document), encoding="utf-8")  # \u escapes: a lone surrogate survives as JSON
    other = tmp_path / "other.stagewise.json"
    other.write_text(json.dumps(DEMOS[0], ensure_ascii=False), encoding="utf-8")
    for command in (["verify", str(path)], ["diff", str(other), str(path)]):
        main(command)
        captured = capsys.readouterr()
        for stream in (captured.out, captured.err):
            for character in ("\x1b", "\x9b", "\x07", "\r", "\x00", "\u202e", "\ud800"):
                assert character not in stream
        assert captured.err.count("\n") <= 1  # an error is one line
