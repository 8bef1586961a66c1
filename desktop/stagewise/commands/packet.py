"""`stagewise packet FILE -o OUT.pdf`: print the PDF review packet and record it in the audit trail.

The packet is written first (to a temporary file, renamed into place when complete). Then a
"packet printed" event naming the PDF's SHA-256 and the file's SHA-256 is appended to the
project's audit trail (``review.actions.record_packet``) and the project is saved atomically,
keeping the previous file as ``.bak``. The packet therefore names the file as it was *before*
this event; the event names the packet. ``--by`` says who printed it (default: the login name).
"""

from __future__ import annotations

import argparse
import getpass
import sys
from pathlib import Path

from stagewise.cli import CommandError
from stagewise.commands.common import load


def _who(by: str | None) -> str:
    if by is not None:
        if not by.strip():
            raise CommandError("--by needs a name: who printed the packet is recorded in the audit trail")
        return by.strip()
    try:
        return getpass.getuser()
    except (KeyError, OSError) as error:
        raise CommandError("cannot tell who is printing the packet; give a name with --by") from error


def run(args: argparse.Namespace) -> int:
    from stagewise.files.project_file import file_sha256, is_project_or_companion, save_project
    from stagewise.report.packet import build_packet
    from stagewise.review.actions import record_packet

    output = Path(args.output)
    if is_project_or_companion(output, args.file):
        raise CommandError(f"{args.output} is the project file {args.file} itself (or its backup or lock), which "
                           "the packet would overwrite; give another name for the PDF")
    if output.suffix.lower() != ".pdf":
        raise CommandError(f"{args.output}: the packet is a PDF; give an output name ending in .pdf")
    if output.exists() and output.is_dir():
        raise CommandError(f"{args.output} is a folder; give the name of the PDF to write")
    if not (output.parent if str(output.parent) else Path(".")).is_dir():
        raise CommandError(f"{args.output}: the folder {output.parent} does not exist")
    who = _who(args.by)
    project = load(args.file)
    sha_before = file_sha256(args.file)
    result = build_packet(project, args.file, output)
    if file_sha256(args.file) != sha_before:
        raise CommandError(f"{args.file} changed while the packet was printed; the packet was written to "
                           f"{output} but not recorded, print it again")
    assert result.sha256 is not None
    record_packet(project, result.sha256, who, file_sha256=result.file_sha256)
    try:
        save_project(args.file, project)
    except OSError as error:
        raise CommandError(f"the packet was written to {output}, but {args.file} could not be saved to record it "
                           f"in the audit trail ({error.strerror or error}); the project file is unchanged") from error
    sys.stdout.write(f"{output}: {result.pages} pages, SHA-256 {result.sha256}; recorded in the audit trail of "
                     f"{args.file}\n")
    return 0
