"""Command-line basics (DESIGN section 6): the help lists every subcommand; every bad input gives
exit status 2 and one sentence on stderr naming the file and the JSON path, no traceback; the file
is unchanged and nothing in it is executed."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest

from stagewise import cli
from stagewise.files.project_file import MAX_FILE_BYTES

PROJECTS = Path(__file__).resolve().parents[2] / "projects"
DEMO = PROJECTS / "greenhouse.stagewise.json"
CODE = "__import__('os').system('touch PWNED')"


def _run(capsys: pytest.CaptureFixture[str], *arguments: str) -> tuple[int, str, str]:
    status = cli.main(list(arguments))
    captured = capsys.readouterr()
    return status, captured.out, captured.err


def test_help_lists_every_subcommand(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as caught:
        cli.main(["--help"])
    assert caught.value.code == 0
    out = capsys.readouterr().out
    # Source: DESIGN.md section 6, the command-line contract.
    for name in ("gui", "analyze", "response", "check", "packet", "verify", "diff", "merge", "sign", "import-cards",
                 "measure"):
        assert f"\n    {name}" in out, name
    assert set(cli.SUBCOMMANDS) == {"gui", "analyze", "response", "check", "packet", "verify", "diff", "merge", "sign",
                                    "import-cards", "measure"}


def test_each_subcommand_has_its_own_help(capsys: pytest.CaptureFixture[str]) -> None:
    for name in cli.SUBCOMMANDS:
        with pytest.raises(SystemExit) as caught:
            cli.main([name, "--help"])
        assert caught.value.code == 0
        assert f"usage: stagewise {name}" in capsys.readouterr().out


def test_usage_errors_are_one_sentence_with_status_2(capsys: pytest.CaptureFixture[str]) -> None:
    for arguments in (["check"], ["response", "x.stagewise.json"], ["nonsense-command", "--x"], ["--frobnicate"]):
        with pytest.raises(SystemExit) as caught:
            cli.main(arguments)
        assert caught.value.code == 2
        err = capsys.readouterr().err
        assert err.count("\n") == 1 and err.startswith("stagewise: ") and "Traceback" not in err


# -- bad project files -------------------------------------------------------------------------


def _demo() -> dict[str, Any]:
    document: dict[str, Any] = json.loads(DEMO.read_text(encoding="utf-8"))
    return document


def _edited(change: Callable[[dict[str, Any]], None]) -> bytes:
    document = _demo()
    change(document)
    return (json.dumps(document, indent=2, ensure_ascii=False) + "\n").encode("utf-8")


def _set_part_value(value: Any) -> Callable[[dict[str, Any]], None]:
    def change(document: dict[str, Any]) -> None:
        document["stages"][1]["parts"][1]["value"] = value

    return change


def _set(key: str, value: Any) -> Callable[[dict[str, Any]], None]:
    def change(document: dict[str, Any]) -> None:
        document[key] = value

    return change


def _settings(key: str, value: Any) -> Callable[[dict[str, Any]], None]:
    def change(document: dict[str, Any]) -> None:
        document["settings"][key] = value

    return change


def _part_type(document: dict[str, Any]) -> None:
    document["stages"][2]["parts"][0]["type"] = "transistor"


def _duplicate_ref(document: dict[str, Any]) -> None:
    document["stages"][2]["parts"][1]["ref"] = "R1"


def _missing_model(document: dict[str, Any]) -> None:
    document["stages"][1]["parts"][0]["model"] = "no-such-op-amp"


# (case, file content, what stderr must name)
BAD_FILES: list[tuple[str, bytes, str]] = [
    ("value holding code", _edited(_set_part_value(CODE)), "stages[1].parts[1].value"),
    ("bad value", _edited(_set_part_value("1Mx")), "stages[1].parts[1].value"),
    ("infinite value", _edited(_set_part_value(1e400)), "stages[1].parts[1].value"),
    ("unknown key", _edited(_set("colour", "green")), 'unknown key "colour"'),
    ("newer version", _edited(_set("version", 2)), "version: the file is format version 2"),
    ("unknown part type", _edited(_part_type), "stages[2].parts[0].type"),
    ("duplicate ref", _edited(_duplicate_ref), "stages[2].parts[1].ref"),
    ("missing op-amp model", _edited(_missing_model), "stages[1].parts[0].model"),
    ("f_min above f_max", _edited(_settings("f_min_hz", "20M")), "settings.f_min_hz"),
    ("below absolute zero", _edited(_settings("temperature_c", -300)), "settings.temperature_c"),
    ("not JSON", b'{"format": "stagewise-project",', "not valid JSON at line 1"),
    ("not UTF-8", b"\xff\xfe\x00{", "not UTF-8"),
    ("NaN", b'{"format": "stagewise-project", "version": 1, "title": NaN, "stages": []}', "title: NaN is not allowed"),
]

# Every subcommand that reads FILE, with the rest of its arguments ({file}, {other} filled in).
READERS = [
    ["check", "{file}"],
    ["verify", "{file}"],
    ["packet", "{file}", "-o", "{other}.pdf"],
    ["diff", "{file}", str(DEMO)],
    ["import-cards", "{file}", "{other}.cards", "--name", "Extra"],
    ["analyze", "{file}", "--json"],
    ["response", "{file}", "--freqs", "10,1k", "--json"],
]


def _one_sentence(err: str) -> str:
    assert err.endswith("\n") and err.count("\n") == 1, f"not one line: {err!r}"
    assert err.startswith("stagewise: ")
    assert "Traceback" not in err and 'File "' not in err
    return err


@pytest.mark.parametrize(("case", "content", "named"), BAD_FILES, ids=[case[0] for case in BAD_FILES])
def test_bad_file_is_refused_by_every_reader(tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch:
                                             pytest.MonkeyPatch, case: str, content: bytes, named: str) -> None:
    monkeypatch.chdir(tmp_path)
    path = tmp_path / "bad.stagewise.json"
    path.write_bytes(content)
    (tmp_path / "other.cards").write_text("R9 in out 1k\nR10 out 0 1k\n", encoding="utf-8")
    before = sorted(os.listdir(tmp_path))
    for template in READERS:
        arguments = [piece.format(file=path, other=tmp_path / "other") for piece in template]
        status, out, err = _run(capsys, *arguments)
        assert status == 2, (case, template[0], err)
        _one_sentence(err)
        assert out == ""
        if "not available yet" in err:
            continue  # the command has not landed in this build; it refuses before reading anything
        assert str(path) in err and named in err, (template[0], err)
        assert path.read_bytes() == content, template[0]
        assert sorted(os.listdir(tmp_path)) == before, template[0]
    assert not (tmp_path / "PWNED").exists()


def test_missing_and_oversized_files(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    status, _, err = _run(capsys, "check", str(tmp_path / "absent.stagewise.json"))
    assert status == 2 and "absent.stagewise.json: no such file" in _one_sentence(err)
    huge = tmp_path / "huge.stagewise.json"
    with huge.open("wb") as stream:
        stream.truncate(MAX_FILE_BYTES + 1)
    status, _, err = _run(capsys, "check", str(huge))
    assert status == 2 and "over 20 MiB (20,971,520 bytes) are refused" in _one_sentence(err)
    status, _, err = _run(capsys, "verify", str(tmp_path))
    assert status == 2 and "folder" in _one_sentence(err)


def test_several_problems_are_reported_in_one_sentence(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    def two(document: dict[str, Any]) -> None:
        _set_part_value("1Mx")(document)
        document["colour"] = "green"

    path = tmp_path / "two.stagewise.json"
    path.write_bytes(_edited(two))
    status, _, err = _run(capsys, "check", str(path))
    assert status == 2
    line = _one_sentence(err)
    assert "2 problems" in line and "stages[1].parts[1].value" in line and 'unknown key "colour"' in line


def test_an_internal_fault_is_one_sentence_too(capsys: pytest.CaptureFixture[str], monkeypatch:
                                               pytest.MonkeyPatch) -> None:
    import stagewise.commands.verify as verify

    def broken(args: object) -> int:
        raise KeyError("surprise")

    monkeypatch.setattr(verify, "run", broken)
    monkeypatch.delenv("STAGEWISE_DEBUG", raising=False)
    status, _, err = _run(capsys, "verify", "x.stagewise.json")
    assert status == 2 and "internal error" in _one_sentence(err)


def test_code_in_a_value_through_the_installed_program(tmp_path: Path) -> None:
    # The real entry point in a fresh interpreter: exit 2, one sentence, nothing executed.
    path = tmp_path / "bad.stagewise.json"
    content = _edited(_set_part_value(CODE))
    path.write_bytes(content)
    result = subprocess.run([sys.executable, "-m", "stagewise", "check", str(path)], cwd=tmp_path,
                            capture_output=True, text=True, timeout=120, check=False)
    assert result.returncode == 2
    assert "stages[1].parts[1].value" in _one_sentence(result.stderr)
    assert result.stdout == ""
    assert path.read_bytes() == content
    assert not (tmp_path / "PWNED").exists()
    assert sorted(os.listdir(tmp_path)) == ["bad.stagewise.json"]


# -- shared helpers of the subcommands ---------------------------------------------------------


def test_parse_frequencies() -> None:
    from stagewise.commands.common import parse_frequencies

    # Source: BIPM SI Brochure, 9th ed., table 7 (prefixes k, M).
    assert parse_frequencies("10,1k, 20k,1.5MHz") == [10.0, 1000.0, 20000.0, 1.5e6]
    for bad, words in (("", "separated by commas"), ("10,,20", "separated by commas"), ("10,abc", "entry 2"),
                       ("0", "above 0 Hz"), ("-5", "above 0 Hz"), (CODE, "entry 1")):
        with pytest.raises(cli.CommandError, match=words):
            parse_frequencies(bad)


def test_stage_by_id_lists_the_stages() -> None:
    from stagewise.commands.common import load, stage_by_id

    project = load(str(DEMO))
    assert stage_by_id(project, "tia").id == "tia"
    with pytest.raises(cli.CommandError, match="diode, tia, gain, lpf, adc"):
        stage_by_id(project, "nope")
