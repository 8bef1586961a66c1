"""The packet's API: progress and cancellation, the printer path, and the command's refusals.

A small chain of our own (values chosen for these tests only): an RC low-pass, a bypassed
behavioural block and a unity buffer on an ideal op-amp with a bias resistor.
"""

from __future__ import annotations

import json
import re
from pathlib import Path
from typing import Any

import pytest

pypdf = pytest.importorskip("pypdf")

from stagewise.cli import main  # noqa: E402
from stagewise.files.project_file import file_sha256, load_project  # noqa: E402
from stagewise.report.packet import PacketCancelled, build_packet, ensure_application, print_packet  # noqa: E402

DOCUMENT: dict[str, Any] = {
    "format": "stagewise-project",
    "version": 1,
    "title": "Packet test chain",
    "revision": "T1",
    "settings": {"f_min_hz": 10, "f_max_hz": "100k", "points_per_decade": 20, "temperature_c": 25,
                 "ref_hz": 100, "noise_band_hz": [10, 10000], "seed": 7},
    "input": {"drive": "voltage", "amplitude": "100m"},
    "converter": {"fs_hz": 48000, "bits": 12, "full_scale_vpp": 3.3},
    "load": {"r_ohm": None, "c_f": None},
    "opamp_models": {},
    "stages": [
        {"id": "rc", "name": "RC low-pass", "ports": {"in": "in", "out": "out"},
         "parts": [{"ref": "R1", "type": "R", "nodes": ["in", "out"], "value": "6k8", "tol": "1%"},
                   {"ref": "C1", "type": "C", "nodes": ["out", "0"], "value": "10n", "tol": "5%"}],
         "checks": [{"id": "flat", "text": "Flat at 100 Hz", "metric": "gain_db", "where": "isolated",
                     "at_hz": 100, "min": -0.1, "max": 0.1}]},
        {"id": "spare", "name": "Spare gain block", "kind": "block", "bypass": True, "gain": 2,
         "zeros_hz": [], "poles_hz": [50000], "zin": {"r_ohm": "100k", "c_f": None}, "zout_ohm": 10},
        {"id": "buf", "name": "Unity buffer", "ports": {"in": "in", "out": "out"},
         "parts": [{"ref": "R2", "type": "R", "nodes": ["in", "0"], "value": "1M", "tol": "1%"},
                   {"ref": "U1", "type": "opamp", "nodes": ["in", "out", "out"], "model": "ideal"}],
         "checks": [{"id": "fit", "text": "Is the buffer's supply decoupled?"}]},
    ],
    "audit": [],
}


@pytest.fixture
def project_file(tmp_path: Path) -> Path:
    path = tmp_path / "small.stagewise.json"
    path.write_text(json.dumps(DOCUMENT, indent=2), encoding="utf-8")
    return path


def _text(path: Path) -> list[str]:
    return [re.sub(r"\s+", " ", page.extract_text()) for page in pypdf.PdfReader(str(path)).pages]


def test_progress_counts_up_and_cancelling_leaves_no_file(project_file: Path, tmp_path: Path) -> None:
    project = load_project(project_file)
    calls: list[tuple[int, int, str]] = []

    def stop_at_third(done: int, total: int, label: str) -> bool:
        calls.append((done, total, label))
        return len(calls) < 3

    output = tmp_path / "cancelled.pdf"
    with pytest.raises(PacketCancelled):
        build_packet(project, project_file, output, progress=stop_at_third)
    assert len(calls) == 3
    assert not output.exists()
    assert [entry.name for entry in tmp_path.iterdir() if entry.name.endswith(".tmp")] == []

    seen: list[tuple[int, int, str]] = []
    result = build_packet(project, project_file, tmp_path / "whole.pdf",
                          progress=lambda done, total, label: seen.append((done, total, label)) or True)
    dones = [done for done, _, _ in seen]
    assert dones == sorted(dones)
    assert len({total for _, total, _ in seen}) == 1
    assert any(label == f"page {result.pages} of {result.pages}" for _, _, label in seen)


def test_cancelling_while_painting_pages_leaves_no_file(project_file: Path, tmp_path: Path) -> None:
    project = load_project(project_file)
    output = tmp_path / "late.pdf"

    def stop_on_first_page(done: int, total: int, label: str) -> bool:
        return not label.startswith("page 1 of")

    with pytest.raises(PacketCancelled):
        build_packet(project, project_file, output, progress=stop_on_first_page)
    assert not output.exists()
    assert [entry.name for entry in tmp_path.iterdir() if entry.name.endswith(".tmp")] == []


def test_printer_gets_the_same_pages(project_file: Path, tmp_path: Path) -> None:
    ensure_application()
    from PySide6.QtPrintSupport import QPrinter

    project = load_project(project_file)
    written = build_packet(project, project_file, tmp_path / "file.pdf", printed_utc="2026-12-01T10:00:00Z")
    printer = QPrinter(QPrinter.PrinterMode.HighResolution)
    printer.setOutputFormat(QPrinter.OutputFormat.PdfFormat)
    printer.setOutputFileName(str(tmp_path / "printed.pdf"))
    printed = print_packet(project, project_file, printer, printed_utc="2026-12-01T10:00:00Z")
    assert printed.pages == written.pages
    from_file = _text(tmp_path / "file.pdf")
    from_printer = _text(tmp_path / "printed.pdf")
    assert len(from_printer) == len(from_file)
    for page_file, page_printer in zip(from_file, from_printer, strict=True):
        assert page_printer == page_file


def test_bypassed_stage_is_shown_as_bypassed(project_file: Path, tmp_path: Path) -> None:
    project = load_project(project_file)
    output = tmp_path / "bypass.pdf"
    build_packet(project, project_file, output)
    text = " ".join(_text(output))
    assert "spare · bypassed" in text  # the block diagram's box
    assert "BYPASSED: left out of the chain" in text  # the stage's own section
    assert "Stage 2: Spare gain block" in text


def test_sha256_given_instead_of_a_path_goes_on_the_cover(project_file: Path, tmp_path: Path) -> None:
    project = load_project(project_file)
    sha = file_sha256(project_file)
    output = tmp_path / "by-sha.pdf"
    build_packet(project, sha, output)
    assert sha in _text(output)[0]


def test_output_that_is_not_a_pdf_is_refused_and_nothing_changes(project_file: Path, tmp_path: Path,
                                                                  capsys: pytest.CaptureFixture[str]) -> None:
    before = project_file.read_bytes()
    status = main(["packet", str(project_file), "-o", str(tmp_path / "packet.txt"), "--by", "Tester"])
    error = capsys.readouterr().err
    assert status == 2
    assert error.count("\n") == 1 and "PDF" in error
    assert project_file.read_bytes() == before
    assert not (tmp_path / "packet.txt").exists()
    assert not project_file.with_name(project_file.name + ".bak").exists()


def test_missing_project_file_is_one_sentence(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    status = main(["packet", str(tmp_path / "absent.stagewise.json"), "-o", str(tmp_path / "p.pdf"), "--by", "T"])
    error = capsys.readouterr().err
    assert status == 2
    assert error.count("\n") == 1 and "no such file" in error
    assert not (tmp_path / "p.pdf").exists()


def test_empty_name_is_refused(project_file: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    before = project_file.read_bytes()
    status = main(["packet", str(project_file), "-o", str(tmp_path / "p.pdf"), "--by", "  "])
    assert status == 2
    assert "--by" in capsys.readouterr().err
    assert project_file.read_bytes() == before


def test_command_exits_cleanly_in_its_own_process(project_file: Path, tmp_path: Path) -> None:
    # Qt objects left to interpreter shutdown can crash it after the work is done; the exit
    # status is part of the command-line contract (DESIGN section 6).
    import os
    import subprocess
    import sys

    output = tmp_path / "own-process.pdf"
    environment = dict(os.environ, QT_QPA_PLATFORM="offscreen")
    completed = subprocess.run([sys.executable, "-m", "stagewise", "packet", str(project_file), "-o", str(output),
                                "--by", "Tester"], capture_output=True, text=True, env=environment, timeout=120,
                               check=False)
    assert completed.returncode == 0, completed.stderr
    assert output.read_bytes().startswith(b"%PDF")
    assert "recorded in the audit trail" in completed.stdout


def test_failed_save_is_one_sentence_and_file_unchanged(project_file: Path, tmp_path: Path,
                                                       capsys: pytest.CaptureFixture[str],
                                                       monkeypatch: pytest.MonkeyPatch) -> None:
    import stagewise.files.project_file as project_file_module

    def refuse(path: object, project: object) -> None:
        raise PermissionError(13, "Permission denied", str(path))

    monkeypatch.setattr(project_file_module, "save_project", refuse)
    before = project_file.read_bytes()
    output = tmp_path / "unrecorded.pdf"
    status = main(["packet", str(project_file), "-o", str(output), "--by", "Tester"])
    error = capsys.readouterr().err
    assert status == 2
    assert error.count("\n") == 1 and "could not be saved" in error and "Permission denied" in error
    assert project_file.read_bytes() == before


def _positions(path: Path, page_index: int) -> dict[str, tuple[float, float]]:
    """Where each text run starts on a page, in PDF points (independent of the device resolution)."""
    found: dict[str, tuple[float, float]] = {}

    def visit(text: str, cm: Any, tm: Any, font: Any, size: Any) -> None:
        key = re.sub(r"\s+", " ", text).strip()
        if key and key not in found:
            # Text space to user space: the text matrix, then the current transformation matrix.
            x = tm[4] * cm[0] + tm[5] * cm[2] + cm[4]
            y = tm[4] * cm[1] + tm[5] * cm[3] + cm[5]
            found[key] = (x, y)

    pypdf.PdfReader(str(path)).pages[page_index].extract_text(visitor_text=visit)
    return found


def test_a_high_resolution_printer_gets_the_same_layout(project_file: Path, tmp_path: Path) -> None:
    # Source: ISO 32000-1:2008, 8.3 (user space is in points whatever the device resolution):
    # the same packet painted at 96 and at 300 dpi puts every text run at the same place.
    ensure_application()
    from PySide6.QtPrintSupport import QPrinter

    project = load_project(project_file)
    build_packet(project, project_file, tmp_path / "at96.pdf", printed_utc="2026-12-01T10:00:00Z")
    printer = QPrinter(QPrinter.PrinterMode.HighResolution)
    printer.setOutputFormat(QPrinter.OutputFormat.PdfFormat)
    printer.setOutputFileName(str(tmp_path / "at300.pdf"))
    printer.setResolution(300)
    print_packet(project, project_file, printer, printed_utc="2026-12-01T10:00:00Z", resolution_dpi=None)
    assert printer.resolution() == 300
    reader = pypdf.PdfReader(str(tmp_path / "at96.pdf"))
    plot_page = next(index for index, page in enumerate(reader.pages)
                     if "frequency (Hz)" in re.sub(r"\s+", " ", page.extract_text()))
    at96 = _positions(tmp_path / "at96.pdf", plot_page)
    at300 = _positions(tmp_path / "at300.pdf", plot_page)
    for label in ("frequency (Hz)", "magnitude (dB)", "phase (°)", "Response of the whole chain", "1 k", "10 k"):
        assert label in at96 and label in at300, label
        assert abs(at96[label][0] - at300[label][0]) < 1.0, (label, at96[label], at300[label])
        assert abs(at96[label][1] - at300[label][1]) < 1.0, (label, at96[label], at300[label])


def test_unsolvable_stage_gets_reasons_not_numbers(tmp_path: Path) -> None:
    # An ideal op-amp without feedback has no defined output (any circuits text: the nullor
    # needs a feedback path); the packet must say why instead of printing a number.
    import copy

    document = copy.deepcopy(DOCUMENT)
    document["stages"][2]["parts"] = [
        {"ref": "R2", "type": "R", "nodes": ["out", "0"], "value": "1k"},
        {"ref": "U1", "type": "opamp", "nodes": ["in", "0", "out"], "model": "ideal"},
    ]
    document["stages"][2]["checks"] = [{"id": "unity", "text": "Unity gain at 100 Hz", "metric": "gain_db",
                                        "where": "isolated", "at_hz": 100, "min": -0.1, "max": 0.1}]
    path = tmp_path / "open-loop.stagewise.json"
    path.write_text(json.dumps(document), encoding="utf-8")
    output = tmp_path / "open-loop.pdf"
    assert main(["packet", str(path), "-o", str(output), "--by", "Tester"]) == 0
    text = " ".join(_text(output))
    section = text[text.index("Stage 3: Unity buffer"):text.index("Audit trail")]
    assert "Isolated: " in section
    assert re.search(r"unity Unity gain at 100 Hz .* -0\.1 dB … 0\.1 dB — no value", section)
    assert not re.search(r"Gain -?\d", section)  # no gain figure for a stage that has none


def test_symbolic_forms_follow_part_changes(project_file: Path) -> None:
    # Source: first-order RC low-pass, f_c = 1/(2πRC) (any circuits text). The packet keeps
    # symbolic forms by stage fingerprint; after a part change it must show the new corner.
    import math

    from stagewise.model.values import Quantity
    from stagewise.report.content import _symbolic

    project = load_project(project_file)
    stage = project.stages[0]

    def corner() -> float:
        form = _symbolic(stage, project)["form"]
        return float(form["sections"][0]["f0_hz_value"])

    first = corner()
    assert math.isclose(first, 1 / (2 * math.pi * 6.8e3 * 10e-9), rel_tol=1e-9)
    assert corner() == first  # the same stage again
    resistor = stage.part("R1")
    assert resistor is not None
    resistor.value = Quantity("3k3", 3.3e3)
    assert math.isclose(corner(), 1 / (2 * math.pi * 3.3e3 * 10e-9), rel_tol=1e-9)
