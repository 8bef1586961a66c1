"""The stage formula as legible rich text: H(s) as a fraction, then the standard-form sections.

Input is the JSON-ready form of ``stagewise.engine.symbolic.SymbolicForm.as_dict()`` (strings
from sympy, values in SI); this module only lays the text out.
"""

from __future__ import annotations

import html
import re
from typing import Any

from stagewise.model.values import format_value

__all__ = ["formula_html", "pretty"]

_SUPERSCRIPTS = str.maketrans("0123456789", "⁰¹²³⁴⁵⁶⁷⁸⁹")


def pretty(expression: str) -> str:
    """sympy's plain text made readable: ``R1*C1**2`` → ``R1·C1²``, ``sqrt(x)`` → ``√(x)``."""
    text = re.sub(r"\*\*(\d+)", lambda match: match[1].translate(_SUPERSCRIPTS), expression)
    text = text.replace("**", "^").replace("*", "·").replace("sqrt", "√").replace("pi", "π")
    return text


def _polynomial(coefficients: list[str | None]) -> str:
    """Σ c_i·s^(n−i), highest power first, terms with a zero coefficient left out."""
    degree = len(coefficients) - 1
    terms = []
    for index, coefficient in enumerate(coefficients):
        if coefficient is None or coefficient.strip() in ("0", "0.0"):
            continue
        power = degree - index
        text = pretty(coefficient)
        needs_brackets = power > 0 and any(sign in text.lstrip("-") for sign in "+-")
        if needs_brackets:
            text = f"({text})"
        if power == 0:
            terms.append(text)
        else:
            s_power = "s" if power == 1 else "s" + str(power).translate(_SUPERSCRIPTS)
            terms.append(s_power if text == "1" else f"{text}·{s_power}")
    return " + ".join(terms).replace("+ -", "− ") or "0"


def _value(number: float | None, unit: str) -> str:
    return "" if number is None else f" = {format_value(number, unit)}"


def formula_html(form: dict[str, Any], stage_name: str) -> str:
    """Rich text for the formula view."""
    escape = html.escape
    unit = form.get("unit") or "V/V"
    parts = [f"<p><b>{escape(stage_name)}</b>: transfer function, stage alone ({escape(unit)})</p>"]
    if not form.get("denominator"):
        parts.append(f"<p>No formula: {escape(form.get('why') or 'unknown reason')}</p>")
        return "".join(parts)
    numerator = escape(_polynomial(form["numerator"]))
    denominator = escape(_polynomial(form["denominator"]))
    parts.append(
        "<table cellspacing='0' cellpadding='2'><tr>"
        "<td rowspan='3' valign='middle'><span style='font-size:large'>H(s) =&nbsp;</span></td>"
        f"<td align='center'>{numerator}</td></tr>"
        "<tr><td><hr/></td></tr>"
        f"<tr><td align='center'>{denominator}</td></tr></table>"
    )
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
