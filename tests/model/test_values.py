"""Engineering values: every accepted and rejected form, format -> parse round trips, E series."""

from __future__ import annotations

import math

import pytest
from hypothesis import given
from hypothesis import strategies as st

from stagewise.model.values import (
    E_SERIES_NAMES,
    Quantity,
    ValueSyntaxError,
    e_series,
    format_value,
    parse_value,
    snap_to_series,
)

# Source: BIPM, The International System of Units (SI Brochure), 9th ed. 2019, table 7 (SI prefixes);
# IEC 60062:2016, letter-and-digit code (the letter stands in place of the decimal marker).
ACCEPTED = [
    ("4700", 4700.0),
    ("4.7k", 4700.0),
    ("4k7", 4700.0),
    ("4K7", 4700.0),
    ("2.2u", 2.2e-6),
    ("2.2µ", 2.2e-6),  # U+00B5 MICRO SIGN
    ("2.2μ", 2.2e-6),  # U+03BC GREEK SMALL LETTER MU
    ("2µ2", 2.2e-6),
    ("10nF", 1e-8),
    ("4n7", 4.7e-9),
    ("1 MΩ", 1e6),
    ("1 MΩ", 1e6),  # U+2126 OHM SIGN
    ("1Meg", 1e6),
    ("1MEG", 1e6),
    ("1meg", 1e6),
    ("1M5", 1.5e6),
    ("3.3e-9", 3.3e-9),
    ("3.3E-9", 3.3e-9),
    ("1e6", 1e6),
    ("1%", 0.01),
    ("0.5 %", 0.005),
    ("R47", 0.47),
    ("2R2", 2.2),
    ("2r2", 2.2),
    ("47p", 47e-12),
    ("1f", 1e-15),
    ("1m", 1e-3),
    ("1M", 1e6),
    ("1G", 1e9),
    ("100 mH", 0.1),
    ("20 kHz", 2e4),
    ("10 MHz", 1e7),
    ("1 mHz", 1e-3),
    ("2e7 V/s", 2e7),
    ("110 dB", 110.0),
    ("5 V", 5.0),
    ("1 mA", 1e-3),
    ("1 mS", 1e-3),
    ("1 ms", 1e-3),
    ("47 ohm", 47.0),
    ("47 ohms", 47.0),
    ("1 µH", 1e-6),
    ("-3.3", -3.3),
    ("+12", 12.0),
    ("-4k7", -4700.0),
    (".5", 0.5),
    ("5.", 5.0),
    ("  4k7  ", 4700.0),
    ("0", 0.0),
    ("1\u00a0kΩ", 1e3),  # no-break space between number and prefix
    (4700, 4700.0),
    (3.3e-9, 3.3e-9),
    (0, 0.0),
    (-2, -2.0),
]

REJECTED = [
    "4k7x",
    "4.7.1",
    "k7",
    "",
    "   ",
    "nan",
    "NaN",
    "inf",
    "Infinity",
    "1e999",
    "1e3k",  # an exponent and a prefix at once
    "1e-2%",
    "0x10",
    "1_000",
    "1,5k",
    "4 k7",
    "1  k",  # two spaces
    "10**6",
    "1/2",
    "2*3",
    "1k%",
    "1 T",  # tera is not among the accepted prefixes
    "1 a",
    "1 kk",
    "1 MΩx",
    "4k7k",
    "٣",  # ARABIC-INDIC DIGIT THREE: digits are ASCII only
    "４７００",  # fullwidth digits
    "__import__('os').system('x')",
    "eval('1')",
    "lambda: 1",
    "1; rm -rf /",
    "1" * 65,
    True,
    False,
    None,
    [1],
    {"value": 1},
    float("nan"),
    float("inf"),
    -float("inf"),
    10**400,  # an integer beyond the range of a float
]


@pytest.mark.parametrize(("text", "expected"), ACCEPTED)
def test_accepted_forms(text: object, expected: float) -> None:
    assert parse_value(text) == pytest.approx(expected, rel=1e-15, abs=0.0)


def test_prefix_scaling_gives_the_nearest_float() -> None:
    # Common practice, no source: "4.7n" must equal the float literal 4.7e-9 exactly (scaling by
    # the decimal exponent, not by multiplying with 1e-9, which is off by one unit in the last place).
    assert parse_value("4.7n") == 4.7e-9
    assert parse_value("4n7") == 4.7e-9
    assert parse_value("2.2u") == 2.2e-6


@pytest.mark.parametrize("text", REJECTED, ids=[repr(item)[:30] for item in REJECTED])
def test_rejected_forms(text: object) -> None:
    with pytest.raises(ValueSyntaxError) as caught:
        parse_value(text)
    message = str(caught.value)
    assert "\n" not in message
    assert len(message) < 300


def test_rejection_quotes_the_text_and_says_what_is_accepted() -> None:
    with pytest.raises(ValueSyntaxError) as caught:
        parse_value("4k7x")
    message = str(caught.value)
    assert '"4k7x"' in message
    assert "4k7" in message and "1Meg" in message and "M is mega" in message


def test_exponent_with_prefix_says_why() -> None:
    with pytest.raises(ValueSyntaxError, match="exponent"):
        parse_value("1e3k")


def test_quantity_keeps_what_was_written() -> None:
    quantity = Quantity.of(" 4k7 ")
    assert quantity.raw == "4k7"
    assert quantity.si == 4700.0
    assert float(quantity) == 4700.0
    assert Quantity.of(1000).raw == 1000


# -- formatting --------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("value", "unit", "expected"),
    [
        # Common practice, no source: engineering notation with SI prefixes, trailing zeros dropped.
        (4700, "Ω", "4.7 kΩ"),
        (2.2e-6, "F", "2.2 µF"),
        (1e6, "Hz", "1 MHz"),
        (0.1, "V", "100 mV"),
        (12345, "", "12.35 k"),
        (999.96e3, "Ω", "1 MΩ"),  # rounding carries into the next prefix
        (-47e-12, "F", "-47 pF"),
        (0, "V", "0 V"),
        (1, "", "1"),
    ],
)
def test_format_examples(value: float, unit: str, expected: str) -> None:
    assert format_value(value, unit) == expected


def test_format_three_digits() -> None:
    assert format_value(12345, "", digits=3) == "12.3 k"


def test_format_of_a_missing_value() -> None:
    assert format_value(float("nan")) == "—"


finite_values = st.floats(min_value=1e-15, max_value=9.99e11, allow_nan=False, allow_infinity=False)


# Common practice, no source: printing with d significant digits is exact to half a unit in
# the d-th digit, so parsing it back is within 0.5·10^(1-d) relative.
@given(finite_values, st.sampled_from(["", "Ω", "F", "H", "Hz", "V", "A", "S"]), st.sampled_from([3, 4]),
       st.booleans())
def test_format_then_parse_round_trip(value: float, unit: str, digits: int, negative: bool) -> None:
    signed = -value if negative else value
    text = format_value(signed, unit, digits)
    back = parse_value(text)
    assert back == pytest.approx(signed, rel=0.5 * 10.0 ** (1 - digits) * (1 + 1e-9))


@given(st.floats(min_value=1e-15, max_value=1e12, allow_nan=False))
def test_format_uses_at_most_four_significant_digits(value: float) -> None:
    text = format_value(value)
    mantissa = text.split(" ")[0].split("e")[0].lstrip("-")
    digits = mantissa.replace(".", "").lstrip("0")
    assert 1 <= len(digits) <= 4


# -- preferred values (IEC 60063) ---------------------------------------------------------------

# Source: IEC 60063:2015, table of the E24 series (value from memory). E12 and E6 are every
# second and every fourth E24 value.
E24 = (1.0, 1.1, 1.2, 1.3, 1.5, 1.6, 1.8, 2.0, 2.2, 2.4, 2.7, 3.0,
       3.3, 3.6, 3.9, 4.3, 4.7, 5.1, 5.6, 6.2, 6.8, 7.5, 8.2, 9.1)  # fmt: skip

# Source: IEC 60063:2015, table of the E96 series (values from memory).
E96 = (1.00, 1.02, 1.05, 1.07, 1.10, 1.13, 1.15, 1.18, 1.21, 1.24, 1.27, 1.30,
       1.33, 1.37, 1.40, 1.43, 1.47, 1.50, 1.54, 1.58, 1.62, 1.65, 1.69, 1.74,
       1.78, 1.82, 1.87, 1.91, 1.96, 2.00, 2.05, 2.10, 2.15, 2.21, 2.26, 2.32,
       2.37, 2.43, 2.49, 2.55, 2.61, 2.67, 2.74, 2.80, 2.87, 2.94, 3.01, 3.09,
       3.16, 3.24, 3.32, 3.40, 3.48, 3.57, 3.65, 3.74, 3.83, 3.92, 4.02, 4.12,
       4.22, 4.32, 4.42, 4.53, 4.64, 4.75, 4.87, 4.99, 5.11, 5.23, 5.36, 5.49,
       5.62, 5.76, 5.90, 6.04, 6.19, 6.34, 6.49, 6.65, 6.81, 6.98, 7.15, 7.32,
       7.50, 7.68, 7.87, 8.06, 8.25, 8.45, 8.66, 8.87, 9.09, 9.31, 9.53, 9.76)  # fmt: skip


def test_e24_e12_e6() -> None:
    assert e_series("E24") == E24
    assert e_series("E12") == E24[::2]
    assert e_series("E6") == (1.0, 1.5, 2.2, 3.3, 4.7, 6.8)


def test_e24_is_not_the_rounding_formula() -> None:
    # Source: IEC 60063:2015 (value from memory): the published E24 differs from
    # round(10**(i/24), 1) at 2.7, 3.0, 3.3, 3.6, 3.9, 4.3, 4.7 and 8.2.
    formula = [round(10 ** (i / 24), 1) for i in range(24)]
    differing = {published for published, computed in zip(E24, formula, strict=True) if published != computed}
    assert differing == {2.7, 3.0, 3.3, 3.6, 3.9, 4.3, 4.7, 8.2}


def test_e96_and_e48() -> None:
    assert e_series("E96") == E96
    # Source: IEC 60063:2015: E48 is every second E96 value.
    assert e_series("E48") == E96[::2]


def test_e192_follows_e96_and_the_rounding_formula_but_for_9_20() -> None:
    e192 = e_series("E192")
    assert len(e192) == 192
    # Source: IEC 60063:2015: every second E192 value is the E96 value.
    assert e192[::2] == E96
    # Source: IEC 60063:2015 (value from memory): the published E192 lists 9.20 where the
    # rounding formula 10**(185/192) = 9.1948 gives 9.19; all other values follow the formula.
    formula = [round(10 ** (i / 192), 2) for i in range(192)]
    differing = [(index, e192[index], formula[index]) for index in range(192) if e192[index] != formula[index]]
    assert differing == [(185, 9.20, 9.19)]


@pytest.mark.parametrize("name", E_SERIES_NAMES)
def test_series_are_increasing_and_within_a_decade(name: str) -> None:
    values = e_series(name)
    assert len(values) == int(name[1:])
    assert values[0] == 1.0 and values[-1] < 10.0
    assert all(a < b for a, b in zip(values, values[1:], strict=False))


def test_unknown_series() -> None:
    with pytest.raises(ValueError, match="E7"):
        e_series("E7")


@pytest.mark.parametrize(
    ("value", "series", "expected"),
    [
        # Common practice, no source: nearest on a logarithmic scale.
        (4600, "E12", 4700.0),
        (1.83e3, "E96", 1820.0),
        (9.6, "E6", 10.0),  # the next decade's 1.0 is nearer than 6.8
        (0.0021, "E24", 0.0022),
        # The log midpoint of 3.3 and 3.6 is sqrt(3.3 * 3.6) = 3.4467.
        (3.45e-9, "E24", 3.6e-9),
        (3.44e-9, "E24", 3.3e-9),
        (9.19e3, "E192", 9.20e3),
    ],
)
def test_snap(value: float, series: str, expected: float) -> None:
    assert snap_to_series(value, series) == pytest.approx(expected, rel=1e-12)


@given(st.floats(min_value=1e-13, max_value=1e10), st.sampled_from(E_SERIES_NAMES))
def test_snap_lands_on_the_series_and_nowhere_nearer(value: float, series: str) -> None:
    snapped = snap_to_series(value, series)
    mantissa = snapped / 10.0 ** math.floor(math.log10(snapped) + 1e-12)
    values = e_series(series)
    assert any(math.isclose(mantissa, candidate, rel_tol=1e-9) for candidate in values)
    # No series value (in this decade or the neighbours) is closer on a log scale.
    decade = math.floor(math.log10(value))
    error = abs(math.log(snapped / value))
    for shift in (-1, 0, 1):
        for candidate in values:
            assert abs(math.log(candidate * 10.0 ** (decade + shift) / value)) >= error - 1e-9


@pytest.mark.parametrize("value", [0.0, -1.0, float("nan"), float("inf")])
def test_snap_refuses_non_positive(value: float) -> None:
    with pytest.raises(ValueError):
        snap_to_series(value)
