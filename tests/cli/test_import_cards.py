"""`stagewise import-cards` (DESIGN section 6): append a stage, record it, or change nothing."""

from __future__ import annotations

import copy
import hashlib
import json
import math
import os
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from stagewise.cli import main
from stagewise.engine.mna import assemble
from stagewise.engine.sweep import drive, transfer
from stagewise.files.lock import acquire_lock, lock_path
from stagewise.files.project_file import load_project
from stagewise.review.audit import verify_trail

# An existing one-stage project, values of our own choosing.
DOCUMENT: dict[str, Any] = {
    "format": "stagewise-project", "version": 1, "title": "Import test", "revision": "2",
    "opamp_models": {"low offset 2 MHz": {"a0_db": 115, "gbw_hz": "2M", "rout_ohm": 80}},
    "stages": [
        {"id": "sensor", "name": "Sensor divider", "ports": {"in": "in", "out": "out"},
         "parts": [{"ref": "R1", "type": "R", "nodes": ["in", "out"], "value": "12k"},
                   {"ref": "R2", "type": "R", "nodes": ["out", "0"], "value": "33k"}]},
    ],
}  # fmt: skip

GOOD_CARDS = """\
* inverting low-pass gain stage
Rin  vi  n    6k8
Rfb  n   vo   33k
Cfb  n   vo   4n7
U1   0   n    vo   low offset 2 MHz
"""


@pytest.fixture
def project_file(tmp_path: Path) -> Path:
    path = tmp_path / "chain.stagewise.json"
    path.write_text(json.dumps(DOCUMENT, indent=2) + "\n", encoding="utf-8")
    return path


def _snapshot(path: Path) -> tuple[bytes, int]:
    return path.read_bytes(), path.stat().st_mtime_ns


def test_import_appends_the_stage_records_it_and_saves(project_file: Path, tmp_path: Path) -> None:
    cards = tmp_path / "gain.cards"
    cards.write_text(GOOD_CARDS, encoding="utf-8")
    status = main(["import-cards", str(project_file), str(cards), "--name", "Gain stage", "--in", "vi",
                   "--out", "vo", "--by", "A. Reviewer"])
    assert status == 0
    project = load_project(project_file)  # the saved file loads and validates
    assert [stage.id for stage in project.stages] == ["sensor", "gain-stage"]
    stage = project.stages[1]
    assert stage.ports == {"in": "vi", "out": "vo"}
    assert stage.part("U1").model == "low offset 2 MHz"  # type: ignore[union-attr]
    (event,) = project.audit
    assert event.what == "import" and event.who == "A. Reviewer"
    assert event.detail["stage"] == "gain-stage"
    # Reference library: Python hashlib, sha256 of the cards file's bytes.
    assert event.detail["cards_sha256"] == hashlib.sha256(cards.read_bytes()).hexdigest()
    assert verify_trail(project.audit).intact
    assert (tmp_path / "chain.stagewise.json.bak").exists()  # the previous version is kept

    # Source: inverting stage with Rf ∥ Cf feedback, −(Rf/Rin)/(1 + sRfCf), from the Laplace
    # impedances and the ideal op-amp rules (any op-amp text); checked with the op-amp made ideal.
    f_hz = np.array([10.0, 1e3, 3e3, 30e3])
    s = 2j * math.pi * f_hz
    expected = -(33e3 / 6.8e3) / (1 + s * 33e3 * 4.7e-9)
    ideal = copy.deepcopy(stage)
    ideal.part("U1").model = "ideal"  # type: ignore[union-attr]
    response = transfer(drive(assemble(ideal, project), current=False), f_hz)
    np.testing.assert_allclose(response, expected, rtol=1e-9)
    # Common practice, no source: with the finite model the gain error is about 1/loop gain,
    # loop gain ≈ GBW·β/f ≥ 2 MHz·0.17/30 kHz ≈ 11 at the top point, so within 10 %.
    finite = transfer(drive(assemble(stage, project), current=False), f_hz)
    np.testing.assert_allclose(finite, expected, rtol=0.1)


@pytest.mark.parametrize(
    ("cards_text", "line", "words"),
    [
        (GOOD_CARDS + "D1 vo 0 diode\n", 6, "unsupported element letter"),  # unsupported line
        ("Rin vi n 6k8\nRfb n 33k\nU1 0 n vi ideal\n", 2, "missing node"),  # missing node
        ("Rin vi n 6k8\nRfb n vo 33kk\nU1 0 n vo ideal\n", 2, '"33kk" is not a value'),  # bad value
    ],
)
def test_refused_import_exits_2_and_leaves_the_file_untouched(
    project_file: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str], cards_text: str, line: int, words: str
) -> None:
    cards = tmp_path / "bad.cards"
    cards.write_text(cards_text, encoding="utf-8")
    before = _snapshot(project_file)
    status = main(["import-cards", str(project_file), str(cards), "--name", "Bad", "--in", "vi", "--out", "vo"])
    assert status == 2
    error = capsys.readouterr().err
    # Common practice, no source: one sentence on stderr naming the line (DESIGN section 6).
    assert error.count("\n") == 1 and error.startswith("stagewise: ")
    assert f"line {line}: " in error and words in error
    assert "Traceback" not in error
    assert _snapshot(project_file) == before  # same bytes, same modification time
    assert not (tmp_path / "chain.stagewise.json.bak").exists()
    assert sorted(os.listdir(tmp_path)) == ["bad.cards", "chain.stagewise.json"]  # no temporary left


def test_other_refusals_leave_the_file_untouched(project_file: Path, tmp_path: Path,
                                                  capsys: pytest.CaptureFixture[str]) -> None:
    cards = tmp_path / "ok.cards"
    cards.write_text(GOOD_CARDS, encoding="utf-8")
    before = _snapshot(project_file)
    attempts = [
        ([str(project_file), str(tmp_path / "missing.cards"), "--name", "X"], "no such file"),
        ([str(project_file), str(cards), "--name", "X", "--in", "nowhere", "--out", "vo"], '"nowhere" is not a node'),
        ([str(project_file), str(cards), "--name", "X", "--in", "vi", "--out", "vo", "--id", "sensor"], "already used"),
    ]
    for arguments, words in attempts:
        assert main(["import-cards", *arguments]) == 2
        assert words in capsys.readouterr().err
        assert _snapshot(project_file) == before
    (tmp_path / "binary.cards").write_bytes(b"R1 in out \xff\xfe\n")
    assert main(["import-cards", str(project_file), str(tmp_path / "binary.cards"), "--name", "X"]) == 2
    assert "not UTF-8" in capsys.readouterr().err
    assert _snapshot(project_file) == before


def test_a_project_open_for_editing_elsewhere_is_refused(project_file: Path, tmp_path: Path,
                                                         capsys: pytest.CaptureFixture[str]) -> None:
    # Common practice, no source: never write under a file someone else holds open for editing.
    cards = tmp_path / "ok.cards"
    cards.write_text(GOOD_CARDS, encoding="utf-8")
    lock = acquire_lock(project_file, "Someone Else")
    try:
        before = _snapshot(project_file)
        status = main(["import-cards", str(project_file), str(cards), "--name", "X", "--in", "vi", "--out", "vo"])
        assert status == 2
        assert "open for editing" in capsys.readouterr().err
        assert _snapshot(project_file) == before
    finally:
        lock.release()
    assert main(["import-cards", str(project_file), str(cards), "--name", "X", "--in", "vi", "--out", "vo"]) == 0
    assert not lock_path(project_file).exists()  # the command released its own lock
