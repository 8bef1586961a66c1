"""File → Export review packet, Print packet and Import element cards, driven without modal loops.

The packet is read back with pypdf (an independent PDF reader); hashes are recomputed with
hashlib from the bytes on disk. The element-card deck is an RC low-pass of our own values.
"""

from __future__ import annotations

import hashlib
import math
import re
from pathlib import Path

import numpy as np
import pytest
from PySide6.QtGui import QKeySequence
from PySide6.QtWidgets import QDialog, QMessageBox

from stagewise.files.project_file import load_project

pypdf = pytest.importorskip("pypdf")

# Our own values: 4.7 kΩ and 22 nF, a corner near 1.54 kHz.
R_OHM = 4.7e3
C_F = 22e-9
GOOD_DECK = "* anti-alias input filter\nRin in out 4k7\nCin out 0 22n\n.end\n"
BAD_DECK = "* a deck with a part we do not model\nR1 in out 4k7\nQ1 out 0 mid\nC1 out 0 22n\n"


def sha256_hex(data: bytes) -> str:
    # Reference library: hashlib (Python standard library), sha256.
    return hashlib.sha256(data).hexdigest()


def pdf_pages(path: Path) -> list[str]:
    """Each page's text, whitespace as single spaces (pypdf writes gaps as tabs and newlines)."""
    return [re.sub(r"\s+", " ", page.extract_text()) for page in pypdf.PdfReader(str(path)).pages]


def packet_events(window) -> list:  # type: ignore[no-untyped-def]
    return [event for event in window.document.project.audit if event.what == "packet"]


def test_export_writes_the_packet_and_records_its_fingerprint(window, sample_path: Path, tmp_path: Path,  # type: ignore[no-untyped-def]
                                                               monkeypatch: pytest.MonkeyPatch) -> None:
    import stagewise.engine.analysis as analysis_module

    file_sha = sha256_hex(sample_path.read_bytes())
    assert not window.document.is_modified
    # The GUI's finished analysis is handed to the packet: nothing may build a second one.
    assert window.worker.analysis_of(window.document.project) is not None

    def second_analysis(*_args: object, **_kwargs: object) -> None:
        raise AssertionError("the packet computed the analysis again")

    monkeypatch.setattr(analysis_module, "ProjectAnalysis", second_analysis)
    output = tmp_path / "review.pdf"
    result = window.export_packet(output)
    assert result is not None
    data = output.read_bytes()
    pages = pdf_pages(output)
    assert len(pages) > 0
    assert file_sha in pages[0]
    (event,) = packet_events(window)
    assert event.detail["packet_sha256"] == sha256_hex(data)
    assert event.detail["file_sha256"] == file_sha
    # The project was saved for the packet, so its record is saved at once: the title shows no
    # unsaved change, and closing without saving cannot lose the record.
    assert not window.document.is_modified and not window.isWindowModified()
    assert "recorded in the audit trail and saved" in window.statusBar().currentMessage()
    saved = [event for event in load_project(sample_path).audit if event.what == "packet"]
    assert [event.detail["packet_sha256"] for event in saved] == [sha256_hex(data)]


def test_cancel_at_the_first_progress_step_leaves_no_file_and_no_event(window, tmp_path: Path,  # type: ignore[no-untyped-def]
                                                                      monkeypatch: pytest.MonkeyPatch) -> None:
    from stagewise.ui.exchange_dialogs import PacketProgress

    calls: list[str] = []
    report = PacketProgress.__call__

    def press_cancel_at_once(self, done: int, total: int, label: str) -> bool:  # type: ignore[no-untyped-def]
        calls.append(label)
        self.dialog.cancel()  # what the Cancel button does
        return report(self, done, total, label)

    monkeypatch.setattr(PacketProgress, "__call__", press_cancel_at_once)
    output = tmp_path / "cancelled.pdf"
    assert window.export_packet(output) is None
    assert len(calls) == 1
    assert not output.exists()
    assert list(tmp_path.glob("*.pdf*")) == []
    assert packet_events(window) == []
    assert not window.document.is_modified


def test_export_with_unsaved_changes_asks_to_save_first(window, tmp_path: Path,  # type: ignore[no-untyped-def]
                                                        monkeypatch: pytest.MonkeyPatch) -> None:
    from stagewise.ui.exchange_dialogs import SAVE_BEFORE_PACKET

    window.document.set_current_stage("rc")
    window.parts_table.edit_cell("R1", "value", "3k9")
    asked: list[str] = []

    def decline(_parent: object, _title: str, text: str, *_args: object) -> QMessageBox.StandardButton:
        asked.append(text)
        return QMessageBox.StandardButton.Cancel

    monkeypatch.setattr(QMessageBox, "question", decline)
    window.interactive = True
    try:
        output = tmp_path / "unsaved.pdf"
        assert window.export_packet(output) is None
    finally:
        window.interactive = False
    assert asked == [SAVE_BEFORE_PACKET]
    assert "fingerprint" in SAVE_BEFORE_PACKET and SAVE_BEFORE_PACKET.count(".") == 1
    assert not output.exists()
    assert packet_events(window) == []
    assert window.document.project.stage("rc").part("R1").value.raw == "3k9"  # the edit is kept


def test_print_goes_to_the_printer_chosen(window, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:  # type: ignore[no-untyped-def]
    import PySide6.QtPrintSupport as print_support

    target = tmp_path / "printed.pdf"

    class ChoosePdfPrinter:
        """Stands in for the print dialog: the user picks "print to PDF file" and presses Print."""

        def __init__(self, printer: print_support.QPrinter, _parent: object = None) -> None:
            printer.setOutputFormat(print_support.QPrinter.OutputFormat.PdfFormat)
            printer.setOutputFileName(str(target))

        def exec(self) -> QDialog.DialogCode:
            return QDialog.DialogCode.Accepted

    monkeypatch.setattr(print_support, "QPrintDialog", ChoosePdfPrinter)
    result = window.print_packet_dialog()
    assert result is not None
    assert len(pdf_pages(target)) == result.pages > 0
    (event,) = packet_events(window)
    assert event.detail["packet_sha256"] == sha256_hex(target.read_bytes())


def test_print_has_the_platform_shortcut(window) -> None:  # type: ignore[no-untyped-def]
    # Common practice, no source: Print uses the platform's own key binding.
    action = window.actions_by_name["printPacket"]
    assert action.shortcuts() == QKeySequence.keyBindings(QKeySequence.StandardKey.Print)


def test_imported_rc_deck_responds_as_a_first_order_low_pass_and_undo_removes_it(window) -> None:  # type: ignore[no-untyped-def]
    before = [stage.id for stage in window.document.project.stages]
    dialog = window.card_import_dialog()
    dialog.text.setPlainText(GOOD_DECK)
    dialog.name.setText("Anti-alias input")
    assert (dialog.in_node.text(), dialog.out_node.text()) == ("in", "out")
    dialog.accept()
    assert dialog.result() == QDialog.DialogCode.Accepted
    assert window.add_imported_stage(dialog)
    stage = window.document.project.stages[-1]
    assert stage.name == "Anti-alias input" and stage.id not in before
    assert window.wait_until_idle(60, formula=False)
    f_hz, mag_db, phase_deg = window.response_view.trace_data(f"{stage.id}:isolated")
    # Source: first-order RC low-pass, H(jω) = 1/(1 + jωRC), ω = 2πf.
    expected = 1 / (1 + 2j * math.pi * f_hz * R_OHM * C_F)
    np.testing.assert_allclose(mag_db, 20 * np.log10(np.abs(expected)), atol=1e-9)
    np.testing.assert_allclose(phase_deg, np.degrees(np.angle(expected)), atol=1e-7)
    corner = np.argmin(np.abs(f_hz - 1 / (2 * math.pi * R_OHM * C_F)))
    assert abs(mag_db[corner] - 20 * math.log10(abs(expected[corner]))) < 1e-9
    window.undo_action.trigger()
    assert [stage.id for stage in window.document.project.stages] == before
    assert not window.document.is_modified


def test_bad_deck_names_line_3_keeps_the_text_and_adds_nothing(window) -> None:  # type: ignore[no-untyped-def]
    before = [stage.id for stage in window.document.project.stages]
    dialog = window.card_import_dialog()
    dialog.text.setPlainText(BAD_DECK)
    dialog.accept()
    assert dialog.result() != QDialog.DialogCode.Accepted
    assert dialog.stage is None
    assert "line 3" in dialog.problem.text() and '"Q"' in dialog.problem.text()
    assert dialog.text.toPlainText() == BAD_DECK
    assert dialog.text.textCursor().blockNumber() == 2  # the cursor is on the offending line
    assert not window.add_imported_stage(dialog)
    assert [stage.id for stage in window.document.project.stages] == before
    assert window.document.undo_stack.count() == 0


def test_import_read_from_a_file_is_recorded_once_as_an_import_when_saved(window, sample_path: Path,  # type: ignore[no-untyped-def]
                                                                          tmp_path: Path) -> None:
    cards = tmp_path / "input-filter.cir"
    cards.write_bytes(GOOD_DECK.encode("utf-8"))
    dialog = window.card_import_dialog()
    assert dialog.read_file(cards)
    assert dialog.text.toPlainText() == GOOD_DECK
    dialog.accept()
    assert window.add_imported_stage(dialog)
    stage_id = window.document.current_stage_id
    assert window.save()
    audit = load_project(sample_path).audit
    imports = [event for event in audit if event.what == "import"]
    assert len(imports) == 1
    assert imports[0].detail["stage"] == stage_id
    assert imports[0].detail["cards_file"] == "input-filter.cir"
    assert imports[0].detail["cards_sha256"] == sha256_hex(cards.read_bytes())
    # The arrival of the stage is the import event, not also a "stage added" part change.
    added = [change for event in audit if event.what == "part change" for change in event.detail["changes"]
             if change["kind"] == "added" and change["subject"] == "stage"]
    assert added == []
    # An edit of the imported stage after the import is still a part change; no second import.
    window.document.set_current_stage(stage_id)
    window.parts_table.edit_cell("Rin", "value", "5k1")
    assert window.save()
    audit = load_project(sample_path).audit
    assert len([event for event in audit if event.what == "import"]) == 1
    changed = [change for event in audit if event.what == "part change" for change in event.detail["changes"]]
    assert any(change["stage"] == stage_id and change["subject"] == "part Rin" for change in changed)


def test_who_prints_is_asked_once_per_session_and_remembered(window, monkeypatch: pytest.MonkeyPatch) -> None:  # type: ignore[no-untyped-def]
    from PySide6.QtWidgets import QInputDialog

    from stagewise.ui.settings import remember_reviewer, reviewer_identity

    remember_reviewer("Ines Okafor", "test lead")
    offered: list[str] = []

    def answer(_parent: object, _title: str, _label: str, text: str = "") -> tuple[str, bool]:
        offered.append(text)
        return "Ines Okafor-Berg", True

    monkeypatch.setattr(QInputDialog, "getText", answer)
    window.interactive = True
    try:
        assert window.packet_author() == "Ines Okafor-Berg"
        assert window.packet_author() == "Ines Okafor-Berg"
    finally:
        window.interactive = False
    assert offered == ["Ines Okafor"]  # the name the sign-off dialog stored, asked once
    assert reviewer_identity() == ("Ines Okafor-Berg", "test lead")


def test_read_only_project_prints_no_packet_it_could_not_record(window, sample_path: Path, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    window.document.replace_project(window.document.project, sample_path, read_only=True)
    window._update_actions()
    for name in ("exportPacket", "printPacket", "importCards"):
        assert not window.actions_by_name[name].isEnabled()
    output = tmp_path / "read-only.pdf"
    assert window.export_packet(output) is None
    assert not output.exists()
    assert "read-only" in window.statusBar().currentMessage()


def test_import_dialog_places_the_stage_and_tells_how_it_read_milli(window, qtbot) -> None:  # type: ignore[no-untyped-def]
    from PySide6.QtCore import Qt

    first = window.document.project.stages[0]
    dialog = window.card_import_dialog()
    dialog.text.clear()
    for line in ("R1 in out 1MEG ; bias", "C1 out 0 10N", "L1 out 0 1M"):
        qtbot.keyClicks(dialog.text, line)
        qtbot.keyClick(dialog.text, Qt.Key.Key_Return)
    dialog.name.clear()
    qtbot.keyClicks(dialog.name, "Typed deck")
    dialog.place.setCurrentIndex(dialog.place.findText(f"After {first.name} ({first.id})"))
    qtbot.mouseClick(dialog.buttons.button(dialog.buttons.StandardButton.Ok), Qt.MouseButton.LeftButton)
    assert dialog.result() == QDialog.DialogCode.Accepted
    assert window.add_imported_stage(dialog)
    stages = window.document.project.stages
    assert stages[1].name == "Typed deck"
    values = {part.ref: part.value.si for part in stages[1].parts if part.value is not None}
    # Common practice, no source (value from memory): netlist cards read MEG as mega, N nano, M milli.
    assert values == {"R1": pytest.approx(1e6), "C1": pytest.approx(1e-8), "L1": pytest.approx(1e-3)}
    assert 'L1 "1M" is read as milli' in window.statusBar().currentMessage()
