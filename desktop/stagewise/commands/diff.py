"""`stagewise diff`: not built yet."""

from __future__ import annotations

import argparse

from stagewise.cli import CommandError


def run(args: argparse.Namespace) -> int:
    raise CommandError("'diff' is not available yet in this build")
