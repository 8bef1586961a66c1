"""`stagewise packet FILE -o OUT.pdf`: print the PDF review packet and record it in the audit trail.

The packet is written first (to a temporary file, renamed into place when complete). Then a
"packet printed" event naming the PDF's SHA-256 and the file's SHA-256 is appended to the
project's audit trail (``review.actions.record_packet``) and the project is saved atomically,
keeping the previous file as ``.bak``. The packet therefore names the file as it was *before*
this event; the event names the packet. ``--by`` says who printed it (default: the login name).

The edit lock is taken while the file is read and written (a stale one is taken over, with a
line saying so). When someone holds it (the project is open in the desktop program), the packet
is still printed and its event appended, because that changes nothing they edit: their
program merges what was appended into its next save (``ui.document.Document.save_merging``),
and a line on stderr says so. Before that append the packet waits up to
:data:`WAIT_FOR_WRITER_S` for the lock: a command writing the project holds it only for a moment,
and is then never raced. In every case the file is replaced only if its bytes are still
those the packet was printed from (checked after printing and again just before the atomic
replace; two writers racing inside that last instant are not excluded).
"""

from __future__ import annotations

import argparse
import hashlib
import sys
import time
from pathlib import Path

from stagewise.cli import CommandError
from stagewise.commands.common import load, note, person
from stagewise.files.lock import LockError, ProjectLock, acquire_lock

# How long a packet waits for a command holding the edit lock to finish its write (seconds).
WAIT_FOR_WRITER_S = 2.0


def run(args: argparse.Namespace) -> int:
    from stagewise.files.project_file import is_project_or_companion

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
    who = person(args.by, "who printed the packet")
    load(args.file)  # a missing or invalid project is reported before any lock file is made
    lock, holder = _take_lock(args.file, who)
    try:
        return _print_and_record(args, output, who, holder)
    finally:
        if lock is not None:
            lock.release()


def _take_lock(path: str, who: str) -> tuple[ProjectLock | None, str | None]:
    """The edit lock (a stale one taken over, with a line saying so), or who holds it.

    A lock held by someone else does not stop the packet: printing changes no design and no
    record, it only appends one audit event, which the holder's program merges into its next
    save (``ui.document.Document.save_merging``). The file itself is replaced only if it is
    still byte for byte what the packet was printed from.
    """
    try:
        lock = acquire_lock(path, who)
    except LockError as error:
        if error.state is None:
            raise CommandError(str(error)) from error
        return None, error.state.describe()
    if lock.note is not None:
        note(lock.note)
    return lock, None


def _wait_for_lock(path: str, who: str, seconds: float) -> ProjectLock | None:
    """The edit lock if its holder lets it go within ``seconds``, else ``None``."""
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        time.sleep(0.1)
        try:
            return acquire_lock(path, who)
        except LockError:
            continue
    return None


def _print_and_record(args: argparse.Namespace, output: Path, who: str, holder: str | None) -> int:
    from stagewise.files.project_file import file_sha256, loads_project, save_project
    from stagewise.report.packet import build_packet
    from stagewise.review.actions import record_packet

    data = Path(args.file).read_bytes()  # load() above refused anything but a bounded regular file
    project = loads_project(data, args.file)
    sha_before = hashlib.sha256(data).hexdigest()
    result = build_packet(project, args.file, output)
    if file_sha256(args.file) != sha_before:
        raise CommandError(f"{args.file} changed while the packet was printed; the packet was written to "
                           f"{output} but not recorded, print it again")
    assert result.sha256 is not None
    record_packet(project, result.sha256, who, file_sha256=result.file_sha256)
    # A command that writes the project holds its lock for a moment only: wait for it, so the
    # append below never races another command's write. The desktop program holds it for its
    # whole session: then append without it (its save merges what was appended).
    late_lock = _wait_for_lock(args.file, who, WAIT_FOR_WRITER_S) if holder is not None else None
    try:
        if file_sha256(args.file) != sha_before:  # checked again just before replacing it
            raise CommandError(f"{args.file} changed while the packet was printed; the packet was written to "
                               f"{output} but not recorded, print it again")
        save_project(args.file, project)
    except OSError as error:
        raise CommandError(f"the packet was written to {output}, but {args.file} could not be saved to record it "
                           f"in the audit trail ({error.strerror or error}); the project file is unchanged") from error
    finally:
        if late_lock is not None:
            late_lock.release()
    if late_lock is not None:
        holder = None
    sys.stdout.write(f"{output}: {result.pages} pages, SHA-256 {result.sha256}; recorded in the audit trail of "
                     f"{args.file}\n")
    if holder is not None:
        note(f"{args.file} is open for editing by {holder}; the packet event was appended to the file, and the "
             "program holding it merges it into its next save")
    return 0
