"""Review details as the user sees them: an undone edit brings back the sign-off that matches, the
tree counts waived checks apart, the Waive dialog never offers a met check, and the step summary
names the settling bands a check can take."""

from __future__ import annotations

import math
from typing import Any

import pytest

from stagewise.ui.dialogs import WaiverDialog


def test_undo_brings_back_the_older_matching_signoff(window, qtbot) -> None:  # type: ignore[no-untyped-def]
    window.document.set_current_stage("rc")
    window.review_panel.sign("Ines Okafor", "reviewer", "accept", "corner as intended")
    assert window.review_panel.state.property("signoffState") == "accepted"
    window.parts_table.edit_cell("R1", "value", "6k8")
    assert window.review_panel.state.property("signoffState") == "out of date"
    window.review_panel.sign("Ines Okafor", "reviewer", "rework", "the corner moved too low")
    assert window.review_panel.state.property("signoffState") == "returned for rework"
    window.undo_action.trigger()  # the design the first sign-off was given to
    assert window.review_panel.state.property("signoffState") == "accepted"
    assert window.tree._stage_items["rc"].text(3).startswith("accepted")


def test_tree_counts_waived_checks_apart_from_met_ones(window, qtbot) -> None:  # type: ignore[no-untyped-def]
    window.document.set_current_stage("amp")
    window.review_panel.waive("gain", "Ines Okafor", "reviewer", "gain trimmed at calibration")
    assert window.wait_until_idle(60, formula=False)
    shown = window.tree._stage_items["amp"].text(3)
    # Source: the waiver dialog's own rule, a waived check counts as waived, never as met.
    assert "0/2, 1 waived" in shown


def _offered(window, monkeypatch: pytest.MonkeyPatch) -> Any:  # type: ignore[no-untyped-def]
    offered: list[Any] = []

    def capture(dialog: WaiverDialog) -> int:
        offered.append(dialog.check.currentData())
        offered.append(dialog.buttons.button(dialog.buttons.StandardButton.Ok).isEnabled())
        return 0

    monkeypatch.setattr(WaiverDialog, "exec", capture)
    window.actions_by_name["waiveCheck"].trigger()
    return offered


def test_waive_dialog_offers_a_failing_check_and_never_a_met_one(window, qtbot,  # type: ignore[no-untyped-def]
                                                                monkeypatch: pytest.MonkeyPatch) -> None:
    window.document.set_current_stage("amp")
    states = {check.id: window.review_panel.check_state(check.id) for check in window.document.project.stage("amp").checks}
    failing = [check_id for check_id, state in states.items() if state in ("not met", "no value", "open")]
    assert failing, states  # the sample has an open manual check
    assert _offered(window, monkeypatch) == [failing[0], False]
    # Once everything passes, nothing is chosen for the user.
    window.review_panel.answer("layout", "yes", "Ines Okafor", "seen")
    assert window.wait_until_idle(60, formula=False)
    assert [window.review_panel.check_state(check_id) for check_id in states] == ["met", "met"]
    assert _offered(window, monkeypatch) == [None, False]


def test_step_summary_names_both_settling_bands(window) -> None:  # type: ignore[no-untyped-def]
    window.document.set_current_stage("rc")
    assert window.wait_until_idle(60, formula=False)
    text = window.step_view.summary.text()
    assert "within 1 % in" in text and "within 0.1 % in" in text
    # Source: first-order step 1 − exp(−t/τ): settling to a band b takes τ·ln(1/b) (any control text);
    # the sample's RC is 3.3 kΩ and 6.8 nF, τ = 22.44 µs: 1 % → 103.3 µs, 0.1 % → 155.0 µs.
    tau = 3.3e3 * 6.8e-9
    assert f"{tau * math.log(100) * 1e6:.4g} µs" in text.replace("\u00a0", " ")
    assert f"{tau * math.log(1000) * 1e6:.4g} µs" in text.replace("\u00a0", " ")


def test_the_review_words_the_user_reads(window, qtbot) -> None:  # type: ignore[no-untyped-def]
    from stagewise.ui.dialogs import SignoffDialog

    dialog = SignoffDialog("Input RC", "Ines Okafor", "reviewer", window)
    assert [dialog.verdict.itemText(index) for index in range(dialog.verdict.count())] == [
        "Accepted", "Returned for rework"]
    window.document.set_current_stage("rc")
    window.review_panel.sign("Ines Okafor", "reviewer", "accept", "")
    window.parts_table.edit_cell("R1", "value", "6k8")
    window.review_panel.sign("Ines Okafor", "reviewer", "accept", "")
    window.parts_table.edit_cell("R1", "value", "8k2")
    lines = [window.review_panel.signoffs.item(row).text() for row in range(window.review_panel.signoffs.count())]
    # Newest first: the latest sign-off is out of date, the earlier one is replaced by it.
    assert lines[0].startswith("OUT OF DATE: Ines Okafor") and "accepted, given to an earlier design" in lines[0]
    assert "replaced by a later sign-off of the same reviewer" in lines[1]
    assert window.review_panel.state.text().startswith("Out of date: every sign-off was given to an earlier design")
