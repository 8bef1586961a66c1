"""The hydrophone demo's bench measurement is in its packet, read back with pypdf (an independent reader)."""

from __future__ import annotations

import hashlib
import shutil
from pathlib import Path

import pypdf

from stagewise.files.project_file import load_project
from stagewise.report.packet import build_packet, ensure_application

ROOT = Path(__file__).resolve().parents[2]


def test_the_demo_packet_shows_the_board_measurement(tmp_path: Path) -> None:
    ensure_application()
    source = tmp_path / "hydrophone.stagewise.json"
    shutil.copyfile(ROOT / "projects" / "hydrophone.stagewise.json", source)
    output = tmp_path / "hydrophone.pdf"
    build_packet(load_project(source), source, output, printed_utc="2026-12-03T12:00:00Z")
    text = " ".join("\n".join(page.extract_text() for page in pypdf.PdfReader(str(output)).pages).split())
    # Reference library: hashlib, SHA-256 of the data file kept beside the demo.
    digest = hashlib.sha256((ROOT / "projects" / "measurements" / "hydrophone_board_A.csv").read_bytes()).hexdigest()
    assert "Measurement board-A" in text
    assert "hydrophone_board_A.csv" in text
    assert digest in text.replace(" ", "")
    assert "Inside the predicted spread 100.0 % of the points" in text
