"""`stagewise verify FILE`: audit-trail integrity.

Recomputes the hash chain and names the first broken event (its position, seq and why), then
checks every review record against the event that created it, both ways: each sign-off, waiver,
manual answer, comment and resolved flag must be held, content and all, by its event, and every
such event must still find its record (a record removed from the file is named too).
Exit 0 intact, 1 broken, 2 the file cannot be read. What this proves is stated in DEVELOPERS.md:
it reveals edits made outside the program; it is not a signature.
"""

from __future__ import annotations

import argparse

from stagewise.cli import printable
from stagewise.commands.common import load
from stagewise.review.audit import unrecorded_decisions, verify_trail


def run(args: argparse.Namespace) -> int:
    project = load(args.file)
    result = verify_trail(project.audit)
    print(f"{printable(args.file)}: {printable(result.sentence())}.")
    problems = unrecorded_decisions(project)
    for problem in problems:
        print(f"{printable(args.file)}: {printable(problem)}.")
    if problems:
        print(f"{args.file}: {len(problems)} review record{'s' if len(problems) != 1 else ''} and audit "
              f"event{'s' if len(problems) != 1 else ''} do not match: written, edited or removed outside the "
              "program.")
    return 0 if result.intact and not problems else 1
