"""The hydrophone demo's bench measurement: the file beside it, its record, and the script that made it."""

from __future__ import annotations

import csv
import hashlib
import importlib.util
import json
import subprocess
import sys
from pathlib import Path

import numpy as np

from stagewise.files.project_file import load_project
from stagewise.review.audit import check_records, verify_trail

PROJECTS = Path(__file__).resolve().parents[2] / "projects"
DEMO = PROJECTS / "hydrophone.stagewise.json"
FOLDER = PROJECTS / "measurements"


def _csv_rows(path: Path) -> np.ndarray:
    # Reference library: Python's csv module, the rows after the comment lines and the header.
    lines = [line for line in path.read_text(encoding="utf-8").splitlines() if not line.startswith("#")]
    rows = list(csv.reader(lines))
    assert rows[0] == ["Frequency (Hz)", "Gain (dB)", "Phase (deg)"]
    return np.array([[float(cell) for cell in row] for row in rows[1:]])


def test_the_demo_measurement_is_the_file_beside_it() -> None:
    project = load_project(DEMO)
    (record,) = project.measurements
    data = FOLDER / record.file
    # Reference library: hashlib, SHA-256 of the file's bytes.
    assert record.sha256 == hashlib.sha256(data.read_bytes()).hexdigest()
    assert record.where == "chain" and record.by and record.time and record.instrument and record.setup
    rows = _csv_rows(data)
    np.testing.assert_allclose(record.f_hz, rows[:, 0], rtol=1e-12)
    response = np.asarray(record.re) + 1j * np.asarray(record.im)
    # Reference library: numpy, 20·log10|H| and the angle in degrees.
    np.testing.assert_allclose(20 * np.log10(np.abs(response)), rows[:, 1], atol=1e-9)
    np.testing.assert_allclose(np.degrees(np.angle(response)), rows[:, 2], atol=1e-9)
    # Its import is in the audit trail, which verifies.
    assert verify_trail(project.audit).intact and check_records(project).problems == ()
    assert any(event.detail.get("sha256") == record.sha256 for event in project.audit)


def test_the_script_beside_it_reproduces_the_file() -> None:
    # Common practice, no source: demo data is reproducible from the script kept beside it.
    spec = importlib.util.spec_from_file_location("make_hydrophone_measurement",
                                                  FOLDER / "make_hydrophone_measurement.py")
    assert spec is not None and spec.loader is not None
    script = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(script)
    board = script.board_response(DEMO)
    rows = _csv_rows(FOLDER / "hydrophone_board_A.csv")
    np.testing.assert_allclose(script.F_HZ, rows[:, 0], rtol=1e-5)
    # Six significant digits in the file.
    np.testing.assert_allclose(20 * np.log10(np.abs(board)), rows[:, 1], rtol=1e-5, atol=1e-5)
    np.testing.assert_allclose(np.degrees(np.angle(board)), rows[:, 2], rtol=1e-5, atol=1e-4)


def test_analyze_reports_the_demo_board_current_and_inside_its_spread() -> None:
    # Common practice, no source: the invented board moves each part inside its tolerance, so its
    # measured points lie within the predicted spread; the design has not changed since.
    completed = subprocess.run([sys.executable, "-m", "stagewise", "analyze", str(DEMO), "--json"],
                               capture_output=True, text=True, timeout=300, check=False)
    assert completed.returncode == 0, completed.stderr
    (entry,) = json.loads(completed.stdout)["measurements"]
    assert entry["id"] == "board-A" and entry["stale"] is False and entry["points"] == 101
    assert entry["inside_spread_pct"] == 100.0
