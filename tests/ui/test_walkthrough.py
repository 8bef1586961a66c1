"""A whole review authored in the program, as a new user does it: new project, three stages from
templates, the converter and the settings, two checks from the library, a sign-off, save, reopen,
and the review packet, whose text is read back with pypdf."""

from __future__ import annotations

import re
from pathlib import Path

import pypdf
import pytest
from PySide6.QtCore import Qt
from PySide6.QtWidgets import QFileDialog

from conftest import type_into
from stagewise.files.project_file import load_project
from stagewise.review.audit import verify_trail


def press(qtbot, window, key: Qt.Key, modifiers: Qt.KeyboardModifier) -> None:  # type: ignore[no-untyped-def]
    window.activateWindow()
    window.tree.setFocus()
    qtbot.keyClick(window.tree, key, modifiers)


def test_a_review_from_scratch_to_the_packet(window, qtbot, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:  # type: ignore[no-untyped-def]
    from stagewise.ui.dialogs import SignoffDialog

    ctrl = Qt.KeyboardModifier.ControlModifier
    window.new_project()
    for template in ("ac_noninverting", "sallen_key_lowpass", "converter_driver"):
        window.add_stage_from_template(template)
    stages = window.document.project.stages
    assert len(stages) == 4  # the new project's own stage and three from templates
    names = [stage.name for stage in stages]

    project_dialog = window.project_dialog()
    type_into(qtbot, project_dialog.title, "Seismic sensor front-end")
    type_into(qtbot, project_dialog.revision, "B")
    type_into(qtbot, project_dialog.amplitude, "20m")
    type_into(qtbot, project_dialog.f_min, "0.1")
    type_into(qtbot, project_dialog.f_max, "1M")
    type_into(qtbot, project_dialog.ref, "100")
    type_into(qtbot, project_dialog.band_low, "1")
    type_into(qtbot, project_dialog.band_high, "1k")
    qtbot.mouseClick(project_dialog.ok_button, Qt.MouseButton.LeftButton)
    assert project_dialog.result() == project_dialog.DialogCode.Accepted, project_dialog.problem.text()
    converter_dialog = window.converter_dialog()
    type_into(qtbot, converter_dialog.fs, "4k")
    converter_dialog.bits.setValue(24)
    type_into(qtbot, converter_dialog.full_scale, "5")
    qtbot.mouseClick(converter_dialog.ok_button, Qt.MouseButton.LeftButton)
    assert converter_dialog.result() == converter_dialog.DialogCode.Accepted, converter_dialog.problem.text()

    gain_stage = stages[1]
    window.document.set_current_stage(gain_stage.id)
    checks_dialog = window.check_editor_dialog()
    checks_dialog.library_name.setCurrentIndex(checks_dialog.library_name.findData("amplifier"))
    library = {checks_dialog.library_list.item(i).data(Qt.ItemDataRole.UserRole): checks_dialog.library_list.item(i)
               for i in range(checks_dialog.library_list.count())}
    library["pm"].setCheckState(Qt.CheckState.Checked)
    library["decoupling"].setCheckState(Qt.CheckState.Checked)
    texts = [library["pm"].text().split(" [")[0], library["decoupling"].text().split(" [")[0]]
    qtbot.mouseClick(checks_dialog.add_library, Qt.MouseButton.LeftButton)
    qtbot.mouseClick(checks_dialog.ok_button, Qt.MouseButton.LeftButton)
    assert checks_dialog.result() == checks_dialog.DialogCode.Accepted, checks_dialog.problem.text()
    assert window.wait_until_idle(90, formula=False)

    def sign(dialog: SignoffDialog) -> int:
        type_into(qtbot, dialog.name, "Mirela Dragan")
        type_into(qtbot, dialog.role, "analog design reviewer")
        dialog.verdict.setCurrentIndex(dialog.verdict.findData("accept"))
        dialog.note.setPlainText("Gain, loop and decoupling looked at.")
        dialog.accept()
        return int(dialog.result())

    monkeypatch.setattr(SignoffDialog, "exec", sign)
    press(qtbot, window, Qt.Key.Key_G, ctrl | Qt.KeyboardModifier.ShiftModifier)
    assert window.review_panel.state.property("signoffState") == "accepted"

    path = tmp_path / "seismic.stagewise.json"
    monkeypatch.setattr(QFileDialog, "getSaveFileName", lambda *args, **kwargs: (str(path), ""))
    press(qtbot, window, Qt.Key.Key_S, ctrl)  # Save: a new project asks where
    assert path.is_file() and not window.isWindowModified()

    monkeypatch.setattr(QFileDialog, "getOpenFileName", lambda *args, **kwargs: (str(path), ""))
    window.new_project()
    press(qtbot, window, Qt.Key.Key_O, ctrl)  # Open it again
    assert window.document.path == path
    reopened = window.document.project
    assert (reopened.title, reopened.revision) == ("Seismic sensor front-end", "B")
    assert reopened.converter.fs_hz.si == 4e3 and reopened.converter.bits == 24
    assert [stage.name for stage in reopened.stages] == names
    assert {check.id for check in reopened.stages[1].checks} >= {"pm", "decoupling"}
    assert verify_trail(reopened.audit).intact
    assert window.wait_until_idle(90, formula=False)
    assert window.tree._stage_items[gain_stage.id].text(3).startswith("accepted")

    output = tmp_path / "seismic-packet.pdf"
    monkeypatch.setattr(QFileDialog, "getSaveFileName", lambda *args, **kwargs: (str(output), ""))
    press(qtbot, window, Qt.Key.Key_E, ctrl | Qt.KeyboardModifier.ShiftModifier)  # Export review packet
    assert output.is_file()
    pages = [re.sub(r"\s+", " ", page.extract_text()) for page in pypdf.PdfReader(str(output)).pages]
    text = " ".join(pages)
    assert "Seismic sensor front-end" in pages[0] and "B" in pages[0]
    assert load_project(path).audit[-1].what == "packet"  # recorded and saved at once
    for name in names:
        assert name in text, name
    for check_text in texts:
        assert " ".join(check_text.split()[:6]) in text, check_text
    assert "Mirela Dragan" in text and "accepted" in text
    assert "Audit trail intact" in text
