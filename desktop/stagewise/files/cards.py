"""Element-card text: a stage typed as one part per line, in the trade's netlist line form.

The format::

    * a line that starts with an asterisk is a comment; blank lines are ignored
    R1  in  a    4.7k        ; resistor, capacitor or inductor: ref, two nodes, value
    C1  a   0    10n         ; a semicolon starts a comment, at the start or the end of a line
    L1  a   out  2.2M        ; M is milli in cards: 2.2 mH
    R2  out 0    1MEG        ; MEG is mega: 1 MΩ
    E1  o+  o-  i+  i-  10   ; voltage-controlled voltage source: ref, out+, out-, in+, in-, gain
    G1  o+  o-  i+  i-  1m   ; voltage-controlled current source: ..., transconductance (S)
    U1  in+ in- out  ideal   ; op-amp: ref, in+, in-, out, model ("ideal" or a project model)
    .end                     ; optional; anything after it is ignored

The ref is the whole first word (``R1``, ``Rload``); its first letter gives the part type (upper
or lower case). Node ``0`` is the common reference. An op-amp model name may contain spaces
(everything after the output node up to a ``;`` is the name) and may be written in double quotes.

**Values follow the netlist convention of the trade, not the project file's**: a number, an
optional scale factor and an optional unit, all case-insensitive. Scale factors: ``T`` 1e12,
``G`` 1e9, ``MEG`` 1e6, ``K`` 1e3, ``M`` 1e-3 (milli, in either case), ``U`` or ``µ`` 1e-6,
``N`` 1e-9, ``P`` 1e-12, ``F`` 1e-15 (femto: ``10F`` is 10 fF, write a farad value without a
suffix). A unit after the scale factor (``F``, ``H``, ``Ω``, ``ohm``, ``V``, ``A``, ``S``, ``Hz``)
is checked for spelling and ignored: ``10nF``, ``4.7kohm``, ``1MEGΩ``. The letter-and-digit code of
IEC 60062 is read too (``4k7``, ``2R2``, ``4n7``), except with ``M``, which would mean mega there
and milli here (``1M5`` is refused: write ``1.5MEG`` or ``1.5M``). Each imported value is stored in
the project file's own notation (where ``M`` is mega and ``m`` milli), so ``1M`` in a card is
stored as ``1m`` and ``1MEG`` as ``1M``.

Any line that cannot be read refuses the whole import, naming its line number: an unsupported
element letter, a wrong number of fields, a missing node, a bad value (quoted), an unknown
op-amp model or a duplicate ref. Nothing is half-imported.

The command line (``stagewise import-cards``) and the desktop program's "import element cards"
both call :func:`stage_from_cards`; the caller then inserts the stage, records the audit event
and saves.
"""

from __future__ import annotations

import math
import re
from typing import Final

from stagewise.model.project import GROUND, IDEAL_OPAMP, Part, Project, Stage
from stagewise.model.validate import validate_stage
from stagewise.model.values import Quantity, ValueSyntaxError

__all__ = ["CARD_LETTERS", "CARD_SCALE_FACTORS", "CardError", "parse_card_value", "parse_cards", "stage_from_cards"]

MAX_CARD_LINES: Final = 10_000

# First letter of the ref -> (part type, node roles, what the value is, words for messages).
CARD_LETTERS: Final[dict[str, tuple[str, tuple[str, ...], str, str]]] = {
    "R": ("R", ("a", "b"), "resistance", "resistor"),
    "C": ("C", ("a", "b"), "capacitance", "capacitor"),
    "L": ("L", ("a", "b"), "inductance", "inductor"),
    "E": ("vcvs", ("out+", "out-", "in+", "in-"), "gain", "voltage-controlled voltage source"),
    "G": ("vccs", ("out+", "out-", "in+", "in-"), "transconductance", "voltage-controlled current source"),
    "U": ("opamp", ("in+", "in-", "out"), "model", "op-amp"),
}
_SUPPORTED = "R, C, L, E (voltage-controlled voltage source), G (voltage-controlled current source), U (op-amp)"


# The trade's netlist scale factors (case-insensitive) -> (power of ten, the project file's prefix
# for it, or "" where the project file has none and the value is stored as a plain number).
CARD_SCALE_FACTORS: Final[dict[str, tuple[int, str]]] = {
    "T": (12, ""),
    "G": (9, "G"),
    "MEG": (6, "M"),
    "K": (3, "k"),
    "M": (-3, "m"),
    "U": (-6, "u"),
    "µ": (-6, "u"),  # U+00B5 MICRO SIGN
    "μ": (-6, "u"),  # U+03BC GREEK SMALL LETTER MU
    "N": (-9, "n"),
    "P": (-12, "p"),
    "F": (-15, "f"),
}
_CARD_UNITS = ("OHMS", "OHM", "Ω", "Ω", "HZ", "F", "H", "V", "A", "S")
_CARD_SCALE_PATTERN = "MEG|[TGKMUµμNPF]"
_CARD_DECIMAL = re.compile(
    rf"(?P<number>[+-]?(?:[0-9]+(?:\.[0-9]*)?|\.[0-9]+)(?:[eE][+-]?[0-9]{{1,3}})?)"
    rf"(?P<scale>{_CARD_SCALE_PATTERN})?(?P<unit>{'|'.join(_CARD_UNITS)})?",
    re.IGNORECASE,
)
_CARD_LETTER_DIGIT = re.compile(r"(?P<whole>[0-9]+)(?P<letter>[RKGUµμNPF])(?P<fraction>[0-9]+)(?P<unit>OHMS?|Ω|Ω|F|H)?",
                                re.IGNORECASE)
# A capital M read as milli (a lower-case m means milli in the project file too: nothing to say).
_MILLI = re.compile(r"[0-9.]M(?![Ee][Gg])")
CARD_VALUE_FORMS: Final = ("a number with an optional scale factor T G MEG K M U N P F (case-insensitive; "
                           "M is milli, MEG mega) and unit, such as 4.7k, 10nF, 1MEG, 2.2M or 4k7")


def parse_card_value(text: str) -> Quantity:
    """Read an element card's value in the netlist convention; stored in the project's notation.

    Parameters
    ----------
    text : str
        The value field of a card, e.g. ``"1MEG"``, ``"10n"``, ``"1M"`` (milli), ``"4k7"``.

    Returns
    -------
    Quantity
        ``raw`` in the project file's notation (``"1M"`` → ``"1m"``, ``"1MEG"`` → ``"1M"``), or a
        plain number where that notation has no prefix for the scale; ``si`` in SI base units.

    Raises
    ------
    ValueSyntaxError
        The text is not a card value; the message quotes it and says what is accepted.
    """
    match = _CARD_DECIMAL.fullmatch(text)
    if match is not None:
        number = match["number"]
        scale = (match["scale"] or "").upper() if match["scale"] not in ("µ", "μ") else match["scale"]
        exponent, prefix = CARD_SCALE_FACTORS[scale] if scale else (0, "")
        has_exponent = "e" in number.lower()
        # Shift the decimal exponent rather than multiply, so "4.7n" is the float nearest 4.7e-9.
        si = float(number) * 10.0**exponent if has_exponent else float(f"{number}e{exponent}")
        raw: str | float
        if not scale:
            raw = number
        elif prefix and not has_exponent:
            raw = number + prefix
        else:
            raw = si
    else:
        code = _CARD_LETTER_DIGIT.fullmatch(text)
        if code is None:
            if re.fullmatch(r"[0-9]+M[0-9]+\w*", text, re.IGNORECASE):
                raise ValueSyntaxError(f'"{text}" is ambiguous in element cards, where M is milli and MEG '
                                       f"mega: write {text.upper().replace('M', '.', 1)}MEG for mega or "
                                       f"{text.upper().replace('M', '.', 1)}M for milli")
            raise ValueSyntaxError(f'"{text}" is not a value; expected {CARD_VALUE_FORMS}')
        letter = code["letter"] if code["letter"] in ("µ", "μ") else code["letter"].upper()
        exponent, prefix = (0, "R") if letter == "R" else CARD_SCALE_FACTORS[letter]
        si = float(f"{code['whole']}.{code['fraction']}e{exponent}")
        raw = f"{code['whole']}{prefix}{code['fraction']}"
    if not math.isfinite(si):
        raise ValueSyntaxError(f'"{text}" is out of range')
    stored = Quantity.of(raw)
    if stored.si != si:  # the project's notation must read back the same number
        stored = Quantity(si, si)
    return stored


class CardError(ValueError):
    """Element-card text that cannot be imported.

    Attributes
    ----------
    line : int or None
        1-based line number of the offending card; ``None`` for a problem of the deck as a
        whole (no parts, a port that names no node).
    """

    def __init__(self, message: str, line: int | None = None) -> None:
        self.line = line
        super().__init__(f"line {line}: {message}" if line is not None else message)


def _usage(letter: str) -> str:
    part_type, roles, meaning, _ = CARD_LETTERS[letter]
    return f"{letter}<ref> {' '.join(roles)} {meaning}"


def _parse_line(number: int, words: list[str], line: str, project: Project, notes: list[str] | None) -> Part:
    ref = words[0]
    letter = ref[0].upper()
    if letter not in CARD_LETTERS:
        raise CardError(f'"{ref}": unsupported element letter "{ref[0]}"; supported are {_SUPPORTED}', number)
    part_type, roles, meaning, noun = CARD_LETTERS[letter]
    if part_type == "opamp":
        # Nodes, then the model: the rest of the line, which may hold spaces or quotes.
        if len(words) < len(roles) + 2:
            given = max(len(words) - 2, 0)
            raise CardError(
                f"{ref}: missing node or model; an {noun} needs {len(roles)} nodes "
                f"({', '.join(roles)}) and a model, found {given} node{'s' if given != 1 else ''} "
                f"(write {_usage(letter)})",
                number,
            )
        nodes = words[1 : 1 + len(roles)]
        model = line.split(None, len(roles) + 1)[-1].strip()  # the line comes without its comment
        if len(model) >= 2 and model[0] == model[-1] == '"':
            model = model[1:-1].strip()
        model = " ".join(model.split())
        if model != IDEAL_OPAMP and model not in project.opamp_models:
            known = ", ".join(f'"{name}"' for name in sorted(project.opamp_models)) or "none"
            raise CardError(
                f'{ref}: op-amp model "{model}" is not in the project; use "{IDEAL_OPAMP}" or one of '
                f"the project's models ({known})",
                number,
            )
        return Part(ref=ref, type=part_type, nodes=list(nodes), model=model)
    expected = len(roles) + 2
    if len(words) < expected:
        given = max(len(words) - 2, 0)
        raise CardError(
            f"{ref}: missing node; a {noun} needs {len(roles)} nodes ({', '.join(roles)}) and its "
            f"{meaning}, found {given} node{'s' if given != 1 else ''} (write {_usage(letter)})",
            number,
        )
    if len(words) > expected:
        raise CardError(
            f"{ref}: wrong number of fields, {len(words)} instead of {expected} (write {_usage(letter)})",
            number,
        )
    text = words[-1]
    try:
        value = parse_card_value(text)
    except ValueSyntaxError as error:
        raise CardError(f"{ref}: {error}", number) from error
    if notes is not None and _MILLI.search(text):
        notes.append(f'line {number}: {ref} "{text}" is read as milli ({value.raw}), as cards write it; '
                     f"mega is written MEG")
    if part_type in ("R", "C", "L") and not value.si > 0:
        raise CardError(f'{ref}: the {meaning} "{text}" must be greater than zero', number)
    return Part(ref=ref, type=part_type, nodes=list(words[1:-1]), value=value)


def parse_cards(text: str, project: Project, notes: list[str] | None = None) -> list[Part]:
    """Read element-card text into parts.

    Parameters
    ----------
    text : str
        The deck, one card per line (see the module documentation).
    project : Project
        Supplies the op-amp models a ``U`` card may name.
    notes : list of str, optional
        Receives one sentence per value read with ``M`` as milli, so the caller can show the
        reading to someone used to the project file's notation (where ``M`` is mega).

    Returns
    -------
    list of Part
        In the order of the cards.

    Raises
    ------
    CardError
        At the first line that cannot be read, with its line number.
    """
    parts: list[Part] = []
    first_line: dict[str, int] = {}
    lines = text.splitlines()
    if len(lines) > MAX_CARD_LINES:
        raise CardError(f"the deck has {len(lines)} lines; at most {MAX_CARD_LINES} are read")
    for number, raw in enumerate(lines, start=1):
        line = raw.split(";", 1)[0].strip().lstrip("\ufeff")
        if not line or line.startswith("*"):
            continue
        words = line.split()
        if words[0].startswith("."):
            if words[0].lower() == ".end" and len(words) == 1:
                break
            raise CardError(f'"{words[0]}" is not supported; the only dot line is .end', number)
        part = _parse_line(number, words, line, project, notes)
        if part.ref in first_line:
            raise CardError(f'duplicate ref "{part.ref}", already used on line {first_line[part.ref]}', number)
        first_line[part.ref] = number
        parts.append(part)
    return parts


def stage_from_cards(
    text: str,
    name: str,
    in_node: str,
    out_node: str,
    project: Project,
    stage_id: str | None = None,
    notes: list[str] | None = None,
) -> Stage:
    """Build a circuit stage from element-card text; the project is not changed.

    Parameters
    ----------
    text : str
        The deck.
    name : str
        The new stage's name.
    in_node, out_node : str
        The nodes of the input and output ports; each must be a node of some card, not ``0``.
    project : Project
        Supplies op-amp models; also used to make the stage id unique.
    stage_id : str, optional
        The new stage's id; by default derived from ``name`` (lower case, words joined by
        ``-``) and made unique with ``-2``, ``-3``...
    notes : list of str, optional
        Receives the notes of :func:`parse_cards`.

    Raises
    ------
    CardError
        A card that cannot be read (with its line number), an empty deck, a port that names no
        node, or a stage that fails validation (for instance a node with no path to node 0).
    """
    if not name.strip():
        raise CardError("the new stage needs a name")
    parts = parse_cards(text, project, notes)
    if not parts:
        raise CardError("the deck holds no cards; nothing to import")
    nodes = {node for part in parts for node in part.nodes}
    for role, node in (("input", in_node), ("output", out_node)):
        if node == GROUND:
            raise CardError(f"the {role} port cannot be node 0, the common reference")
        if node not in nodes:
            raise CardError(f'the {role} port "{node}" is not a node of any card')
    taken = {stage.id for stage in project.stages}
    if stage_id is not None:
        if not stage_id.strip():
            raise CardError("the stage id must not be empty")
        if stage_id in taken:
            raise CardError(f'stage id "{stage_id}" is already used in the project')
        new_id = stage_id
    else:
        base = "-".join("".join(c if c.isalnum() else " " for c in name.lower()).split()) or "imported"
        new_id, number = base, 1
        while new_id in taken:
            number += 1
            new_id = f"{base}-{number}"
    stage = Stage(id=new_id, name=name.strip(), ports={"in": in_node, "out": out_node}, parts=parts)
    problems = validate_stage(stage, project, "stage")
    if problems:
        raise CardError("the imported stage is not a valid circuit: " + "; ".join(problems))
    return stage
