"""What the command line writes: help texts, tables for people, a reader that stops early."""

from __future__ import annotations

import cmath
import json
import math
import os
import subprocess
import sys
from pathlib import Path
from typing import Any

import pytest

from stagewise import cli
from stagewise.files.project_file import load_project

PROJECTS = Path(__file__).resolve().parents[2] / "projects"
DEMO = PROJECTS / "hydrophone.stagewise.json"

# A two-stage project of our own: an RC low-pass (1 kΩ, 100 nF) then an ideal follower.
DOCUMENT: dict[str, Any] = {
    "format": "stagewise-project", "version": 1, "title": "CLI output", "revision": "1",
    "settings": {"f_min_hz": 1, "f_max_hz": "1M", "points_per_decade": 20, "ref_hz": 100},
    "stages": [
        {"id": "rc", "name": "RC", "ports": {"in": "in", "out": "out"},
         "parts": [{"ref": "R1", "type": "R", "nodes": ["in", "out"], "value": "1k"},
                   {"ref": "C1", "type": "C", "nodes": ["out", "0"], "value": "100n"}]},
        {"id": "buf", "name": "Follower", "ports": {"in": "in", "out": "out"},
         "parts": [{"ref": "U1", "type": "opamp", "nodes": ["in", "out", "out"], "model": "ideal"},
                   {"ref": "R1", "type": "R", "nodes": ["in", "0"], "value": "1M"}]},
    ],
}  # fmt: skip


@pytest.fixture
def project_file(tmp_path: Path) -> Path:
    path = tmp_path / "two.stagewise.json"
    path.write_text(json.dumps(DOCUMENT, indent=2) + "\n", encoding="utf-8")
    return path


def test_every_command_help_says_what_it_writes_and_its_exit_statuses(capsys: pytest.CaptureFixture[str]) -> None:
    for name in cli.SUBCOMMANDS:
        with pytest.raises(SystemExit):
            cli.main([name, "--help"])
        out = capsys.readouterr().out
        assert "writes:" in out and "exit status:" in out, name
        assert "2 " in out.split("exit status:", 1)[1], name  # the unreadable-file status is given
    with pytest.raises(SystemExit):
        cli.main(["packet", "--help"])
    out = " ".join(capsys.readouterr().out.split())
    assert "into OUT.pdf" in out and "audit trail" in out and "FILE.bak" in out


def test_import_cards_help_documents_the_card_syntax_with_an_example(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit):
        cli.main(["import-cards", "--help"])
    out = capsys.readouterr().out
    for words in ("MEG 1e6", "M 1e-3", "; comment", "example", "stagewise import-cards", "--after"):
        assert words in out, words


def test_response_prints_a_table_without_json(project_file: Path, capsys: pytest.CaptureFixture[str]) -> None:
    status = cli.main(["response", str(project_file), "--freqs", "100,1591.55,10k"])
    out = capsys.readouterr().out
    assert status == 0
    with pytest.raises(json.JSONDecodeError):
        json.loads(out)
    lines = out.splitlines()
    assert lines[0].endswith("chain (V/V)")
    assert lines[1].split() == ["frequency", "magnitude", "(dB)", "phase", "(°)", "real", "imaginary"]
    rows = [line.split() for line in lines[2:]]
    assert len(rows) == 3
    for row, f_hz in zip(rows, (100.0, 1591.55, 10e3), strict=True):
        # Source: voltage divider of R and Z = R_bias ∥ 1/(jωC) (Laplace impedances, any circuits
        # text): the follower's 1 MΩ bias resistor loads the RC; the ideal follower copies it.
        z = 1e6 / (1 + 2j * math.pi * f_hz * 1e6 * 100e-9)
        expected = z / (1e3 + z)
        assert float(row[2]) == pytest.approx(20 * math.log10(abs(expected)), abs=5e-4)
        assert float(row[3]) == pytest.approx(math.degrees(cmath.phase(expected)), abs=5e-3)
        assert float(row[4]) == pytest.approx(expected.real, rel=1e-5)
    assert cli.main(["response", str(project_file), "--freqs", "100", "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["points"][0]["f_hz"] == 100


def test_a_reader_that_stops_early_is_not_an_error() -> None:
    environment = {**os.environ, "QT_QPA_PLATFORM": "offscreen"}
    # The reader is gone before anything is written: every write meets a closed pipe.
    process = subprocess.Popen([sys.executable, "-m", "stagewise", "analyze", str(DEMO), "--json"],
                               stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=environment)
    assert process.stdout is not None and process.stderr is not None
    process.stdout.close()
    error = process.stderr.read()
    assert process.wait(timeout=120) == 0
    assert error == b""
    # As a user types it.
    result = subprocess.run(f'"{sys.executable}" -m stagewise analyze "{DEMO}" --json | head -1', shell=True,
                            capture_output=True, text=True, env=environment, timeout=120)
    assert result.stdout == "{\n" and result.stderr == ""


CARDS = """\
; a follower stage typed in the netlist convention, values of our own choosing
R1  in  a   1MEG   ; input bias resistor
C1  a   0   10N    ; filter capacitor
L1  a   b   1M     ; one millihenry
U1  b   out out ideal
"""


def test_import_cards_reads_the_netlist_convention_and_places_the_stage(project_file: Path, tmp_path: Path,
                                                                      capsys: pytest.CaptureFixture[str]) -> None:
    cards = tmp_path / "deck.cir"
    cards.write_text(CARDS, encoding="utf-8")
    assert cli.main(["import-cards", str(project_file), str(cards), "--name", "Deck", "--after", "rc",
                     "--by", "Ines Okafor"]) == 0
    out = capsys.readouterr().out
    assert 'L1 "1M" is read as milli (1m)' in out and "after stage rc (stage 2 of 3)" in out
    project = load_project(project_file)
    assert [stage.id for stage in project.stages] == ["rc", "deck", "buf"]
    deck = project.stage("deck")
    assert deck is not None
    values = {part.ref: part.value for part in deck.parts if part.value is not None}
    # Common practice, no source (value from memory): MEG mega, N nano, M milli in netlist cards.
    assert values["R1"].si == pytest.approx(1e6) and values["C1"].si == pytest.approx(10e-9)
    assert values["L1"].si == pytest.approx(1e-3)
    # Stored in the project file's notation, where M is mega and m milli.
    assert (values["R1"].raw, values["C1"].raw, values["L1"].raw) == ("1M", "10n", "1m")
    assert cli.main(["import-cards", str(project_file), str(cards), "--name", "First", "--before", "rc"]) == 0
    capsys.readouterr()
    assert [stage.id for stage in load_project(project_file).stages] == ["first", "rc", "deck", "buf"]
    before = project_file.read_bytes()
    assert cli.main(["import-cards", str(project_file), str(cards), "--name", "X", "--after", "nope"]) == 2
    assert 'there is no stage "nope"' in capsys.readouterr().err
    assert project_file.read_bytes() == before


def test_response_in_chain_above_the_size_limit_says_why_its_stability_is_unknown(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    from stagewise.engine.stage import MODEL_MAX_UNKNOWNS
    from stagewise.files.project_file import save_project
    from stagewise.model.project import OpampModel, Part, Project, Stage
    from stagewise.model.values import Quantity

    # Our own chain: RC sections (2k2, 1n) each buffered by a finite op-amp, long enough that a
    # stage in chain (with the rest of the chain as its load) is above the pole analysis's limit.
    model = OpampModel(a0_db=Quantity.of(100), gbw_hz=Quantity.of("8M"), rout_ohm=Quantity.of(50))
    count = MODEL_MAX_UNKNOWNS // 3 + 6
    stages = [Stage(f"s{index}", f"Section {index}", parts=[
        Part("R1", "R", ["in", "mid"], Quantity.of("2k2")),
        Part("C1", "C", ["mid", "0"], Quantity.of("1n")),
        Part("U1", "opamp", ["mid", "out", "out"], model="buffer"),
    ]) for index in range(count)]
    path = tmp_path / "long.stagewise.json"
    save_project(path, Project("Long chain", opamp_models={"buffer": model}, stages=stages))
    status = cli.main(["response", str(path), "--stage", "s1", "--in-chain", "--freqs", "1k", "--json"])
    document = json.loads(capsys.readouterr().out)
    assert status == 0 and len(document["points"]) == 1
    stability = document["stability"]
    # Common practice, no source: a verdict that was not computed is null with the reason (here the
    # size limit, named with the sizes), never a guess.
    assert stability["verdict"] is None
    assert "unknowns" in stability["why"] and str(MODEL_MAX_UNKNOWNS) in stability["why"]
    status = cli.main(["response", str(path), "--stage", "s1", "--in-chain", "--freqs", "1k"])
    table = capsys.readouterr().out
    assert status == 0 and "stability is not known" in table and "unknowns" in table
