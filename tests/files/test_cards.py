"""Element-card import: good decks give the expected circuit, bad lines are refused by number."""

from __future__ import annotations

import math

import numpy as np
import pytest

from stagewise.engine.mna import assemble
from stagewise.engine.sweep import drive, transfer
from stagewise.files.cards import CardError, parse_card_value, parse_cards, stage_from_cards
from stagewise.model.project import OpampModel, Project, Stage
from stagewise.model.values import Quantity

GOOD_DECK = """\
* buffered anti-alias corner with gain, values of our own choosing
R1 in a 3k9
C1 a 0 15n

U1 a n out ideal
Rf out n 27k
Rg n 0 3k
.end
this line is after .end and is never read
"""


def _response(stage: Stage, project: Project, f_hz: np.ndarray) -> np.ndarray:
    return transfer(drive(assemble(stage, project), current=stage.drive == "current"), f_hz)


def _project() -> Project:
    project = Project(title="cards")
    project.opamp_models["quiet 5 MHz"] = OpampModel(a0_db=Quantity(120, 120.0), gbw_hz=Quantity("5M", 5e6))
    return project


def test_good_deck_gives_the_closed_form_response() -> None:
    project = _project()
    stage = stage_from_cards(GOOD_DECK, "Anti-alias with gain", "in", "out", project)
    assert stage.id == "anti-alias-with-gain"
    assert [part.ref for part in stage.parts] == ["R1", "C1", "U1", "Rf", "Rg"]
    assert stage.part("U1").nodes == ["a", "n", "out"]  # type: ignore[union-attr]
    assert project.stages == []  # the project is not changed
    f_hz = np.logspace(1, 6, 31)
    s = 2j * math.pi * f_hz
    # Source: RC low-pass 1/(1 + sRC) (any circuits text) times the ideal non-inverting gain 1 + Rf/Rg.
    expected = (1 + 27e3 / 3e3) / (1 + s * 3.9e3 * 15e-9)
    np.testing.assert_allclose(_response(stage, project, f_hz), expected, rtol=1e-9)


def test_controlled_sources_follow_their_definitions() -> None:
    # Source: DESIGN 3.2 and any circuits text: a VCCS drives gm·(v_in+ − v_in−) from out+ through
    # the source to out−; a VCVS sets v_out+ − v_out− = A·(v_in+ − v_in−).
    deck = "G1 0 x in 0 2m\nR2 x 0 1k\nE1 out 0 x 0 -1.5\nRload out 0 10k\n"
    stage = stage_from_cards(deck, "sources", "in", "out", Project(title="s"))
    response = _response(stage, Project(title="s"), np.array([100.0]))
    assert response[0] == pytest.approx(2e-3 * 1e3 * -1.5, rel=1e-12)


def test_model_names_with_spaces_quotes_lower_case_and_comments() -> None:
    project = _project()
    deck = '*comment\n   \nr1 in a 10k\nc1 a 0 1n\nu1 a out out "quiet 5 MHz"\nU2 a x x quiet   5 MHz\nR9 x 0 1Meg\n'
    parts = parse_cards(deck, project)
    assert [p.type for p in parts] == ["R", "C", "opamp", "opamp", "R"]
    assert parts[2].model == "quiet 5 MHz" and parts[3].model == "quiet 5 MHz"
    assert parts[4].value is not None and parts[4].value.si == 1e6


@pytest.mark.parametrize(
    ("deck", "line", "words"),
    [
        ("R1 in out 1k\nC1 out 0 1n\nQ1 out in 0 npn\n", 3, 'unsupported element letter "Q"'),
        ("R1 in out 1k\n* fine\nC1 out 4n7\n", 3, "missing node"),
        ("R1 in out 1k\nC1 out 0 4n7x\n", 2, '"4n7x" is not a value'),
        ("R1 in out 1k\nC1 out 0 1n extra\n", 2, "wrong number of fields"),
        ("R1 in out 1k\nU1 out 0 nowhere\n", 2, "missing node or model"),
        ("R1 in out 1k\nU1 0 out x mystery amp\nRx x 0 1k\n", 2, 'op-amp model "mystery amp" is not in the project'),
        ("R1 in out 1k\nC1 out 0 1n\nR1 out 0 2k\n", 3, 'duplicate ref "R1", already used on line 1'),
        ("R1 in out 1k\n.tran 1u 1m\n", 2, '".tran" is not supported'),
        ("R1 in out 0\n", 1, "must be greater than zero"),
        ("E1 out 0 in 2\n", 1, "missing node"),
    ],
)
def test_bad_lines_are_refused_with_their_number(deck: str, line: int, words: str) -> None:
    # Common practice, no source: a refused import names the line and what is wrong with it.
    with pytest.raises(CardError) as caught:
        stage_from_cards(deck, "bad", "in", "out", _project())
    assert caught.value.line == line
    assert str(caught.value).startswith(f"line {line}: ")
    assert words in str(caught.value)


def test_ports_that_name_no_node_and_empty_decks_are_refused() -> None:
    deck = "R1 in out 1k\nC1 out 0 1n\n"
    with pytest.raises(CardError, match='input port "vin" is not a node'):
        stage_from_cards(deck, "p", "vin", "out", _project())
    with pytest.raises(CardError, match="cannot be node 0"):
        stage_from_cards(deck, "p", "in", "0", _project())
    with pytest.raises(CardError, match="no cards"):
        stage_from_cards("* nothing\n.end\n", "p", "in", "out", _project())
    with pytest.raises(CardError, match="no path to node 0"):
        stage_from_cards("R1 in out 1k\nC1 out 0 1n\nR2 x y 1k\n", "p", "in", "out", _project())


def test_stage_ids_are_unique_in_the_project() -> None:
    project = _project()
    deck = "R1 in out 1k\nC1 out 0 1n\n"
    project.stages.append(stage_from_cards(deck, "Input filter", "in", "out", project))
    second = stage_from_cards(deck, "Input filter", "in", "out", project)
    assert second.id == "input-filter-2"
    with pytest.raises(CardError, match="already used"):
        stage_from_cards(deck, "x", "in", "out", project, stage_id="input-filter")


# Common practice, no source (value from memory): in the trade's netlist line convention the scale
# factors are case-insensitive, M is milli and MEG mega, F is femto, a unit may follow the scale
# factor, and ";" starts a comment. One case per suffix; the expected numbers are the SI values.
@pytest.mark.parametrize(
    ("text", "si", "stored"),
    [
        ("1MEG", 1e6, "1M"),
        ("1meg", 1e6, "1M"),
        ("2.2Meg", 2.2e6, "2.2M"),
        ("1M", 1e-3, "1m"),
        ("1m", 1e-3, "1m"),
        ("10N", 1e-8, "10n"),
        ("10n", 1e-8, "10n"),
        ("4.7K", 4.7e3, "4.7k"),
        ("4.7k", 4.7e3, "4.7k"),
        ("3.3U", 3.3e-6, "3.3u"),
        ("3.3µ", 3.3e-6, "3.3u"),
        ("22P", 22e-12, "22p"),
        ("5F", 5e-15, "5f"),
        ("1.5G", 1.5e9, "1.5G"),
        ("2T", 2e12, 2e12),
        ("10nF", 1e-8, "10n"),
        ("47kohm", 47e3, "47k"),
        ("1MEGΩ", 1e6, "1M"),
        ("100mH", 0.1, "100m"),
        ("4k7", 4.7e3, "4k7"),
        ("2R2", 2.2, "2R2"),
        ("4N7", 4.7e-9, "4n7"),
        ("1e-3", 1e-3, "1e-3"),
    ],
)
def test_card_values_follow_the_netlist_convention(text: str, si: float, stored: str | float) -> None:
    value = parse_card_value(text)
    assert value.si == pytest.approx(si, rel=1e-15)
    # Stored in the project file's notation (M mega, m milli), which reads back the same number.
    assert value.raw == stored
    assert Quantity.of(value.raw).si == value.si


@pytest.mark.parametrize(("text", "words"), [("1M5", "ambiguous"), ("4n7x", "is not a value"), ("1X", "is not a value"),
                                             ("k", "is not a value")])
def test_card_values_that_cannot_be_read_are_refused(text: str, words: str) -> None:
    with pytest.raises(ValueError, match=words):
        parse_card_value(text)


def test_semicolon_comments_and_milli_notes() -> None:
    # Common practice, no source: ";" starts a comment at the start of a line or after a card.
    deck = ("; a deck with comments of both kinds\n"
            "R1 in out 1MEG ; bias resistor\n"
            "C1 out 0 10N;no space before the comment\n"
            "L1 out x 1M    ; one millihenry\n"
            "Rx x 0 1k\n"
            "U1 x y y quiet 5 MHz ; the project's model\n")
    notes: list[str] = []
    parts = parse_cards(deck, _project(), notes)
    assert [part.ref for part in parts] == ["R1", "C1", "L1", "Rx", "U1"]
    values = [part.value.si for part in parts[:3] if part.value is not None]
    assert values == [pytest.approx(1e6), pytest.approx(1e-8), pytest.approx(1e-3)]
    assert parts[4].model == "quiet 5 MHz"
    assert len(notes) == 1 and notes[0].startswith('line 4: L1 "1M" is read as milli (1m)')
    notes.clear()
    parse_cards("R1 in out 1Meg\nL1 out 0 1m\n", _project(), notes)
    assert notes == []  # mega written as mega, milli as the project file writes it too
