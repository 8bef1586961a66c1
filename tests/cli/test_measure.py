"""`stagewise measure` (DESIGN section 6): attach a measurement, record it, or change nothing."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from stagewise.cli import main
from stagewise.engine.analysis import response_points
from stagewise.files.codec import dumps
from stagewise.files.lock import acquire_lock, lock_path
from stagewise.files.project_file import load_project, loads_project
from stagewise.model.fingerprint import measurement_fingerprint
from stagewise.review.audit import unrecorded_decisions, verify_trail

skrf = pytest.importorskip("skrf")

# A non-inverting gain stage and an RC low-pass after it, values of our own choosing.
DOCUMENT: dict[str, Any] = {
    "format": "stagewise-project", "version": 1, "title": "Measure test", "revision": "B",
    "settings": {"f_min_hz": 1, "f_max_hz": "1M", "points_per_decade": 40, "temperature_c": 25, "ref_hz": 1000,
                 "noise_band_hz": None, "seed": 3, "mc_samples": 200},
    "opamp_models": {"bench 5 MHz": {"a0_db": 106, "gbw_hz": "5M", "rout_ohm": 60}},
    "stages": [
        {"id": "amp", "name": "Gain of 11", "ports": {"in": "in", "out": "out"},
         "parts": [{"ref": "R1", "type": "R", "nodes": ["fb", "0"], "value": "1k", "tol": "1%"},
                   {"ref": "R2", "type": "R", "nodes": ["out", "fb"], "value": "10k", "tol": "1%"},
                   {"ref": "U1", "type": "opamp", "nodes": ["in", "fb", "out"], "model": "bench 5 MHz"}]},
        {"id": "rc", "name": "Low-pass", "ports": {"in": "in", "out": "out"},
         "parts": [{"ref": "R1", "type": "R", "nodes": ["in", "out"], "value": "3k3", "tol": "1%"},
                   {"ref": "C1", "type": "C", "nodes": ["out", "0"], "value": "10n", "tol": "5%"}]},
    ],
}  # fmt: skip

F_HZ = np.logspace(1, 5, 81)


@pytest.fixture
def project_file(tmp_path: Path) -> Path:
    path = tmp_path / "bench.stagewise.json"
    # Canonical text, so that an unchanged file is byte for byte what the program writes.
    path.write_text(dumps(loads_project(json.dumps(DOCUMENT), "x")), encoding="utf-8")
    return path


def _touchstone(path: Path, response: np.ndarray) -> Path:
    s = np.full((F_HZ.size, 2, 2), 0.05 + 0.01j)
    s[:, 1, 0] = response
    network = skrf.Network(frequency=skrf.Frequency.from_f(F_HZ, unit="hz"), s=s, z0=50, name="board")
    # Reference library: scikit-rf 2.x, Network.write_touchstone.
    network.write_touchstone(filename=str(path), form="db")
    return path


def test_touchstone_of_the_predicted_response_attaches_with_zero_deviation(
        project_file: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    project = load_project(project_file)
    _, predicted, _ = response_points(project, list(F_HZ), "amp")
    assert predicted is not None
    data = _touchstone(tmp_path / "amp board.s2p", predicted)
    status = main(["measure", str(project_file), str(data), "--stage", "amp", "--by", "B. Tester",
                   "--instrument", "gain-phase analyser", "--setup", "10 mV drive, 1 MΩ probe", "--note", "board 3"])
    assert status == 0
    assert "Attached measurement" in capsys.readouterr().out
    saved = load_project(project_file)
    (measurement,) = saved.measurements
    assert (measurement.stage, measurement.where, measurement.by) == ("amp", "isolated", "B. Tester")
    assert measurement.instrument == "gain-phase analyser" and measurement.note == "board 3"
    import hashlib

    assert measurement.sha256 == hashlib.sha256(data.read_bytes()).hexdigest()  # Reference library: hashlib
    assert measurement.fingerprint == measurement_fingerprint(saved, "isolated", "amp")
    # The audit trail records it and still verifies; the record is accounted for.
    assert verify_trail(saved.audit).intact
    assert saved.audit[-1].what == "measurement" and saved.audit[-1].detail["sha256"] == measurement.sha256
    assert unrecorded_decisions(saved) == []
    assert main(["verify", str(project_file)]) == 0
    # The file round-trips byte for byte.
    assert dumps(load_project(project_file)) == project_file.read_text(encoding="utf-8")
    capsys.readouterr()
    assert main(["analyze", str(project_file), "--json"]) == 0
    (entry,) = json.loads(capsys.readouterr().out)["measurements"]
    assert entry["dev_db_max"] < 1e-9 and entry["dev_deg_max"] < 1e-9
    assert entry["points"] == F_HZ.size and entry["stale"] is False


def test_a_csv_of_the_chain_attaches_to_the_chain(project_file: Path, tmp_path: Path) -> None:
    project = load_project(project_file)
    _, chain, _ = response_points(project, list(F_HZ))
    assert chain is not None
    rows = [f"{float(f)!r},{float(v.real)!r},{float(v.imag)!r}" for f, v in zip(F_HZ, chain, strict=True)]
    data = tmp_path / "chain.csv"
    data.write_text("Frequency (Hz),Real,Imag\n" + "\n".join(rows) + "\n", encoding="utf-8")
    assert main(["measure", str(project_file), str(data), "--chain", "--by", "C"]) == 0
    measurement = load_project(project_file).measurements[0]
    assert (measurement.where, measurement.stage, measurement.id) == ("chain", None, "chain")
    # Round trip of a computed response through CSV (Python's repr keeps every digit): zero
    # deviation from the prediction (common practice, no source).
    from stagewise.engine.analysis import ProjectAnalysis

    (entry,) = ProjectAnalysis(load_project(project_file), spread=False).document()["measurements"]
    assert entry["dev_db_max"] < 1e-9 and entry["dev_deg_max"] < 1e-9 and entry["stale"] is False


def test_edited_measurement_record_is_named_by_verify(project_file: Path, tmp_path: Path) -> None:
    project = load_project(project_file)
    _, predicted, _ = response_points(project, list(F_HZ), "rc")
    assert predicted is not None
    assert main(["measure", str(project_file), str(_touchstone(tmp_path / "rc.s2p", predicted)), "--stage", "rc",
                 "--in-chain", "--by", "D"]) == 0
    document = json.loads(project_file.read_text(encoding="utf-8"))
    document["measurements"][0]["sha256"] = "f" * 64  # swapped for another file's hash by hand
    project_file.write_text(json.dumps(document, indent=2, ensure_ascii=False) + "\n", encoding="utf-8")
    problems = unrecorded_decisions(load_project(project_file))
    assert problems and "has no matching audit event" in problems[0]


BAD = {
    "wrong units": ("a.csv", "Frequency (rpm),Gain (dB),Phase (deg)\n1,0,0\n2,0,0\n", "is not a frequency unit"),
    "non-monotonic": ("a.csv", "f_hz,mag_db,phase_deg\n1,0,0\n3,0,0\n2,0,0\n", "line 4, column 1"),
    "missing column": ("a.csv", "f_hz,phase_deg\n1,0\n2,0\n", "needs magnitude and phase"),
    "text in numbers": ("a.csv", "f_hz,mag_db,phase_deg\n1,0,0\n2,abc,0\n", 'line 3, column 2: "abc" is not a number'),
}  # fmt: skip


@pytest.mark.parametrize("case", [*sorted(BAD), "one gigabyte", "no place", "unknown stage", "locked"])
def test_bad_input_changes_nothing(project_file: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str],
                                   case: str) -> None:
    before = project_file.read_bytes()
    place = ["--stage", "rc"]
    if case in BAD:
        name, text, expected = BAD[case]
        data = tmp_path / name
        data.write_text(text, encoding="utf-8")
    else:
        data = tmp_path / "huge.csv"
        with open(data, "wb") as handle:
            handle.truncate(1024 ** 3)  # sparse
        expected = "1,073,741,824 bytes; measurement files over 8 MiB are refused"
        if case == "no place":
            place, expected = [], "say where the measurement was taken"
        elif case == "unknown stage":
            place, expected = ["--stage", "nope"], 'no stage "nope"'
    lock = acquire_lock(project_file, "Someone Else") if case == "locked" else None
    try:
        status = main(["measure", str(project_file), str(data), *place])
    finally:
        if lock is not None:
            lock.release()
    err = capsys.readouterr().err
    assert status == 2
    if case == "locked":
        assert "open for editing" in err
    else:
        assert expected in err, err
    assert err.count("\n") == 1 and "Traceback" not in err  # one sentence
    assert project_file.read_bytes() == before  # nothing changed
    assert not lock_path(project_file).exists()
    assert not (tmp_path / "bench.stagewise.json.bak").exists()
