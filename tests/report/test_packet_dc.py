"""The packet's DC accuracy section: the same numbers as ``analyze --json``, largest contributors first."""

from __future__ import annotations

import json
import re
import shutil
from pathlib import Path

import pytest

pypdf = pytest.importorskip("pypdf")

from stagewise.cli import main  # noqa: E402
from stagewise.model.values import format_value  # noqa: E402

PROJECTS = Path(__file__).resolve().parents[2] / "projects"


def test_packet_prints_the_dc_budget_of_the_chain(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = tmp_path / "greenhouse.stagewise.json"
    shutil.copyfile(PROJECTS / "greenhouse.stagewise.json", path)
    assert main(["analyze", str(path), "--json"]) == 0
    dc = json.loads(capsys.readouterr().out)["chain"]["dc"]
    output = tmp_path / "packet.pdf"
    assert main(["packet", str(path), "-o", str(output), "--by", "Quality Office"]) == 0
    text = re.sub(r"\s+", " ", " ".join(page.extract_text() for page in pypdf.PdfReader(str(output)).pages))
    start = text.index("DC accuracy budget")
    section = text[start:text.index("Converter", start)]
    assert "0 to 60 °C" in section
    assert f"DC error, worst case, over the range {format_value(dc['total_wc_v'], 'V')}" in section
    assert f"{dc['total_wc_lsb']:.4g} LSB" in section
    # The column carries its unit; the gain stage's bias current term reads 12 mV at the converter
    # (Source: Franco, 3rd ed., sec. 5.1-5.2, value from memory: Ib·Rf = 600 nA × 20 kΩ).
    assert "error (mV)" in section
    assert re.search(r"U1 Ib gain bias current 12(\.0\d*)? ", section), section
    assert "DC gain 2 M" in section and "DC gain 2e" not in section  # a current drive: a transimpedance in Ω


def test_stage_tables_carry_each_places_dc_figures(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = tmp_path / "greenhouse.stagewise.json"
    shutil.copyfile(PROJECTS / "greenhouse.stagewise.json", path)
    assert main(["analyze", str(path), "--json"]) == 0
    stage = next(item for item in json.loads(capsys.readouterr().out)["stages"] if item["id"] == "gain")
    output = tmp_path / "packet.pdf"
    assert main(["packet", str(path), "-o", str(output), "--by", "Quality Office"]) == 0
    text = re.sub(r"\s+", " ", " ".join(page.extract_text() for page in pypdf.PdfReader(str(output)).pages))
    # The offset row of the gain stage: isolated and in chain, as analyze --json has them (both 15.0 mV,
    # Franco's Vos·(1 + R2/R1) + Ib·R2 + Ios/2·R2 for this stage, see its notes).
    isolated = format_value(stage["isolated"]["dc"]["offset_out_v"], "V")
    in_chain = format_value(stage["in_chain"]["dc"]["offset_out_v"], "V")
    assert f"Output offset (worst case) {isolated} {in_chain}" in text
