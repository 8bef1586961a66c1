"""`stagewise diff OLD NEW`: what changed, part by part, and which sign-offs it makes stale.

Prints one line per change (values as typed, ``old → new``), then the sign-offs made stale.
Exit 0 when the projects do not differ, 1 when they do (as the usual ``diff`` tools), 2 when a
file cannot be read.
"""

from __future__ import annotations

import argparse

from stagewise.cli import printable
from stagewise.commands.common import load
from stagewise.review.diff import diff_projects


def run(args: argparse.Namespace) -> int:
    old = load(args.old)
    new = load(args.new)
    result = diff_projects(old, new)
    print(f"--- {printable(args.old)}")
    print(f"+++ {printable(args.new)}")
    for line in result.lines():
        print(printable(line))  # ids, values and notes from the files: control characters escaped
    return 0 if result.empty else 1
