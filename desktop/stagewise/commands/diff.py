"""`stagewise diff OLD NEW [--json]`: what changed and what it does to the review.

Prints one line per part and setting change (values as typed, ``old → new``), every check whose
state moves (old → new, with values; both projects evaluated with the engine's metric provider,
as ``check`` does), the sign-offs the changes put out of date, and the review records added and
removed. ``--json`` prints ``{"old", "new", "parts", "settings", "models", "stages", "checks",
"signoffs_stale", "records_added", "records_removed"}``. Exit 0 when nothing differs, 1 when
something does (as the usual ``diff`` tools), 2 when a file cannot be read.
"""

from __future__ import annotations

import argparse
from dataclasses import replace

from stagewise.cli import printable
from stagewise.commands.check import metric_provider_for
from stagewise.commands.common import load, print_json
from stagewise.review.diff import check_moves, diff_projects


def run(args: argparse.Namespace) -> int:
    old = load(args.old)
    new = load(args.new)
    result = diff_projects(old, new)
    result = replace(result, checks=check_moves(old, new, metric_provider_for(old), metric_provider_for(new)))
    if getattr(args, "json", False):
        print_json({"old": str(args.old), "new": str(args.new), **result.as_json()})
        return 0 if result.empty else 1
    print(f"--- {printable(args.old)}")
    print(f"+++ {printable(args.new)}")
    for line in result.lines():
        print(printable(line))
    return 0 if result.empty else 1
