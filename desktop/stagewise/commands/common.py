"""Helpers shared by the subcommands: loading a project, reading frequency lists, printing JSON.

Each raises :class:`stagewise.cli.CommandError` (or lets a ``ProjectFileError`` through) with one
sentence, which ``cli.main`` prints on stderr with exit status 2.
"""

from __future__ import annotations

import getpass
import json
import os
import sys
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

from stagewise.files.input_files import InputFileError, read_regular_file
from stagewise.files.lock import LockError, ProjectLock, acquire_lock
from stagewise.files.project_file import load_project
from stagewise.model.project import Project, Stage
from stagewise.model.values import ValueSyntaxError, parse_value

__all__ = ["MAX_FREQUENCIES", "load", "locked", "note", "person", "parse_frequencies", "print_json", "read_input_file",
           "stage_by_id"]

MAX_FREQUENCIES = 100_000


def load(path: str) -> Project:
    """Load a project; a ProjectFileError reaches the user as one sentence (exit 2)."""
    return load_project(path)


@contextmanager
def locked(path: str | os.PathLike[str], who: str) -> Iterator[ProjectLock]:
    """Hold the edit lock of project ``path`` while a command writes it.

    A stale lock (its process gone on this host, or past the age limit of
    :mod:`stagewise.files.lock`) is taken over with a line on stderr saying whose it was and why
    it was stale. A held lock is refused with one sentence naming who holds it.

    Raises
    ------
    CommandError
        The project is open for editing elsewhere, or the lock cannot be written.
    """
    from stagewise.cli import CommandError

    try:
        lock = acquire_lock(path, who)
    except LockError as error:
        if error.state is None:
            raise CommandError(str(error)) from error
        raise CommandError(f"{error}; close it there and try again") from error
    if lock.note is not None:
        note(lock.note)
    try:
        yield lock
    finally:
        lock.release()


def person(by: str | None, recorded: str) -> str:
    """Who acts, from ``--by`` (stripped), else the login name.

    ``recorded`` says what the name is recorded as, for the messages ("who printed the packet").

    Raises
    ------
    CommandError
        ``--by`` is empty, or no login name can be found.
    """
    from stagewise.cli import CommandError

    if by is not None:
        if not by.strip():
            raise CommandError(f"--by needs a name: {recorded} is recorded in the audit trail")
        return by.strip()
    try:
        return getpass.getuser()
    except (KeyError, OSError) as error:
        raise CommandError(f"cannot tell {recorded}; give a name with --by") from error


def note(message: str) -> None:
    """One line for the user on stderr (``stagewise: note: ...``), control characters escaped."""
    from stagewise.cli import printable

    sys.stderr.write(f"stagewise: note: {printable(message)}\n")


def read_input_file(path: str | os.PathLike[str], what: str, plural: str, max_bytes: int) -> bytes:
    """The bytes of an input file that is a regular file no larger than ``max_bytes``
    (:func:`stagewise.files.input_files.read_regular_file`; a device, a pipe or a socket is
    refused before anything is read).

    Raises
    ------
    CommandError
        One sentence naming the file: missing, a folder, not a regular file, too large, unreadable.
    """
    from stagewise.cli import CommandError

    try:
        return read_regular_file(path, what, plural, max_bytes)
    except InputFileError as error:
        raise CommandError(str(error)) from error


def parse_frequencies(text: str, option: str = "--freqs") -> list[float]:
    """Frequencies in hertz from a comma-separated list such as ``10,1k,20k`` (engineering notation).

    Raises
    ------
    CommandError
        Naming the option and the entry that is not a positive frequency.
    """
    from stagewise.cli import CommandError

    entries = [entry.strip() for entry in text.split(",")]
    if not text.strip() or any(not entry for entry in entries):
        raise CommandError(f"{option}: give frequencies separated by commas, such as 10,1k,20k")
    if len(entries) > MAX_FREQUENCIES:
        raise CommandError(f"{option}: {len(entries)} frequencies is more than {MAX_FREQUENCIES}")
    frequencies: list[float] = []
    for index, entry in enumerate(entries, start=1):
        try:
            value = parse_value(entry)
        except ValueSyntaxError as error:
            raise CommandError(f"{option}: entry {index}: {error}") from error
        if not value > 0:
            raise CommandError(f'{option}: entry {index}: "{entry}" is not a frequency above 0 Hz')
        frequencies.append(value)
    return frequencies


def stage_by_id(project: Project, stage_id: str, source: str = "") -> Stage:
    """The stage called ``stage_id``; a CommandError listing the ids when there is none."""
    from stagewise.cli import CommandError

    stage = project.stage(stage_id)
    if stage is None:
        where = f"{source}: " if source else ""
        known = ", ".join(candidate.id for candidate in project.stages) or "none"
        raise CommandError(f'{where}there is no stage "{stage_id}"; the stages are {known}')
    return stage


def print_json(document: Any) -> None:
    """Print a JSON document (2-space indent, UTF-8, NaN never written)."""
    sys.stdout.write(json.dumps(document, indent=2, ensure_ascii=False, allow_nan=False) + "\n")
