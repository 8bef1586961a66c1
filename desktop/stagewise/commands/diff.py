"""`stagewise diff OLD NEW`: what changed, part by part, and which sign-offs it makes stale.

Prints one line per change (values as typed, ``old → new``), then the sign-offs made stale.
Exit 0 when the projects do not differ, 1 when they do (as the usual ``diff`` tools), 2 when a
file cannot be read.
"""

from __future__ import annotations

import argparse

from stagewise.commands.common import load
from stagewise.review.diff import diff_projects


def run(args: argparse.Namespace) -> int:
    old = load(args.old)
    new = load(args.new)
    result = diff_projects(old, new)
    print(f"--- {args.old}")
    print(f"+++ {args.new}")
    for line in result.lines():
        print(line)
    return 0 if result.empty else 1
