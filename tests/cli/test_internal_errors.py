"""A fault of ours is reported as an internal error, never as if the file were wrong."""

from __future__ import annotations

import argparse
import math
import sys
import types
from pathlib import Path

import pytest

from stagewise import cli

SERIES_R = ('{"format": "stagewise-project", "version": 1, "title": "t", "stages": [{"id": "s", "name": "s", '
            '"ports": {"in": "in", "out": "out"}, "parts": [{"ref": "R1", "type": "R", "nodes": ["in", "out"], '
            '"value": "1k"}]}]}')


def _fake_command(monkeypatch: pytest.MonkeyPatch, run: object) -> None:
    module = types.ModuleType("stagewise.commands.analyze")
    module.run = run  # type: ignore[attr-defined]
    monkeypatch.setitem(sys.modules, "stagewise.commands.analyze", module)


def test_a_math_error_inside_the_program_is_an_internal_error(monkeypatch: pytest.MonkeyPatch, tmp_path: Path,
                                                             capsys: pytest.CaptureFixture[str]) -> None:
    path = tmp_path / "p.stagewise.json"
    path.write_text(SERIES_R, encoding="utf-8")

    def run(args: argparse.Namespace) -> int:
        return int(math.log10(0.0))  # Python's own ValueError("math domain error")

    _fake_command(monkeypatch, run)
    monkeypatch.delenv("STAGEWISE_DEBUG", raising=False)
    assert cli.main(["analyze", str(path), "--json"]) == 2
    err = capsys.readouterr().err
    assert "internal error" in err and "not in your file" in err and "math domain error" in err


def test_our_own_sentence_about_the_input_stays_one_sentence(tmp_path: Path,
                                                            capsys: pytest.CaptureFixture[str]) -> None:
    path = tmp_path / "p.stagewise.json"
    path.write_text(SERIES_R, encoding="utf-8")
    assert cli.main(["response", str(path), "--stage", "x", "--freqs", "1k", "--json"]) == 2
    err = capsys.readouterr().err
    assert "internal error" not in err and 'there is no stage "x"' in err


def test_the_default_stage_of_a_new_project_passes_check(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = tmp_path / "new.stagewise.json"
    path.write_text(SERIES_R, encoding="utf-8")
    assert cli.main(["check", str(path)]) == 0
    assert "no checks in this project" in capsys.readouterr().out
