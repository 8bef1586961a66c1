"""``stagewise analyze FILE --json``: every metric, per stage and for the chain (DESIGN section 6)."""

from __future__ import annotations

import argparse

from stagewise.commands.common import load, print_json


def run(args: argparse.Namespace) -> int:
    from stagewise.engine.analysis import analyze_project  # noqa: PLC0415  (heavy: only when asked)

    project = load(args.file)
    document = analyze_project(project, args.file)
    # JSON is the one output format; --json is accepted so scripts can say what they expect.
    print_json(document)
    return 0
