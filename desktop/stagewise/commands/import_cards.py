"""`stagewise import-cards FILE CARDS --name NAME [--in NODE] [--out NODE] [--id ID] [--after ID | --before ID] [--by NAME]`.

Adds a stage built from element-card text (format in :mod:`stagewise.files.cards`) at the end of
the chain, or right after (``--after``) or before (``--before``) a stage; prints a note for each
value read with ``M`` as milli (the cards' convention, unlike the project file's); records
an audit event ``import`` ("stage imported") with the stage id and the SHA-256 of the cards file,
validates the whole project and saves it atomically. On any error the project file is left
byte for byte as it was and the command exits with status 2 and one sentence. The project's
edit lock is held during the import; a project open for editing elsewhere is refused, a stale
lock is taken over with a line saying so. The cards file is read (a regular file, bounded)
before the lock is taken.
"""

from __future__ import annotations

import argparse
import hashlib
from pathlib import Path

from stagewise.cli import CommandError, printable
from stagewise.commands.common import load, locked, person, read_input_file, stage_by_id
from stagewise.files.cards import CardError, stage_from_cards
from stagewise.files.project_file import save_project
from stagewise.model.validate import validate
from stagewise.review.audit import append_event

MAX_CARDS_BYTES = 2 * 1024 * 1024



def run(args: argparse.Namespace) -> int:
    # Hold the edit lock while reading and writing, so an import never lands under a project
    # someone has open in the desktop program (their next save would drop it).
    load(args.file)  # a missing or invalid project is reported before any lock file is made
    who = person(args.by, "who imported the cards")
    cards_path = Path(args.cards)
    data = read_input_file(cards_path, "an element-card file", "element-card files", MAX_CARDS_BYTES)  # never while locked
    with locked(args.file, who):
        return _import(args, cards_path, data, who)


def _import(args: argparse.Namespace, cards_path: Path, data: bytes, who: str) -> int:
    project = load(args.file)
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as error:
        raise CommandError(f"{cards_path}: not UTF-8 text (byte {error.start})") from error
    position = len(project.stages)
    for option, anchor, offset in (("--after", getattr(args, "after", None), 1),
                                   ("--before", getattr(args, "before", None), 0)):
        if anchor is not None:
            stage_by_id(project, anchor, f"{args.file}: {option}")
            position = [candidate.id for candidate in project.stages].index(anchor) + offset
    notes: list[str] = []
    try:
        stage = stage_from_cards(text, args.name, args.in_node, args.out_node, project, args.stage_id, notes)
    except CardError as error:
        raise CommandError(f"{cards_path}: {error}") from error
    project.stages.insert(position, stage)
    detail = {
        "stage": stage.id,
        "name": stage.name,
        "parts": len(stage.parts),
        "position": position + 1,
        "cards_file": cards_path.name,
        "cards_sha256": hashlib.sha256(data).hexdigest(),
    }
    try:
        append_event(project, who, "import", detail)
    except ValueError as error:
        raise CommandError(f"the audit event could not be recorded: {error}") from error
    problems = validate(project)
    if problems:
        raise CommandError(f"{args.file}: after the import the project is not valid: " + "; ".join(problems))
    save_project(args.file, project)
    for note in notes:
        print(printable(f"{cards_path}: note: {note}."))
    where = f"after stage {project.stages[position - 1].id}" if position > 0 else "first in the chain"
    print(printable(f"Imported stage \"{stage.id}\" ({len(stage.parts)} parts) into {args.file}, {where} "
                    f"(stage {position + 1} of {len(project.stages)})."))
    return 0
