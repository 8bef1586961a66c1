"""`stagewise verify`: not built yet."""

from __future__ import annotations

import argparse

from stagewise.cli import CommandError


def run(args: argparse.Namespace) -> int:
    raise CommandError("'verify' is not available yet in this build")
