"""Terminal escape injection: text from a file never reaches the terminal as control characters,
and a newline inside an id cannot forge a line of output."""

from __future__ import annotations

import json
import shutil
from pathlib import Path
from typing import Any

import pytest

from stagewise.cli import main, printable

GREENHOUSE = Path(__file__).resolve().parents[2] / "projects" / "greenhouse.stagewise.json"
# Common practice, no source (ECMA-48): ESC ] 0 ; … BEL sets the window title, ESC [ 2 J clears
# the screen, 0x9b is the one-byte CSI of 8-bit terminals, U+202E reverses the text after it.
TITLE_SET = "\x1b]0;owned\x07"
CLEAR = "\x1b[2J"
FORGED = "all checks met: 18 checks: 18 met, 0 not met"
HOSTILE = f"x{TITLE_SET}{CLEAR}\x9b31m\u202e\r\n{FORGED}"


def _terminal_safe(text: str) -> None:
    assert "\x1b" not in text and "\x9b" not in text and "\x07" not in text and "\r" not in text
    assert "\u202e" not in text
    for line in text.splitlines():
        assert not line.lstrip().startswith(FORGED), f"forged line: {line!r}"


def _hostile_project(tmp_path: Path) -> Path:
    document: dict[str, Any] = json.loads(GREENHOUSE.read_text(encoding="utf-8"))
    document["title"] = "Greenhouse" + HOSTILE
    document["revision"] = "B" + HOSTILE
    stage = document["stages"][1]
    stage["id"] = "tia" + HOSTILE
    stage["name"] = "TIA" + HOSTILE
    stage["notes"] = "note" + HOSTILE
    for check in stage.get("checks", []):
        check["id"] = check["id"] + HOSTILE
        check["text"] = check["text"] + HOSTILE
    for comment in stage.get("comments", []):
        comment["text"] = comment["text"] + HOSTILE
    document.pop("audit", None)
    for item in document["stages"]:
        item.pop("signoffs", None)
        item.pop("comments", None)
    path = tmp_path / "hostile.stagewise.json"
    path.write_text(json.dumps(document, indent=2, ensure_ascii=False) + "\n", encoding="utf-8")
    return path


def test_printable_escapes_every_control_character() -> None:
    # Source: Unicode 15.0, chapter 23 (C0 and C1 controls) and UAX #9 (bidirectional controls).
    assert printable("a\x1b[2Jb") == "a\\x1b[2Jb"
    assert printable("id\nforged") == "id\\nforged"
    assert printable("\x9b\x7f\t\r") == "\\x9b\\x7f\\t\\r"
    assert printable("\u202eevil\u2066") == "\\u202eevil\\u2066"
    assert printable("\ud800") == "\\ud800"
    assert printable("Ω µ 4k7 — ±") == "Ω µ 4k7 — ±"  # ordinary text untouched


@pytest.mark.parametrize("command", [
    ["check"], ["check", "--json"], ["analyze", "--json"], ["verify"],
    ["response", "--freqs", "1k"], ["response", "--freqs", "1k", "--json"],
])  # fmt: skip
def test_every_printer_escapes_text_from_the_file(tmp_path: Path, command: list[str],
                                                  capsys: pytest.CaptureFixture[str]) -> None:
    path = _hostile_project(tmp_path)
    status = main([command[0], str(path), *command[1:]])
    captured = capsys.readouterr()
    assert status in (0, 1), captured.err
    _terminal_safe(captured.out)
    _terminal_safe(captured.err)
    if "--json" in command:
        json.loads(captured.out)  # still the same JSON document


def test_response_of_a_stage_with_a_hostile_id(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = _hostile_project(tmp_path)
    status = main(["response", str(path), "--stage", "tia" + HOSTILE, "--freqs", "1k"])
    captured = capsys.readouterr()
    assert status == 0, captured.err
    _terminal_safe(captured.out)
    assert "tia" in captured.out


def test_diff_escapes_ids_and_texts(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    old = tmp_path / "old.stagewise.json"
    shutil.copyfile(GREENHOUSE, old)
    status = main(["diff", str(old), str(_hostile_project(tmp_path))])
    captured = capsys.readouterr()
    assert status == 1, captured.err
    _terminal_safe(captured.out)


def test_an_unknown_key_with_control_characters_is_one_escaped_sentence(tmp_path: Path,
                                                                         capsys: pytest.CaptureFixture[str]) -> None:
    document = json.loads(GREENHOUSE.read_text(encoding="utf-8"))
    document["stages"][0]["colour" + HOSTILE] = 1
    path = tmp_path / "key.stagewise.json"
    path.write_text(json.dumps(document), encoding="utf-8")
    status = main(["check", str(path)])
    err = capsys.readouterr().err
    assert status == 2 and err.count("\n") == 1 and 'unknown key "colour' in err
    _terminal_safe(err)


def test_card_text_with_control_characters_is_escaped(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    project = tmp_path / "greenhouse.stagewise.json"
    shutil.copyfile(GREENHOUSE, project)
    cards = tmp_path / "bad.cards"
    cards.write_text(f"R1 in out 1k\nQ{TITLE_SET}{CLEAR} a b c\n", encoding="utf-8")
    status = main(["import-cards", str(project), str(cards), "--name", "Bad"])
    err = capsys.readouterr().err
    assert status == 2 and err.count("\n") == 1
    _terminal_safe(err)
