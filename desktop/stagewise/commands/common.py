"""Helpers shared by the subcommands."""

from __future__ import annotations

import json
import sys
from typing import Any

from stagewise.files.project_file import load_project
from stagewise.model.project import Project

__all__ = ["load", "print_json"]


def load(path: str) -> Project:
    """Load a project; a ProjectFileError reaches the user as one sentence (exit 2)."""
    return load_project(path)


def print_json(document: Any) -> None:
    """Print a JSON document (2-space indent, UTF-8, NaN never written)."""
    sys.stdout.write(json.dumps(document, indent=2, ensure_ascii=False, allow_nan=False) + "\n")
