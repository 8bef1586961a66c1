"""Formulas as mathematics, one renderer for the program's formula view and the packet (no Qt).

Input is the JSON-ready output of :mod:`stagewise.engine.symbolic` (sympy's plain strings, values
in SI). Output is Unicode mathematics: ``R1·C1²``, ``√(C1·C2)``, ``s³``, a minus sign, never the
programmer's ``**`` or ``*``. An op-amp stage with finite op-amps reads as an engineer writes it:
the ideal-op-amp form in the part symbols, then the finite-gain factor 1/(1 + 1/(A(s)·β)) with its
numbers (:func:`stagewise.engine.symbolic.finite_gain_form`).
"""

from __future__ import annotations

import re
from typing import Any

from stagewise.model.values import format_value

__all__ = ["finite_gain_lines", "polynomial", "pretty"]

_SUPERSCRIPTS = str.maketrans("0123456789-", "⁰¹²³⁴⁵⁶⁷⁸⁹⁻")
_NUMBER = re.compile(r"(\d+(?:\.\d+)?)e([+-]?)(\d+)")


def _power_of_ten(match: re.Match[str]) -> str:
    sign = "-" if match[2] == "-" else ""
    return f"{match[1]}·10{(sign + str(int(match[3]))).translate(_SUPERSCRIPTS)}"


def pretty(expression: str) -> str:
    """sympy's plain text as mathematics: ``R1*C1**2`` → ``R1·C1²``, ``sqrt(x)`` → ``√(x)``,
    ``1.5e+8`` → ``1.5·10⁸``, ``pi`` → ``π``."""
    text = re.sub(r"\*\*(\d+)", lambda match: match[1].translate(_SUPERSCRIPTS), expression)
    text = re.sub(r"\*\*\((-?\d+)\)", lambda match: match[1].translate(_SUPERSCRIPTS), text)
    text = text.replace("**", "^").replace("*", "·").replace("sqrt", "√")
    text = re.sub(r"\bpi\b", "π", text)
    text = _NUMBER.sub(_power_of_ten, text)
    return text.replace(" - ", " − ").replace("(-", "(−")


def polynomial(coefficients: list[str | None]) -> str:
    """Σ c_i·s^(n−i), highest power first, terms with a zero coefficient left out."""
    degree = len(coefficients) - 1
    terms = []
    for index, coefficient in enumerate(coefficients):
        if coefficient is None or coefficient.strip() in ("0", "0.0"):
            continue
        power = degree - index
        text = pretty(coefficient)
        needs_brackets = power > 0 and any(sign in text.lstrip("-−") for sign in "+-−")
        if needs_brackets:
            text = f"({text})"
        if power == 0:
            terms.append(text)
        else:
            s_power = "s" if power == 1 else "s" + str(power).translate(_SUPERSCRIPTS)
            terms.append(s_power if text == "1" else f"{text}·{s_power}")
    return " + ".join(terms).replace("+ -", "− ").replace("+ −", "− ") or "0"


def _number(value: float) -> str:
    return f"{value:.4g}".replace("-", "−")


def finite_gain_lines(document: dict[str, Any]) -> list[str]:
    """The finite-gain factor of an op-amp stage in lines of mathematics with its numbers.

    ``document`` is :func:`stagewise.engine.symbolic.finite_gain_form`'s result.
    """
    lines = ["H(s) = H_ideal(s) · 1 / (1 + 1/(A(s)·β))   (H_ideal: every op-amp ideal; A: open-loop gain; "
             "β: feedback factor)"]
    for entry in document.get("opamps") or []:
        a0 = float(entry["a0"])
        words = (f"{entry['ref']}: A(s) = A0 / (1 + s·A0/(2π·GBW)), A0 = {_number(float(entry['a0_db']))} dB "
                 f"({format_value(a0, '', 4).strip()}), GBW = {format_value(float(entry['gbw_hz']), 'Hz')}")
        if entry.get("p2_hz"):
            words += f", second pole {format_value(float(entry['p2_hz']), 'Hz')} (in the exact response)"
        lines.append(words)
        beta = entry.get("beta")
        if beta is not None and beta > 0:
            text = f"    β = {_number(beta)} (1/β = {_number(1 / beta)})"
            if entry.get("crossover_hz") is not None:
                text += (f"; loop gain A·β crosses 1 at {format_value(float(entry['crossover_hz']), 'Hz')} "
                         f"(≈ β·GBW = {format_value(beta * float(entry['gbw_hz']), 'Hz')})")
            if entry.get("phase_margin_deg") is not None:
                text += f", phase margin {_number(float(entry['phase_margin_deg']))}°"
            lines.append(text)
    if document.get("ref_hz") is not None and document.get("factor_db_at_ref") is not None:
        lines.append(f"At {format_value(float(document['ref_hz']), 'Hz')} the exact response differs from H_ideal "
                     f"by {_number(float(document['factor_db_at_ref']))} dB and "
                     f"{_number(float(document['factor_deg_at_ref']))}°.")
    if document.get("why"):
        lines.append(str(document["why"]))
    return lines
