"""The packet's line wrapper: the same lines as the plain greedy rule, at a cost linear in the text.

A 100,000-character word (a pasted hash dump) once took minutes: the wrapper re-measured the
whole remaining word for every line it cut.
"""

from __future__ import annotations

from hypothesis import given, settings
from hypothesis import strategies as st

from stagewise.report.layout import wrap_text


class CountingMetrics:
    """A stand-in for QFontMetricsF with per-character advances; counts the characters measured."""

    def __init__(self) -> None:
        self.measured = 0

    def horizontalAdvance(self, text: str) -> float:  # noqa: N802 - Qt's name
        self.measured += len(text)
        return float(sum(11 if character in "MW@" else 4 if character in "il.' " else 7 for character in text))


def _greedy_reference(text: str, metrics: CountingMetrics, width: float) -> list[str]:
    """Greedy wrap stated plainly, character by character (quadratic, fine for short texts).

    Common practice, no source: greedy (first-fit) line breaking puts as many words on a line as
    fit; a word longer than a line is broken at the last character that fits (at least one).
    """
    lines: list[str] = []
    for paragraph in text.split("\n"):
        current = ""
        for word in paragraph.split(" "):
            candidate = word if not current else current + " " + word
            if metrics.horizontalAdvance(candidate) <= width:
                current = candidate
                continue
            if current:
                lines.append(current)
            while metrics.horizontalAdvance(word) > width and len(word) > 1:
                cut = len(word)
                while cut > 1 and metrics.horizontalAdvance(word[:cut]) > width:
                    cut -= 1
                lines.append(word[:cut])
                word = word[cut:]
            current = word
        lines.append(current)
    return lines


@settings(max_examples=300, deadline=None)
@given(text=st.text(alphabet=st.sampled_from(list("abcMWil. \n0123456789")), max_size=300),
       width=st.floats(min_value=3.0, max_value=400.0))
def test_wrap_gives_the_greedy_lines(text: str, width: float) -> None:
    assert wrap_text(text, CountingMetrics(), width) == _greedy_reference(text, CountingMetrics(), width)


def test_a_100000_character_word_costs_time_linear_in_its_length() -> None:
    word = "0123456789abcdef" * 6250  # 100,000 characters, no space
    metrics = CountingMetrics()
    lines = wrap_text(word, metrics, 480.0)
    assert "".join(lines) == word
    assert all(metrics.horizontalAdvance(line) <= 480.0 for line in lines[:-1])
    # Each line of about 70 characters measures prefixes up to twice its length, a few times over
    # (galloping, then bisection): a bounded multiple of the text, not its square.
    measured = metrics.measured - sum(len(line) for line in lines[:-1])
    assert measured <= 40 * len(word)


def test_long_words_among_short_ones_cost_linear_time() -> None:
    text = " ".join(["short", "x" * 20000, "words"] * 5)
    metrics = CountingMetrics()
    wrap_text(text, metrics, 300.0)
    assert metrics.measured <= 40 * len(text)
