"""``stagewise response FILE [--stage ID [--in-chain]] --freqs 10,1k,20k --json``.

Prints ``{"points": [{"f_hz", "re", "im", "mag_db", "phase_deg"}, …]}`` for the chain (drive →
last output) by default, for a stage isolated with ``--stage``, and in chain with ``--in-chain``
(V_out/V_in of that stage where it sits; V_out/I_in for a current-driven stage). ``unit`` and
``what`` say which. Where the response is undefined, ``points`` is null with ``why`` beside it
and the exit status is 1. Phase is the principal value in (−180°, 180°] at each frequency.
"""

from __future__ import annotations

import argparse
import math

import numpy as np

from stagewise.cli import CommandError
from stagewise.commands.common import load, parse_frequencies, print_json, stage_by_id


def run(args: argparse.Namespace) -> int:
    from stagewise.engine.analysis import response_points  # noqa: PLC0415

    frequencies = parse_frequencies(args.freqs)
    if args.in_chain and args.stage is None:
        raise CommandError("--in-chain needs --stage ID")
    project = load(args.file)
    if args.stage is not None:
        stage_by_id(project, args.stage, args.file)
    unit, values, why = response_points(project, frequencies, args.stage, args.in_chain)
    if args.stage is None:
        what = "chain"
    else:
        what = f"stage {args.stage} in chain" if args.in_chain else f"stage {args.stage} isolated"
    document: dict[str, object] = {"what": what, "unit": unit}
    if values is None:
        document["points"] = None
        document["why"] = why
        print_json(document)
        return 1
    points = []
    for f_hz, value in zip(frequencies, np.asarray(values, dtype=complex), strict=True):
        magnitude = abs(value)
        points.append({
            "f_hz": f_hz,
            "re": float(value.real),
            "im": float(value.imag),
            "mag_db": 20.0 * math.log10(magnitude) if magnitude > 0 else None,
            "phase_deg": math.degrees(math.atan2(value.imag, value.real)),
        })
    document["points"] = points
    print_json(document)
    return 0
