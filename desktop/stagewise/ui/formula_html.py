"""The stage formula as legible rich text: H(s) as a fraction, then the standard-form sections.

Input is the JSON-ready form of ``stagewise.engine.symbolic.SymbolicForm.as_dict()`` (strings
from sympy, values in SI); this module only lays the text out.
"""

from __future__ import annotations

import html
from typing import Any

from stagewise.model.values import format_value
from stagewise.present.formula import finite_gain_lines, polynomial, pretty

__all__ = ["formula_html", "pretty"]  # pretty: from stagewise.present.formula (one renderer)


def _value(number: float | None, unit: str) -> str:
    return "" if number is None else f" = {format_value(number, unit)}"


def formula_html(form: dict[str, Any], stage_name: str, finite: dict[str, Any] | None = None) -> str:
    """Rich text for the formula view; ``finite`` is the stage's finite-gain form, when it has one
    (then ``form`` is its ideal-op-amp form, and the finite-gain factor follows it)."""
    escape = html.escape
    unit = form.get("unit") or "V/V"
    title = "ideal op-amps" if finite is not None else "stage alone"
    parts = [f"<p><b>{escape(stage_name)}</b>: transfer function, {title} ({escape(unit)})</p>"]
    if not form.get("denominator"):
        parts.append(f"<p>No formula: {escape(form.get('why') or 'unknown reason')}</p>")
        return "".join(parts)
    numerator = escape(polynomial(form["numerator"]))
    denominator = escape(polynomial(form["denominator"]))
    parts.append(
        "<table cellspacing='0' cellpadding='2'><tr>"
        "<td rowspan='3' valign='middle'><span style='font-size:large'>H(s) =&nbsp;</span></td>"
        f"<td align='center'>{numerator}</td></tr>"
        "<tr><td><hr/></td></tr>"
        f"<tr><td align='center'>{denominator}</td></tr></table>"
    )
    if finite is not None:
        parts.append("<p><b>Finite op-amp gain</b></p><p>" + "<br/>".join(escape(line) for line in finite_gain_lines(finite))
                     + "</p>")
    if form.get("numeric"):
        parts.append(f"<p><i>Numeric coefficients: {escape(form.get('why') or '')}</i></p>")
    sections = form.get("sections") or []
    if sections:
        parts.append("<p><b>Standard form</b> (ω0 = 2π·f0, ζ = 1/(2Q))</p><ul>")
        for number, section in enumerate(sections, start=1):
            lines = [f"section {number}: order {section['order']}, {escape(section['kind'])}"]
            if section.get("gain") is not None:
                lines.append(f"K = {escape(pretty(section['gain']))}{escape(_value(section.get('gain_value'), ''))}")
            if section.get("f0_hz") is not None:
                lines.append(f"f0 = {escape(pretty(section['f0_hz']))}{escape(_value(section.get('f0_hz_value'), 'Hz'))}")
            if section.get("q") is not None:
                q_value = section.get("q_value")
                q_text = f" = {q_value:.4g}" if q_value is not None else ""
                lines.append(f"Q = {escape(pretty(section['q']))}{q_text}")
            if section.get("zeta_value") is not None:
                lines.append(f"ζ = {section['zeta_value']:.4g}")
            parts.append("<li>" + "<br/>".join(lines) + "</li>")
        parts.append("</ul>")
    return "".join(parts)
