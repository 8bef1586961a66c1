"""`stagewise merge BASE OURS THEIRS -o OUT`: merge two edited copies of one project.

Design edits merge part by part, review records by identity, and the two audit trails as a
history with a ``merge`` event naming both heads (:mod:`stagewise.review.merge`). Exit 0 merged
(OUT written atomically: a temporary file in OUT's folder, fsynced, renamed over OUT; no
``.bak``, since a git merge driver writes into git's own temporary copy), 1 conflicts (each on
stderr with its JSON path and both values; OUT not written), 2 an input cannot be read, or OUT
is open for editing elsewhere (its edit lock is held while it is written).

As a git merge driver (``.gitattributes``: ``*.stagewise.json merge=stagewise``; git config:
``merge.stagewise.driver = stagewise merge %O %A %B -o %A``). An empty BASE (the file was
added on both branches) merges against an empty project.
"""

from __future__ import annotations

import argparse
import os
import sys
from pathlib import Path

from stagewise.cli import CommandError, printable
from stagewise.commands.common import load, locked, person
from stagewise.model.project import Project


def _base(path: str) -> Project:
    try:
        empty = os.path.getsize(path) == 0
    except OSError as error:
        raise CommandError(f"{path}: cannot be read ({error.strerror or error})") from error
    return Project(title="") if empty else load(path)


def run(args: argparse.Namespace) -> int:
    from stagewise.files.atomic import write_temporary
    from stagewise.files.lock import real_path
    from stagewise.files.project_file import encode_checked
    from stagewise.review.merge import merge_projects

    base = _base(args.base)
    ours = load(args.ours)
    theirs = load(args.theirs)
    who = person(args.by, "who merges")
    result = merge_projects(base, ours, theirs, who=who)
    if result.project is None:
        for conflict in result.conflicts:
            sys.stderr.write(f"stagewise: conflict: {printable(conflict.sentence())}\n")
        count = len(result.conflicts)
        sys.stderr.write(f"stagewise: {count} conflict{'s' if count != 1 else ''}; {args.output} was not written.\n")
        return 1
    output = real_path(args.output)
    data = encode_checked(result.project, str(args.output))
    folder = output.parent
    with locked(args.output, who):  # OUT may be a project someone has open: never write under them
        try:
            mode = output.stat().st_mode & 0o777 if output.exists() else 0o644
            temporary = write_temporary(folder, output.name, data, mode)
            try:
                os.replace(temporary, output)
            except BaseException:
                Path(temporary).unlink(missing_ok=True)
                raise
        except OSError as error:
            raise CommandError(f"{args.output}: the merged project could not be written "
                               f"({error.strerror or error}); nothing was changed") from error
    joined = ("both audit trails joined by a merge event" if result.events_ours and result.events_theirs
              else "one audit trail continued")
    print(f"Merged into {args.output}: {result.events_ours} event(s) of ours, {result.events_theirs} of theirs, "
          f"{joined}.")
    return 0
