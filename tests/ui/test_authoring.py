"""Authoring a review in the program: project and converter dialogs, a block stage, checks from the
library, the op-amp library, and the shortcuts that reach them. Each test drives the dialogs as a
user does (typed text, clicks, keys) and asserts what the user then sees."""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest
from PySide6.QtCore import Qt
from PySide6.QtWidgets import QDialog, QFileDialog

from conftest import type_into
from stagewise.review.metrics import METRICS


def press_ok(qtbot, dialog: Any) -> None:  # type: ignore[no-untyped-def]
    qtbot.mouseClick(dialog.ok_button, Qt.MouseButton.LeftButton)


def undo(qtbot, window) -> None:  # type: ignore[no-untyped-def]
    window.undo_action.trigger()


def test_project_dialog_sets_every_setting_in_one_undoable_edit(window, qtbot) -> None:  # type: ignore[no-untyped-def]
    before = window.document.project
    old_settings = (before.title, before.revision, before.settings.f_max_hz.raw, before.settings.noise_band_hz)
    dialog = window.project_dialog()
    type_into(qtbot, dialog.title, "Vibration front-end")
    type_into(qtbot, dialog.revision, "C")
    dialog.drive.setCurrentIndex(dialog.drive.findData("voltage"))
    type_into(qtbot, dialog.amplitude, "50m")
    type_into(qtbot, dialog.f_min, "10")
    type_into(qtbot, dialog.f_max, "200k")
    type_into(qtbot, dialog.ref, "2k")
    type_into(qtbot, dialog.band_low, "20")
    type_into(qtbot, dialog.band_high, "10k")
    type_into(qtbot, dialog.temperature, "40")
    dialog.seed.setFocus()
    dialog.seed.selectAll()
    qtbot.keyClicks(dialog.seed, "42")
    press_ok(qtbot, dialog)
    assert dialog.result() == QDialog.DialogCode.Accepted
    project = window.document.project
    settings = project.settings
    assert (project.title, project.revision) == ("Vibration front-end", "C")
    assert project.input.amplitude is not None and project.input.amplitude.si == pytest.approx(0.05)
    assert (settings.f_min_hz.si, settings.f_max_hz.si, settings.ref_hz.si) == (10.0, 200e3, 2e3)
    assert settings.noise_band_hz is not None
    assert (settings.noise_band_hz[0].si, settings.noise_band_hz[1].si) == (20.0, 10e3)
    assert settings.temperature_c.si == 40.0 and settings.seed == 42
    assert window.isWindowModified()
    assert window.wait_until_idle(60, formula=False)
    f_hz, _mag, _phase = window.response_view.trace_data("chain")
    assert f_hz[0] == pytest.approx(10.0) and f_hz[-1] == pytest.approx(200e3)  # the views follow
    undo(qtbot, window)  # one edit, one undo
    after = window.document.project
    assert (after.title, after.revision, after.settings.f_max_hz.raw, after.settings.noise_band_hz) == old_settings


def test_project_dialog_refuses_with_a_sentence_and_keeps_the_text(window, qtbot) -> None:  # type: ignore[no-untyped-def]
    dialog = window.project_dialog()
    type_into(qtbot, dialog.ref, "5M")  # above the analysed range (1 Hz … 1 MHz)
    press_ok(qtbot, dialog)
    assert dialog.result() != QDialog.DialogCode.Accepted
    assert dialog.problem.isVisibleTo(dialog) and "ref_hz" in dialog.problem.text()
    assert dialog.ref.text() == "5M"
    type_into(qtbot, dialog.ref, "")
    type_into(qtbot, dialog.band_high, "")
    press_ok(qtbot, dialog)
    assert "both edges of the noise band" in dialog.problem.text()
    assert window.document.undo_stack.count() == 0  # nothing changed


def test_converter_dialog_sets_rate_bits_and_full_scale(window, qtbot) -> None:  # type: ignore[no-untyped-def]
    dialog = window.converter_dialog()
    type_into(qtbot, dialog.fs, "192k")
    dialog.bits.setFocus()
    dialog.bits.selectAll()
    qtbot.keyClicks(dialog.bits, "24")
    type_into(qtbot, dialog.full_scale, "5.6")
    press_ok(qtbot, dialog)
    converter = window.document.project.converter
    assert (converter.fs_hz.si, converter.bits, converter.full_scale_vpp.si) == (192e3, 24, 5.6)
    assert window.wait_until_idle(60, formula=False)
    undo(qtbot, window)
    converter = window.document.project.converter
    assert (converter.fs_hz.si, converter.bits, converter.full_scale_vpp.si) == (48e3, 16, 4.0)


def test_new_block_stage_responds_as_its_poles_say(window, qtbot) -> None:  # type: ignore[no-untyped-def]
    window.document.set_current_stage("amp")
    dialog = window.new_block_stage_dialog()
    type_into(qtbot, dialog.name, "Sensor model")
    type_into(qtbot, dialog.gain, "2")
    type_into(qtbot, dialog.poles, "5k, 40k Q0.9")
    type_into(qtbot, dialog.zin_r, "100k")
    press_ok(qtbot, dialog)
    assert dialog.result() == QDialog.DialogCode.Accepted
    stages = window.document.project.stages
    assert [stage.name for stage in stages][2] == "Sensor model"  # placed after the selected stage
    block = stages[2]
    assert window.document.current_stage_id == block.id
    assert window.tree._stage_items[block.id].text(0).startswith("Sensor model")
    assert window.wait_until_idle(60, formula=False)
    f_hz, mag_db, _ = window.response_view.trace_data(f"{block.id}:isolated")
    s = 2j * np.pi * f_hz
    w1, w0 = 2 * np.pi * 5e3, 2 * np.pi * 40e3
    # Source: DESIGN section 5 block roots: a real pole at s = −2πf and a complex pair with ω0 and
    # Q, H(s) = K / ((1 + s/ω1)(s²/ω0² + s/(Qω0) + 1)) (standard second-order form, any control text).
    expected = 2 / ((1 + s / w1) * (s**2 / w0**2 + s / (0.9 * w0) + 1))
    np.testing.assert_allclose(mag_db, 20 * np.log10(np.abs(expected)), atol=1e-6)
    # Edit it again: the same dialog on the existing block, then undo back to what was typed first.
    window.document.set_current_stage(block.id)
    again = window.block_stage_dialog()
    assert again.poles.text() == "5k, 40k Q0.9"
    type_into(qtbot, again.zeros, "1k, 2k, 3k, 4k")  # more zeros than poles: refused with a sentence
    press_ok(qtbot, again)
    assert again.result() != QDialog.DialogCode.Accepted and "poles" in again.problem.text()
    type_into(qtbot, again.zeros, "")
    type_into(qtbot, again.gain, "4")
    press_ok(qtbot, again)
    assert window.document.project.stage(block.id).gain.si == 4.0
    undo(qtbot, window)
    assert window.document.project.stage(block.id).gain.si == 2.0


def test_check_editor_adds_library_and_typed_checks_and_undo_keeps_a_later_waiver(window, qtbot) -> None:  # type: ignore[no-untyped-def]
    window.document.set_current_stage("amp")
    dialog = window.check_editor_dialog()
    dialog.library_name.setCurrentIndex(dialog.library_name.findData("amplifier"))
    ids = [dialog.library_list.item(index).data(Qt.ItemDataRole.UserRole) for index in range(dialog.library_list.count())]
    for wanted in ("pm", "decoupling"):
        dialog.library_list.item(ids.index(wanted)).setCheckState(Qt.CheckState.Checked)
    qtbot.mouseClick(dialog.add_library, Qt.MouseButton.LeftButton)
    assert dialog.check_ids()[-2:] == ["pm", "decoupling"]
    qtbot.mouseClick(dialog.add_numeric, Qt.MouseButton.LeftButton)
    type_into(qtbot, dialog.id, "corner")
    type_into(qtbot, dialog.text, "The upper corner lies above 20 kHz.")
    dialog.metric_choice.setCurrentIndex(dialog.metric_choice.findData("f_high_3db_hz"))
    # The metric's words, unit and places come from the metric table.
    assert METRICS["f_high_3db_hz"].label in dialog.metric_words.text()
    assert not dialog.at_hz.isEnabled()  # a corner needs no frequency
    dialog.where.setCurrentIndex(dialog.where.findData("isolated"))
    type_into(qtbot, dialog.minimum, "20k")
    press_ok(qtbot, dialog)
    assert dialog.result() == QDialog.DialogCode.Accepted, dialog.problem.text()
    checks = {check.id: check for check in window.document.project.stage("amp").checks}
    assert set(checks) == {"gain", "layout", "pm", "decoupling", "corner"}
    corner = checks["corner"]
    assert (corner.metric, corner.where, corner.min.si, corner.max) == ("f_high_3db_hz", "isolated", 20e3, None)
    assert checks["decoupling"].is_manual
    assert window.wait_until_idle(60, formula=False)
    # What the user sees: the review panel lists the new checks with computed states.
    assert window.review_panel.check_state("corner") in ("met", "not met")
    assert window.review_panel.check_state("decoupling") == "open"
    # A waiver recorded after the edit is a review record: undoing the edit and redoing it keeps it.
    window.review_panel.waive("corner", "Ines Okafor", "reviewer", "Bandwidth set by the next stage.")
    undo(qtbot, window)
    assert "corner" not in {check.id for check in window.document.project.stage("amp").checks}
    window.redo_action.trigger()
    restored = {check.id: check for check in window.document.project.stage("amp").checks}["corner"]
    assert restored.waiver is not None and restored.waiver.by == "Ines Okafor"


def test_op_amp_library_model_is_picked_with_its_figures_and_copied(window, qtbot) -> None:  # type: ignore[no-untyped-def]
    from stagewise.files.templates import load_opamp_library

    library = load_opamp_library()
    name = sorted(library)[0]
    window.document.set_current_stage("amp")
    dialog = window.opamp_dialog("U1")
    rows = [dialog.table.item(row, 0).text() for row in range(dialog.table.rowCount())]
    assert rows[0] == "ideal" and "trial-3M" in rows and f"{name} (library)" in rows
    row = rows.index(f"{name} (library)")
    # Key figures shown beside each model, from the library's own numbers.
    gbw = dialog.table.item(row, 1).text()
    assert gbw.replace(" ", "").startswith(f"{library[name].gbw_hz.si / 1e6:g}M")
    rect = dialog.table.visualItemRect(dialog.table.item(row, 0))
    qtbot.mouseClick(dialog.table.viewport(), Qt.MouseButton.LeftButton, pos=rect.center())
    press_ok(qtbot, dialog)
    project = window.document.project
    assert project.stage("amp").part("U1").model == name
    assert name in project.opamp_models  # copied: the file stays self-contained
    undo(qtbot, window)
    assert project.stage("amp").part("U1").model == "trial-3M" and name not in project.opamp_models
    # Typing a library model's name in the parts table's Model cell does the same.
    window.parts_table.edit_cell("U1", "model", name)
    assert project.stage("amp").part("U1").model == name and name in project.opamp_models


def test_sign_and_save_as_have_shortcuts_of_their_own(window, qtbot, monkeypatch: pytest.MonkeyPatch) -> None:  # type: ignore[no-untyped-def]
    from PySide6.QtGui import QKeySequence

    from stagewise.ui.dialogs import SignoffDialog

    names = window.actions_by_name
    sign_keys = names["signStage"].shortcuts()
    save_as_keys = names["saveProjectAs"].shortcuts()
    assert sign_keys and not set(k.toString() for k in sign_keys) & set(k.toString() for k in save_as_keys)
    # Common practice, no source: Save as keeps the platform's own binding.
    assert save_as_keys == QKeySequence.keyBindings(QKeySequence.StandardKey.SaveAs)
    shown: list[str] = []
    monkeypatch.setattr(SignoffDialog, "exec", lambda dialog: shown.append(dialog.windowTitle()) or 0)
    monkeypatch.setattr(QFileDialog, "getSaveFileName", lambda *args, **kwargs: (shown.append("save as") or "", ""))
    window.document.set_current_stage("amp")
    window.activateWindow()
    window.tree.setFocus()
    qtbot.keyClick(window.tree, Qt.Key.Key_G, Qt.KeyboardModifier.ControlModifier | Qt.KeyboardModifier.ShiftModifier)
    for sequence in save_as_keys[:1]:
        combination = sequence[0]
        qtbot.keyClick(window.tree, combination.key(), combination.keyboardModifiers())
    assert shown == [f"Sign {window.document.project.stage('amp').name}", "save as"]


def test_check_editor_and_project_settings_open_from_their_keys(window, qtbot, monkeypatch: pytest.MonkeyPatch) -> None:  # type: ignore[no-untyped-def]
    from stagewise.ui.authoring import CheckEditorDialog, ProjectDialog

    opened: list[str] = []
    monkeypatch.setattr(CheckEditorDialog, "exec", lambda dialog: opened.append(dialog.windowTitle()) or 0)
    monkeypatch.setattr(ProjectDialog, "exec", lambda dialog: opened.append(dialog.windowTitle()) or 0)
    window.document.set_current_stage("rc")
    window.activateWindow()
    window.tree.setFocus()
    both = Qt.KeyboardModifier.ControlModifier | Qt.KeyboardModifier.ShiftModifier
    qtbot.keyClick(window.tree, Qt.Key.Key_K, both)
    qtbot.keyClick(window.tree, Qt.Key.Key_J, both)
    assert opened == [f"Checks of {window.document.project.stage('rc').name}", "Project settings"]


def test_noise_summary_and_packet_speak_words_not_keys(window, qtbot, tmp_path) -> None:  # type: ignore[no-untyped-def]
    import re

    import pypdf

    window.new_project()
    assert window.wait_until_idle(60, formula=False)
    summary = window.noise_view.summary
    # A short view shows the first sentence and the rest on hover (the label's tooltip).
    noise_text = (summary.toolTip() or summary.text()) + " " + window.noise_view.header.text()
    assert "settings." not in noise_text and "noise_band_hz" not in noise_text
    assert "no noise band is set" in noise_text
    path = tmp_path / "fresh.stagewise.json"
    assert window.save_to(path)
    output = tmp_path / "fresh.pdf"
    assert window.export_packet(output) is not None
    cover = re.sub(r"\s+", " ", pypdf.PdfReader(str(output)).pages[0].extract_text())
    # A chain without checks is not said to pass them.
    assert "Every check is met" not in cover and "no checks yet" in cover



def test_model_cell_offers_the_library_and_a_new_part_can_use_it(window, qtbot, monkeypatch: pytest.MonkeyPatch) -> None:  # type: ignore[no-untyped-def]
    from PySide6.QtWidgets import QApplication, QComboBox, QInputDialog

    from stagewise.files.templates import load_opamp_library
    from stagewise.ui.dialogs import NewPartDialog

    def no_rename(*_args: object, **_kwargs: object) -> None:
        raise AssertionError("F2 in the parts table must edit the cell, not rename the stage")

    monkeypatch.setattr(QInputDialog, "getText", no_rename)

    library = sorted(load_opamp_library())
    window.document.set_current_stage("amp")
    table = window.parts_table.table
    row = next(r for r in range(table.rowCount()) if table.item(r, 0).text() == "U1")
    window.activateWindow()
    table.setFocus()
    table.setCurrentCell(row, 5)
    qtbot.keyClick(table, Qt.Key.Key_F2)  # the platform's "edit" key opens the cell's editor
    editor = QApplication.focusWidget()
    combo = editor if isinstance(editor, QComboBox) else editor.parent()
    assert isinstance(combo, QComboBox)
    offered = [combo.itemText(index) for index in range(combo.count())]
    assert offered[:2] == ["ideal", "trial-3M"] and set(library) <= set(offered)
    combo.setCurrentIndex(offered.index(library[-1]))
    qtbot.keyClick(combo, Qt.Key.Key_Return)
    qtbot.waitUntil(lambda: table.state() != table.State.EditingState, timeout=5000)
    project = window.document.project
    assert project.stage("amp").part("U1").model == library[-1] and library[-1] in project.opamp_models

    def add_follower(dialog: NewPartDialog) -> int:
        dialog.type.setCurrentIndex(dialog.type.findData("opamp"))
        dialog.nodes.setText("out x x")
        dialog.model.setCurrentIndex(dialog.model.findText(library[0]))
        dialog.accept()
        return int(dialog.result())

    monkeypatch.setattr(NewPartDialog, "exec", add_follower)
    window.actions_by_name["addPart"].trigger()
    added = [part for part in project.stage("amp").parts if part.type == "opamp" and part.ref != "U1"]
    assert [part.model for part in added] == [library[0]] and library[0] in project.opamp_models
    window.undo_action.trigger()  # the part and the model it brought go together
    assert library[0] not in project.opamp_models


def test_f2_in_the_chain_tree_renames_the_stage(window, qtbot, monkeypatch: pytest.MonkeyPatch) -> None:  # type: ignore[no-untyped-def]
    from PySide6.QtWidgets import QInputDialog

    monkeypatch.setattr(QInputDialog, "getText", lambda *args, **kwargs: ("Input filter", True))
    window.document.set_current_stage("rc")
    window.activateWindow()
    window.tree.setFocus()
    qtbot.keyClick(window.tree, Qt.Key.Key_F2)
    assert window.document.project.stage("rc").name == "Input filter"


def test_check_editor_speaks_words_not_file_keys(window) -> None:  # type: ignore[no-untyped-def]
    window.document.set_current_stage("amp")
    dialog = window.check_editor_dialog()
    for index in range(dialog.metric_choice.count()):
        dialog.metric_choice.setCurrentIndex(index)
        words = dialog.metric_words.text()
        assert "settings." not in words and "at_hz" not in words, words
