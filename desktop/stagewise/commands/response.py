"""``stagewise response FILE [--stage ID [--in-chain | --from-input]] --freqs 10,1k,20k [--json]``.

Without ``--json`` prints a table for people: what is shown and its unit, then one row per
frequency (frequency, magnitude in dB, phase in degrees, real and imaginary parts). With
``--json`` prints ``{"points": [{"f_hz", "re", "im", "mag_db", "phase_deg"}, …]}`` for the chain (drive →
last output) by default, for a stage isolated with ``--stage``, and in chain with ``--in-chain``
(V_out/V_in of that stage where it sits; V_out/I_in for a current-driven stage), and from the
chain's drive to that stage's output with ``--from-input`` (V/V, or Ω, a transimpedance, for a
current drive). ``unit`` and ``what`` say which. Where the response is undefined, ``points`` is null with ``why`` beside it
and the exit status is 1. Phase is the principal value in (−180°, 180°] at each frequency.

``stability`` (``{"verdict": "stable" | "unstable" | null, "why", "poles"}``) gives the closed-loop
verdict of the system whose points are shown: H(jω) of an unstable system is still the formula's
value, but no measurement shows it (the output grows without bound), so the table prints a warning
line under its title. ``verdict`` null means the poles could not be computed (``why`` says why).
"""

from __future__ import annotations

import argparse
import math
from typing import Any

import numpy as np

from stagewise.cli import CommandError, printable
from stagewise.commands.common import load, parse_frequencies, print_json, stage_by_id
from stagewise.model.project import Project
from stagewise.model.values import format_value


def run(args: argparse.Namespace) -> int:
    from stagewise.engine.analysis import response_points  # noqa: PLC0415
    from stagewise.engine.mna import CircuitError  # noqa: PLC0415

    frequencies = parse_frequencies(args.freqs)
    from_input = bool(getattr(args, "from_input", False))
    if args.in_chain and args.stage is None:
        raise CommandError("--in-chain needs --stage ID")
    if from_input and args.stage is None:
        raise CommandError("--from-input needs --stage ID")
    if from_input and args.in_chain:
        raise CommandError("--in-chain and --from-input ask for different responses; give one of them")
    project = load(args.file)
    if args.stage is not None:
        stage_by_id(project, args.stage, args.file)
    try:
        unit, values, why = response_points(project, frequencies, args.stage, args.in_chain, from_input=from_input)
    except CircuitError as error:  # a circuit without a response: documented as null with why, exit 1
        unit, values, why = None, None, f"{args.file}: {error}"
    if args.stage is None:
        what = "chain"
    else:
        what = (f"stage {args.stage} from the chain input" if from_input
                else f"stage {args.stage} in chain" if args.in_chain else f"stage {args.stage} isolated")
    document: dict[str, object] = {"what": what, "unit": unit}
    if values is None:
        document["points"] = None
        document["why"] = why
        if args.json:
            print_json(document)
        else:
            print(printable(f"{args.file}: {what}: no response, because {why}."))
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
    document["stability"] = _stability(project, args.stage, "from_input" if from_input
                                       else "in_chain" if args.in_chain else "isolated")
    if args.json:
        print_json(document)
    else:
        stability = document["stability"]
        warning = None
        if stability["verdict"] == "unstable":
            warning = (f"warning: {what} is unstable: {stability['why']}; these points are the formula's H(jω), "
                       "not what a measurement shows (an unstable system has no steady state)")
        elif stability["verdict"] is None:
            warning = f"note: {stability['why']}; a steady state is assumed, not shown"
        _print_table(str(args.file), what, unit, points, warning)
    return 0


def _stability(project: Project, stage_id: str | None, place: str) -> dict[str, Any]:
    """The closed-loop verdict of the place whose points are printed (DESIGN 4: stability)."""
    from stagewise.engine.analysis import ProjectAnalysis  # noqa: PLC0415
    from stagewise.engine.stability import stability_to_json  # noqa: PLC0415

    analysis = ProjectAnalysis(project, spread=False)
    where = "chain" if stage_id is None else place
    verdict = analysis.stability(where, stage_id or "")
    if verdict is None:
        why = analysis.stability_unknown_why(where, stage_id or "")
        return {"verdict": None, "why": f"its stability is not known: {why}", "poles": []}
    return stability_to_json(verdict)


def _number(value: float | None, digits: int) -> str:
    if value is None:
        return "—"
    text = f"{value:.{digits}f}"
    return text.lstrip("-") if float(text) == 0 else text  # no "-0.000"


def _print_table(path: str, what: str, unit: str, points: list[dict[str, float | None]],
                 warning: str | None = None) -> None:
    """One row per frequency, columns aligned, units in the header (a warning line under the title)."""
    print(printable(f"{path}: {what} ({unit})"))
    if warning:
        print(printable(warning))
    # A transimpedance's magnitude in decibels is re 1 Ω (dBΩ), a voltage ratio's plain dB.
    header = ("frequency", "magnitude (dBΩ)" if unit == "Ω" else "magnitude (dB)", "phase (°)", "real", "imaginary")
    rows = [(format_value(float(point["f_hz"] or 0.0), "Hz"), _number(point["mag_db"], 3),
             _number(point["phase_deg"], 2), f"{point['re']:.6g}", f"{point['im']:.6g}") for point in points]
    widths = [max(len(header[column]), *(len(row[column]) for row in rows)) for column in range(len(header))]
    print("  ".join(text.rjust(width) for text, width in zip(header, widths, strict=True)))
    for row in rows:
        print("  ".join(text.rjust(width) for text, width in zip(row, widths, strict=True)))
