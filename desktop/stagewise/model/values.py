"""Engineering values: parsing, formatting and preferred-value snapping.

Values arrive as JSON numbers or as text such as ``4700``, ``4.7k``, ``4k7`` (IEC 60062
letter-and-digit code), ``2.2u``, ``2.2µ``, ``10nF``, ``1 MΩ``, ``1Meg``, ``3.3e-9`` or ``1%``.
They are parsed here by a regular expression, never by ``eval`` or a symbolic parser: text from
a project file must never be able to execute code.

References
----------
IEC 60062:2016, letter and digit code for resistance and capacitance values.
IEC 60063:2015, preferred number series for resistors and capacitors (E6 ... E192).
BIPM, The International System of Units (SI Brochure), 9th ed., 2019: SI prefixes.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from typing import Final

__all__ = [
    "ACCEPTED_FORMS",
    "UNIT_QUANTITIES",
    "E_SERIES_NAMES",
    "Quantity",
    "ValueSyntaxError",
    "e_series",
    "format_value",
    "parse_value",
    "snap_to_series",
    "unit_mismatch",
    "unit_symbol",
]


class ValueSyntaxError(ValueError):
    """Raised when a text is not an engineering value."""


SI_PREFIXES: Final[dict[str, float]] = {
    "f": 1e-15,
    "p": 1e-12,
    "n": 1e-9,
    "u": 1e-6,
    "µ": 1e-6,  # U+00B5 MICRO SIGN
    "μ": 1e-6,  # U+03BC GREEK SMALL LETTER MU
    "m": 1e-3,
    "k": 1e3,
    "K": 1e3,
    "M": 1e6,
    "Meg": 1e6,
    "MEG": 1e6,
    "meg": 1e6,
    "G": 1e9,
}

_PREFIX_EXPONENTS: Final[dict[str, int]] = {
    prefix: round(math.log10(scale)) for prefix, scale in SI_PREFIXES.items()
}

# Units that may follow a value. They are checked for spelling and otherwise ignored: the field
# that holds the value decides its unit.
UNIT_WORDS: Final[tuple[str, ...]] = (
    "ohms",
    "ohm",
    "Ω",
    "\u2126",  # U+2126 OHM SIGN
    "Hz",
    "dB",
    "V/s",
    "F",
    "H",
    "V",
    "A",
    "S",
    "s",
)

# The symbol each written unit stands for, and what that symbol measures (for messages).
_UNIT_SYMBOLS: Final[dict[str, str]] = {"ohms": "\u03a9", "ohm": "\u03a9", "\u2126": "\u03a9"}  # Ω
UNIT_QUANTITIES: Final[dict[str, str]] = {
    "Ω": "a resistance", "F": "a capacitance", "H": "an inductance", "S": "a conductance",
    "V": "a voltage", "A": "a current", "Hz": "a frequency", "s": "a time", "dB": "a level in decibels",
    "V/s": "a slew rate", "%": "a percentage",
}

ACCEPTED_FORMS: Final[str] = (
    "a number such as 4700, 4.7k, 4k7, 2.2u, 2.2µ, 10nF, 1 MΩ, 1Meg, 3.3e-9 or 1% "
    "(prefixes f p n u µ m k M G; M is mega, m is milli)"
)

_PREFIX_PATTERN = "Meg|MEG|meg|[fpnuµμmkKMG]"
_UNIT_PATTERN = "|".join(re.escape(word) for word in UNIT_WORDS)

# 4.7k, 10nF, 3.3e-9, 1 MΩ, 1%. Digits are ASCII only ([0-9], not \d, which would also take
# other scripts' digits), and an exponent never combines with a prefix ("1e3k" is refused).
_DECIMAL = re.compile(
    rf"(?P<number>[+-]?(?:[0-9]+(?:\.[0-9]*)?|\.[0-9]+))(?P<exponent>[eE][+-]?[0-9]{{1,3}})?"
    rf"[ \u00a0\u202f]?(?:(?P<percent>%)|(?P<prefix>{_PREFIX_PATTERN})?[ \u00a0\u202f]?(?P<unit>{_UNIT_PATTERN})?)"
)
# 4k7, 2R2, R47, 1M5 (IEC 60062: the prefix letter stands where the decimal marker would)
_LETTER_DIGIT = re.compile(
    rf"(?P<sign>[+-]?)(?P<whole>[0-9]*)(?P<letter>[Rr]|[fpnuµμmkKMG])(?P<fraction>[0-9]+)"
    rf"[ \u00a0\u202f]?(?P<unit>{_UNIT_PATTERN})?"
)


def _shown(value: object) -> str:
    """A short, printable quotation of ``value`` for an error message."""
    if isinstance(value, str):
        text = "".join(character if character.isprintable() else " " for character in value)
        if len(text) > 40:
            text = text[:37] + "…"
        return f'"{text}"'
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int) and abs(value) > 10**30:
        return "an integer too large for a value"
    if value is None:
        return "null"
    if isinstance(value, list):
        return "a list"
    if isinstance(value, dict):
        return "an object"
    return repr(value)


def parse_value(value: object) -> float:
    """Parse an engineering value into a float in SI base units.

    Parameters
    ----------
    value : str, int or float
        A JSON number or text in one of the :data:`ACCEPTED_FORMS`.

    Returns
    -------
    float
        The value in SI base units (ohm, farad, henry, hertz, ...); a percentage as a fraction.

    Raises
    ------
    ValueSyntaxError
        With a sentence that quotes the text and says what is accepted.

    Examples
    --------
    >>> parse_value("4k7")
    4700.0
    >>> parse_value("10nF")
    1e-08
    """
    if isinstance(value, bool):
        raise ValueSyntaxError(f"{_shown(value)} is not a value; expected {ACCEPTED_FORMS}")
    if isinstance(value, int | float):
        try:
            number = float(value)
        except OverflowError:  # an integer beyond the range of a float
            number = math.inf
        if not math.isfinite(number):
            raise ValueSyntaxError(f"{_shown(value)} is not a finite value")
        return number
    if not isinstance(value, str):
        raise ValueSyntaxError(f"{_shown(value)} is not a value; expected {ACCEPTED_FORMS}")
    text = value.strip()
    if len(text) > 64:
        raise ValueSyntaxError(f"{_shown(text)} is not a value; expected {ACCEPTED_FORMS}")
    match = _DECIMAL.fullmatch(text)
    if match is not None:
        if match["exponent"] and (match["prefix"] or match["percent"]):
            raise ValueSyntaxError(f'"{text}" mixes an exponent with a prefix or %; write 3.3e-9 or 3.3n, not both')
        # Scale by shifting the decimal exponent, not by multiplying, so that "4.7n" is the
        # float nearest to 4.7e-9 (4.7 * 1e-9 is not).
        if match["percent"]:
            number = float(match["number"] + "e-2")
        elif match["prefix"]:
            number = float(f"{match['number']}e{_PREFIX_EXPONENTS[match['prefix']]}")
        else:
            number = float(match["number"] + (match["exponent"] or ""))
    else:
        match = _LETTER_DIGIT.fullmatch(text)
        if match is None or not (match["whole"] or match["letter"] in "Rr"):
            raise ValueSyntaxError(f"{_shown(text)} is not a value; expected {ACCEPTED_FORMS}")
        letter = match["letter"]
        exponent = 0 if letter in "Rr" else _PREFIX_EXPONENTS[letter]
        number = float(f"{match['whole'] or '0'}.{match['fraction']}e{exponent}")
        if match["sign"] == "-":
            number = -number
    if not math.isfinite(number):
        raise ValueSyntaxError(f'"{text}" is out of range')
    return number


def unit_symbol(value: object) -> str | None:
    """The unit written after a value (``"Ω"`` for ``"1 MΩ"`` or ``"10 ohm"``, ``"%"`` for ``"1%"``).

    ``None`` for a bare number, a JSON number, or text that is not a value (the parser says so).

    Examples
    --------
    >>> unit_symbol("10nF"), unit_symbol("4k7"), unit_symbol(4700)
    ('F', None, None)
    """
    if not isinstance(value, str):
        return None
    text = value.strip()
    match = _DECIMAL.fullmatch(text)
    if match is not None:
        if match["percent"]:
            return "%"
        unit = match["unit"]
    else:
        match = _LETTER_DIGIT.fullmatch(text)
        unit = None if match is None else match["unit"]
    if unit is None:
        return None
    return _UNIT_SYMBOLS.get(unit, unit)


def unit_mismatch(value: object, expected: str, what: str) -> str | None:
    """One sentence when ``value`` is written with a unit other than ``expected``, else ``None``.

    Parameters
    ----------
    value : object
        The value as written (a bare number is always accepted: the field decides its unit).
    expected : str
        The unit symbol the field takes (``"Ω"``, ``"F"``...), or ``""`` for a plain number.
    what : str
        What the field is, for the sentence: ``"a resistor takes ohms"``.

    Examples
    --------
    >>> unit_mismatch("10nF", "Ω", "a resistor takes ohms")
    '"10nF" is a capacitance, a resistor takes ohms'
    """
    written = unit_symbol(value)
    if written is None or written == expected:
        return None
    quantity = UNIT_QUANTITIES.get(written, f"in {written}")
    return f"{_shown(value)} is {quantity}, {what}"


_FORMAT_PREFIXES: Final[tuple[tuple[float, str], ...]] = (
    (1e9, "G"),
    (1e6, "M"),
    (1e3, "k"),
    (1.0, ""),
    (1e-3, "m"),
    (1e-6, "µ"),
    (1e-9, "n"),
    (1e-12, "p"),
    (1e-15, "f"),
)


def format_value(value: float, unit: str = "", digits: int = 4) -> str:
    """Format a value with an SI prefix and ``digits`` significant digits.

    Trailing zeros are dropped, so 4700 Ω reads ``4.7 kΩ``; the result parses back with
    :func:`parse_value` (the unit symbols it uses are accepted there).

    Parameters
    ----------
    value : float
        Value in SI base units.
    unit : str
        Unit symbol to append (``"Ω"``, ``"F"``, ``"Hz"``, ...).
    digits : int
        Significant digits, 3 or 4 in the program.

    Examples
    --------
    >>> format_value(4700, "Ω")
    '4.7 kΩ'
    >>> format_value(2.2e-6, "F")
    '2.2 µF'
    """
    if value is None or not math.isfinite(value):
        return "—"
    if value == 0:
        return f"0 {unit}".rstrip()
    magnitude = abs(value)
    scale, prefix = _FORMAT_PREFIXES[-1]
    for candidate_scale, candidate_prefix in _FORMAT_PREFIXES:
        if magnitude >= candidate_scale * (1 - 0.5 * 10.0 ** (1 - digits)):
            scale, prefix = candidate_scale, candidate_prefix
            break
    scaled = value / scale
    if abs(scaled) >= 1000 - 0.5 * 10.0 ** (4 - digits) and prefix != "G":
        # Rounding carried into the next prefix (999.96 k -> 1 M).
        index = [p for _, p in _FORMAT_PREFIXES].index(prefix)
        scale, prefix = _FORMAT_PREFIXES[index - 1]
        scaled = value / scale
    if abs(scaled) >= 1e4 or abs(scaled) < 1e-3:
        text = f"{value:.{digits - 1}e}"
        return f"{text} {unit}".rstrip()
    decimals = max(digits - 1 - int(math.floor(math.log10(abs(scaled)))), 0)
    text = f"{scaled:.{decimals}f}"
    if "." in text:
        text = text.rstrip("0").rstrip(".")
    return f"{text} {prefix}{unit}".rstrip()


@dataclass(frozen=True, slots=True)
class Quantity:
    """A value as written in the file (``raw``) and in SI base units (``si``).

    The raw form is kept so that a saved file shows what the engineer typed (``"4k7"``), and
    the canonical file round-trips byte for byte.
    """

    raw: str | int | float
    si: float

    @classmethod
    def of(cls, raw: object) -> Quantity:
        """Parse ``raw`` (a JSON number or text); raises :class:`ValueSyntaxError`."""
        si = parse_value(raw)
        if isinstance(raw, str):
            return cls(raw.strip(), si)
        return cls(raw, si)  # type: ignore[arg-type]

    def __float__(self) -> float:
        return self.si

    def __str__(self) -> str:
        return str(self.raw)


# IEC 60063:2015. E24 and below are listed (they do not follow the rounding formula);
# E48, E96 and E192 are 10**(i/N) rounded to three significant digits, with the one
# published exception 9.20 (not 9.19) in E192.
_E24: Final[tuple[float, ...]] = (
    1.0, 1.1, 1.2, 1.3, 1.5, 1.6, 1.8, 2.0, 2.2, 2.4, 2.7, 3.0,
    3.3, 3.6, 3.9, 4.3, 4.7, 5.1, 5.6, 6.2, 6.8, 7.5, 8.2, 9.1,
)  # fmt: skip

E_SERIES_NAMES: Final[tuple[str, ...]] = ("E6", "E12", "E24", "E48", "E96", "E192")


def e_series(name: str) -> tuple[float, ...]:
    """The mantissas of a preferred-number series, from 1.0 up to (not including) 10.

    Parameters
    ----------
    name : str
        One of ``E6``, ``E12``, ``E24``, ``E48``, ``E96``, ``E192``.
    """
    key = name.strip().upper()
    if key == "E24":
        return _E24
    if key == "E12":
        return _E24[::2]
    if key == "E6":
        return _E24[::4]
    if key in ("E48", "E96", "E192"):
        count = int(key[1:])
        values = [round(10 ** (i / count), 2) for i in range(count)]
        if count == 192:
            values[185] = 9.20
        return tuple(values)
    raise ValueError(f'"{name}" is not a preferred-value series; use one of {", ".join(E_SERIES_NAMES)}')


def snap_to_series(value: float, series: str = "E24") -> float:
    """The preferred value nearest to ``value`` on a logarithmic scale.

    Parameters
    ----------
    value : float
        A positive value in SI base units.
    series : str
        ``E6`` ... ``E192``.

    Examples
    --------
    >>> snap_to_series(4600, "E12")
    4700.0
    """
    if not value > 0 or not math.isfinite(value):
        raise ValueError(f"only positive finite values snap to a series, not {value!r}")
    mantissas = e_series(series)
    decade = math.floor(math.log10(value))
    best = value
    best_error = math.inf
    for shift in (-1, 0, 1):
        for mantissa in mantissas:
            candidate = mantissa * 10.0 ** (decade + shift)
            error = abs(math.log(candidate / value))
            if error < best_error:
                best, best_error = candidate, error
    # Remove binary noise (4.7 * 10**3 -> 4700.000000000001).
    return float(f"{best:.3e}")
