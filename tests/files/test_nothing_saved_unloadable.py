"""Nothing is saved that cannot be loaded again; numbers the loader cannot hold are refused with
their JSON path.

Each case once produced a file that no command could open, or a message without a path.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from stagewise.cli import main
from stagewise.files.project_file import (
    MAX_FILE_BYTES,
    ProjectFileError,
    SaveRefused,
    load_project,
    loads_project,
    save_project,
)

# A one-stage project of our own choosing.
DOCUMENT = {
    "format": "stagewise-project", "version": 1, "title": "Save test",
    "stages": [{"id": "div", "name": "Divider", "ports": {"in": "in", "out": "out"},
                "parts": [{"ref": "R1", "type": "R", "nodes": ["in", "out"], "value": "10k"},
                          {"ref": "R2", "type": "R", "nodes": ["out", "0"], "value": "22k"}]}],
}  # fmt: skip


@pytest.fixture
def project(tmp_path: Path) -> Path:
    path = tmp_path / "chain.stagewise.json"
    path.write_text(json.dumps(DOCUMENT, indent=2) + "\n", encoding="utf-8")
    return path


def _import(project: Path, cards_text: str, name: str, capsys: pytest.CaptureFixture[str]) -> tuple[int, str]:
    cards = project.with_name("new.cards")
    cards.write_text(cards_text, encoding="utf-8")
    status = main(["import-cards", str(project), str(cards), "--name", name, "--by", "Tomas Berg"])
    return status, capsys.readouterr().err


def _one_sentence(err: str) -> str:
    assert err.endswith("\n") and err.count("\n") == 1, f"not one line: {err!r}"
    assert "Traceback" not in err
    return err


# Common practice, no source: a writer must never leave a file its own reader refuses.
def test_a_stage_name_over_the_length_limit_is_refused_before_writing(project: Path,
                                                                       capsys: pytest.CaptureFixture[str]) -> None:
    before = project.read_bytes()
    status, err = _import(project, "R9 in out 1k\nR8 out 0 1k\n", "N" * 300, capsys)
    assert status == 2 and "stages[1].name" in _one_sentence(err) and "not saved" in err
    assert project.read_bytes() == before and not project.with_name(project.name + ".bak").exists()
    load_project(project)


def test_a_card_ref_over_the_length_limit_is_refused_before_writing(project: Path,
                                                                     capsys: pytest.CaptureFixture[str]) -> None:
    before = project.read_bytes()
    status, err = _import(project, f"R{'9' * 300} in out 1k\nR8 out 0 1k\n", "Long ref", capsys)
    assert status == 2 and "stages[1].parts[0].ref" in _one_sentence(err)
    assert project.read_bytes() == before


def test_a_project_just_under_the_size_limit_pushed_over_is_refused(project: Path,
                                                                     capsys: pytest.CaptureFixture[str]) -> None:
    document = json.loads(project.read_text(encoding="utf-8"))
    text = json.dumps(document, indent=2) + "\n"
    document["stages"][0]["notes"] = "x" * (MAX_FILE_BYTES - len(text) - 200)
    project.write_text(json.dumps(document, indent=2) + "\n", encoding="utf-8")
    load_project(project)  # just under the limit: it loads
    before = project.read_bytes()
    status, err = _import(project, "R9 in out 1k\n" + "".join(f"R{i} out 0 1k\n" for i in range(10, 40)),
                          "Pushes it over", capsys)
    assert status == 2 and "20 MiB" in _one_sentence(err) and "not saved" in err
    assert project.read_bytes() == before


@pytest.mark.parametrize("number", ["1e400", "-1e400", "1E+999"])
def test_an_overflowing_number_is_refused_with_its_path(number: str) -> None:
    # Source: IEEE 754-2019, 3.6: the largest finite binary64 number is about 1.8e308.
    document = json.loads(json.dumps(DOCUMENT))
    document["audit"] = [{"seq": 1, "time": "2026-11-02T10:00:00Z", "who": "x", "what": "comment",
                          "detail": {"level": "__N__"}, "prev": "0" * 64, "hash": "0" * 64}]
    text = json.dumps(document).replace('"__N__"', number)
    with pytest.raises(ProjectFileError) as caught:
        loads_project(text, "over.stagewise.json")
    assert caught.value.problems == [f"audit[0].detail.level: {number} is beyond the range of a double "
                                     "(about ±1.8e308); write a finite number"]


def test_a_5000_digit_integer_is_refused_with_its_path_not_pythons_message() -> None:
    text = json.dumps(DOCUMENT).replace('"10k"', "9" * 5000)
    with pytest.raises(ProjectFileError) as caught:
        loads_project(text, "digits.stagewise.json")
    message = str(caught.value)
    assert "stages[0].parts[0].value: an integer of 5000 digits is too large" in message
    assert "sys.set_int_max_str_digits" not in message and "Exceeds the limit" not in message


def test_the_saver_never_writes_a_non_finite_number(project: Path) -> None:
    loaded = load_project(project)
    from stagewise.review.audit import append_event

    event = append_event(loaded, "Tomas Berg", "comment", {"level": 1.0})
    event.detail["level"] = float("inf")  # as a value read from a file as infinity once was
    before = project.read_bytes()
    with pytest.raises(SaveRefused) as caught:
        save_project(project, loaded)
    message = str(caught.value)
    assert "audit[0].detail.level" in message and "not finite" in message and "\n" not in message
    assert project.read_bytes() == before


def test_a_lone_surrogate_in_a_title_is_refused_with_its_path(project: Path, tmp_path: Path,
                                                              capsys: pytest.CaptureFixture[str]) -> None:
    text = project.read_text(encoding="utf-8").replace('"Save test"', '"Save \\ud800 test"')
    project.write_text(text, encoding="utf-8")
    output = tmp_path / "packet.pdf"
    for command in (["check", str(project)], ["analyze", str(project), "--json"],
                    ["packet", str(project), "-o", str(output)]):
        status = main(command)
        err = capsys.readouterr().err
        assert status == 2 and "title: the text holds \\ud800" in _one_sentence(err)
    assert not output.exists()  # nothing written before failing
    assert project.read_text(encoding="utf-8") == text


def test_a_saved_project_with_a_lone_surrogate_is_refused(project: Path) -> None:
    loaded = load_project(project)
    loaded.title = "Save \ud800 test"
    before = project.read_bytes()
    with pytest.raises(SaveRefused, match="not saved"):
        save_project(project, loaded)
    assert project.read_bytes() == before


@pytest.mark.parametrize(("version", "shown"), [("true", "true"), ("1.0", "1.0")])
def test_version_must_be_the_integer_one(version: str, shown: str) -> None:
    # Source: DESIGN section 5, the file format names version 1 (a JSON integer).
    text = json.dumps(DOCUMENT).replace('"version": 1', f'"version": {version}')
    with pytest.raises(ProjectFileError) as caught:
        loads_project(text, "v.stagewise.json")
    assert caught.value.problems == [f"version: {shown} is not version 1; write the whole number 1"]


def test_an_empty_node_list_is_called_empty() -> None:
    document = json.loads(json.dumps(DOCUMENT))
    document["stages"][0]["parts"][0]["nodes"] = []
    with pytest.raises(ProjectFileError) as caught:
        loads_project(json.dumps(document), "n.stagewise.json")
    assert "stages[0].parts[0].nodes: expected a list of node names, found an empty list" in str(caught.value)


def test_nesting_800_deep_is_one_sentence_with_a_path() -> None:
    document = json.loads(json.dumps(DOCUMENT))
    deep: object = 1
    for _ in range(800):
        deep = [deep]
    document["stages"][0]["notes"] = deep
    with pytest.raises(ProjectFileError) as caught:
        loads_project(json.dumps(document), "deep.stagewise.json")
    assert caught.value.problems[0].startswith("stages[0].notes[0]")
    assert "nested too deeply" in str(caught.value)
    # The same in a pre-release (version 0) file, which goes through the migration's copy.
    document["version"] = 0
    document.pop("format")
    with pytest.raises(ProjectFileError, match="nested too deeply"):
        loads_project(json.dumps(document), "deep.stagewise.json")
