"""Packet text defects, each checked on the packet's own text (pypdf) or its file."""

from __future__ import annotations

import os
import re
import shutil
import stat
from pathlib import Path

import pypdf
import pytest

from stagewise.files.project_file import load_project
from stagewise.present.typography import keep_units_together
from stagewise.report.packet import build_packet, ensure_application

ROOT = Path(__file__).resolve().parents[2]


@pytest.fixture(scope="module")
def hydrophone_packet(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, str]:
    ensure_application()
    folder = tmp_path_factory.mktemp("packet-text")
    source = folder / "hydrophone.stagewise.json"
    shutil.copyfile(ROOT / "projects" / "hydrophone.stagewise.json", source)
    output = folder / "hydrophone.pdf"
    previous = os.umask(0o022)
    try:
        build_packet(load_project(source), source, output, printed_utc="2026-12-03T12:00:00Z")
    finally:
        os.umask(previous)
    text = "\n".join(page.extract_text() for page in pypdf.PdfReader(str(output)).pages)
    return output, " ".join(text.split())


def test_packet_file_gets_the_umask_mode_like_other_files(hydrophone_packet: tuple[Path, str]) -> None:
    output, _ = hydrophone_packet
    # Common practice, no source: a new file is 0666 less the umask (0022 → 0644), as open() makes it.
    assert stat.S_IMODE(output.stat().st_mode) == 0o644


def test_a_waiver_reason_is_printed_once(hydrophone_packet: tuple[Path, str]) -> None:
    _, text = hydrophone_packet
    justification = "Accepted for the river trial only."
    assert text.count(justification) >= 1
    assert ".; waived by" not in text
    # The check row says it once (the audit trail may repeat it as the event's detail).
    row = text[text.index("waived by Tobias Achebe"):][:400]
    assert row.count(justification) == 1


def test_audit_events_read_as_words_not_json(hydrophone_packet: tuple[Path, str]) -> None:
    _, text = hydrophone_packet
    trail = text[text.index("Audit trail"):]
    assert '{"' not in trail and '[{' not in trail
    # A part change reads as a sentence: "buffer: part R1 value changed from 1M to 2M2".
    assert re.search(r"part R1 value changed from 1M to 2M2", trail)
    # A model change belongs to no stage: no "None:" before it, and its field reads as words.
    assert "None:" not in trail
    assert "op-amp model low-noise-jfet-10M input offset voltage changed: 1m" in trail


def test_internal_keys_and_plurals(hydrophone_packet: tuple[Path, str]) -> None:
    _, text = hydrophone_packet
    for key in ("f_low_3db_hz", "f_high_3db_hz", "ref_hz", "peaking_db", "stale_signoffs"):
        assert key not in text, key
    # Common practice, no source: "1 part", never "1 parts".
    assert not re.search(r"\b1 (parts|sign-offs|checks|events|findings)\b", text)


def test_numbers_keep_their_units_with_a_space() -> None:
    # Source: BIPM, The International System of Units, 9th ed. (2019), 5.4.3: a space between
    # number and unit, also before % and Ω; a no-break space keeps them on one line.
    assert keep_units_together("25.97 dB at 1 kHz, 0Ω, 5%") == "25.97\u00a0dB at 1\u00a0kHz, 0\u00a0Ω, 5\u00a0%"
    assert keep_units_together("5 stages and 3 sign-offs") == "5 stages and 3 sign-offs"


def test_no_unit_glued_to_its_number_in_the_packet(hydrophone_packet: tuple[Path, str]) -> None:
    _, text = hydrophone_packet
    assert not re.search(r"\d(Ω|%)(?![A-Za-z])", text)


def test_dc_notes_name_op_amp_figures_in_words(hydrophone_packet: tuple[Path, str]) -> None:
    _, text = hydrophone_packet
    # The demo's general-purpose model gives no DC figures; the note says so in the words of a
    # data sheet (common practice, no source), not in the file's keys.
    budget = text[text.index("DC accuracy budget"):]
    assert "gives no input offset voltage, input bias current or input offset current" in budget
    for key in ("vos_v", "ib_a", "ios_a", "psrr_db", "input_type", "supply_variation_v", "temp_range_c"):
        assert key not in text, key


def test_no_metric_key_in_the_greenhouse_packet(tmp_path: Path) -> None:
    # The greenhouse chain has no lower corner in any Monte Carlo sample: the spread table says
    # so in words beside the metric's name, not with its key (common practice, no source).
    from stagewise.review.metrics import METRICS

    ensure_application()
    source = tmp_path / "greenhouse.stagewise.json"
    shutil.copyfile(ROOT / "projects" / "greenhouse.stagewise.json", source)
    output = tmp_path / "greenhouse.pdf"
    build_packet(load_project(source), source, output, printed_utc="2026-12-03T12:00:00Z")
    text = " ".join(" ".join(page.extract_text() for page in pypdf.PdfReader(str(output)).pages).split())
    assert "no sample has it" in text
    for key in METRICS:
        if "_" in key:
            assert key not in text, key
