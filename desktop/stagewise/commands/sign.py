"""`stagewise sign FILE --stage ID --verdict accept|rework [--note TEXT] [--by NAME] [--role ROLE]`.

Records a reviewer's sign-off on a stage (``review.actions.sign``: bound to the stage's current
fingerprint, with its audit event) and saves the project atomically, under the edit lock (a
stale one is taken over, saying so; a project open for editing elsewhere is refused and left
unchanged). ``--by`` names the reviewer (default: the login name) and ``--role`` their role.
Under the project's four-eyes rule (``settings.four_eyes``) whoever last changed the stage
cannot accept it.
"""

from __future__ import annotations

import argparse

from stagewise.cli import CommandError, printable
from stagewise.commands.common import load, locked, person
from stagewise.files.project_file import save_project
from stagewise.review.actions import ReviewError, sign
from stagewise.review.words import VERDICT_WORDS


def run(args: argparse.Namespace) -> int:
    who = person(args.by, "who signs")
    load(args.file)  # a missing or invalid project is reported before any lock file is made
    with locked(args.file, who):
        project = load(args.file)
        try:
            signoff = sign(project, args.stage, who, args.role or "", args.verdict, note=args.note or "")
        except ReviewError as error:
            raise CommandError(f"{args.file}: {error}") from error
        save_project(args.file, project)
    print(f"Stage {printable(args.stage)} {VERDICT_WORDS[signoff.verdict]} by {printable(who)}; recorded in the audit "
          f"trail of {printable(args.file)}.")
    return 0
