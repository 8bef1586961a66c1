"""Helpers shared by the subcommands: loading a project, reading frequency lists, printing JSON.

Each raises :class:`stagewise.cli.CommandError` (or lets a ``ProjectFileError`` through) with one
sentence, which ``cli.main`` prints on stderr with exit status 2.
"""

from __future__ import annotations

import json
import sys
from typing import Any

from stagewise.files.project_file import load_project
from stagewise.model.project import Project, Stage
from stagewise.model.values import ValueSyntaxError, parse_value

__all__ = ["MAX_FREQUENCIES", "load", "parse_frequencies", "print_json", "stage_by_id"]

MAX_FREQUENCIES = 100_000


def load(path: str) -> Project:
    """Load a project; a ProjectFileError reaches the user as one sentence (exit 2)."""
    return load_project(path)


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
