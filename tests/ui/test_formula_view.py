"""The formula view: layout of the symbolic transfer function and its standard-form values."""

from __future__ import annotations

from stagewise.ui.formula_html import pretty


def test_pretty_writes_products_and_powers_as_engineers_do() -> None:
    # Common practice, no source: middle dot for products, superscript powers.
    assert pretty("R1*C1**2") == "R1·C1²"
    assert pretty("1/(2*pi*sqrt(C1*C2*R1*R2))") == "1/(2·π·√(C1·C2·R1·R2))"


def test_formula_of_the_rc_stage_names_its_corner(window) -> None:  # type: ignore[no-untyped-def]
    window.document.set_current_stage("rc")
    assert window.wait_until_idle(120, formula=True)
    text = window.formula_view.toPlainText()
    assert "H(s) =" in text and "C1" in text and "R1" in text
    # Source: RC low-pass corner f0 = 1/(2π·R·C) = 1/(2π·3.3 kΩ·6.8 nF) = 7.092 kHz.
    assert "f0 = " in text and "7.092 kHz" in text
    window.parts_table.edit_cell("R1", "value", "6k8")  # model changes → the formula follows
    assert window.wait_until_idle(120, formula=True)
    # Source: 1/(2π·6.8 kΩ·6.8 nF) = 3.442 kHz.
    assert "3.442 kHz" in window.formula_view.toPlainText()
