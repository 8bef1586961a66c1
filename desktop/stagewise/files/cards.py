"""Element-card text: a stage typed as one part per line.

The format (our own, deliberately small)::

    * a comment line starts with an asterisk; blank lines are ignored
    R1  in  a    4k7          resistor, capacitor or inductor: ref, two nodes, value
    C1  a   0    10n
    L1  a   out  2.2m
    E1  o+  o-  i+  i-  10    voltage-controlled voltage source: ref, out+, out-, in+, in-, gain
    G1  o+  o-  i+  i-  1m    voltage-controlled current source: ..., transconductance (S)
    U1  in+ in- out  ideal    op-amp: ref, in+, in-, out, model ("ideal" or a project model)
    .end                      optional; anything after it is ignored

The ref is the whole first word (``R1``, ``Rload``); its first letter gives the part type (upper
or lower case). Node ``0`` is the common reference. An op-amp model name may contain spaces
(everything after the output node is the name) and may be written in double quotes. Values use
the program's engineering notation (``4k7``, ``10n``, ``1Meg``; see
:func:`stagewise.model.values.parse_value`).

Any line that cannot be read refuses the whole import, naming its line number: an unsupported
element letter, a wrong number of fields, a missing node, a bad value (quoted), an unknown
op-amp model or a duplicate ref. Nothing is half-imported.

The command line (``stagewise import-cards``) and the desktop program's "import element cards"
both call :func:`stage_from_cards`; the caller then appends the stage, records the audit event
and saves.
"""

from __future__ import annotations

from typing import Final

from stagewise.model.project import GROUND, IDEAL_OPAMP, Part, Project, Stage
from stagewise.model.validate import validate_stage
from stagewise.model.values import Quantity, ValueSyntaxError

__all__ = ["CARD_LETTERS", "CardError", "parse_cards", "stage_from_cards"]

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


def _parse_line(number: int, words: list[str], line: str, project: Project) -> Part:
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
        model = line.split(None, len(roles) + 1)[-1].strip()
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
        value = Quantity.of(text)
    except ValueSyntaxError as error:
        raise CardError(f"{ref}: {error}", number) from error
    if part_type in ("R", "C", "L") and not value.si > 0:
        raise CardError(f'{ref}: the {meaning} "{text}" must be greater than zero', number)
    return Part(ref=ref, type=part_type, nodes=list(words[1:-1]), value=value)


def parse_cards(text: str, project: Project) -> list[Part]:
    """Read element-card text into parts.

    Parameters
    ----------
    text : str
        The deck, one card per line (see the module documentation).
    project : Project
        Supplies the op-amp models a ``U`` card may name.

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
        line = raw.strip().lstrip("\ufeff")
        if not line or line.startswith("*"):
            continue
        words = line.split()
        if words[0].startswith("."):
            if words[0].lower() == ".end" and len(words) == 1:
                break
            raise CardError(f'"{words[0]}" is not supported; the only dot line is .end', number)
        part = _parse_line(number, words, line, project)
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

    Raises
    ------
    CardError
        A card that cannot be read (with its line number), an empty deck, a port that names no
        node, or a stage that fails validation (for instance a node with no path to node 0).
    """
    if not name.strip():
        raise CardError("the new stage needs a name")
    parts = parse_cards(text, project)
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
