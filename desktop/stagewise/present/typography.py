"""Typography of printed text: a number and its unit stay together (no Qt).

SI writing puts a space between a number and its unit (``5 kHz``, ``0 Ω``, ``1 %``; BIPM, *The
International System of Units*, 9th ed., 2019, section 5.4.3) and never breaks a line there.
:func:`keep_units_together` makes that space a no-break space and inserts one where a unit was
glued to its number (``0Ω`` → ``0 Ω``), so a line wrapper splitting at ordinary spaces keeps
``25.97 dB`` on one line.
"""

from __future__ import annotations

import re

__all__ = ["NO_BREAK_SPACE", "keep_units_together"]

NO_BREAK_SPACE = "\u00a0"

_UNIT = r"(?:[fpnuµmkMG]?(?:Hz|V|A|Ω|F|H|s|W|S|rad)|dB[ΩSV]?|%|°|ppm|bits?|LSB|nV|µV)(?![A-Za-z])"
_SPACED = re.compile(r"(?<=\d) (?=" + _UNIT + ")")
_GLUED = re.compile(r"(?<=\d)(?=(?:Ω|%)(?![A-Za-z]))")


def keep_units_together(text: str) -> str:
    """``text`` with a no-break space between every number and the unit after it."""
    return _GLUED.sub(NO_BREAK_SPACE, _SPACED.sub(NO_BREAK_SPACE, text))
