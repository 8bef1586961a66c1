"""`stagewise measure FILE DATA (--stage ID [--in-chain] | --chain) [--by NAME] [--note TEXT] ...`.

Reads a bench measurement (Touchstone ``.s2p`` or CSV, see :mod:`stagewise.files.measurements`),
attaches it to a stage (isolated or in chain) or to the whole chain with the file's name and
SHA-256, who attached it and when, the instrument and set-up text, and the fingerprint of what
the measured response depends on; records an audit event ``measurement``; validates and saves
the project atomically. The project's edit lock is held meanwhile. On any error the project file
is left byte for byte as it was and the command exits with status 2 and one sentence.
"""

from __future__ import annotations

import argparse
from pathlib import Path

from stagewise.cli import CommandError, printable
from stagewise.commands.common import load, locked, person, stage_by_id
from stagewise.files.measurements import MeasurementError, read_measurement
from stagewise.files.project_file import save_project
from stagewise.model.project import Measurement, Project
from stagewise.model.validate import validate
from stagewise.review.measurements import attach_measurement
from stagewise.review.words import WHERE_WORDS


def _place(args: argparse.Namespace) -> tuple[str, str | None]:
    if args.chain:
        if args.stage or args.in_chain:
            raise CommandError("--chain measures the whole chain; leave out --stage and --in-chain")
        return "chain", None
    if not args.stage:
        raise CommandError("say where the measurement was taken: --stage ID (with --in-chain where it sits) "
                           "or --chain")
    return ("in_chain" if args.in_chain else "isolated"), args.stage


def run(args: argparse.Namespace) -> int:
    where, stage_id = _place(args)
    project = load(args.file)  # a missing or invalid project is reported before any lock file is made
    if stage_id is not None:
        stage = stage_by_id(project, stage_id, args.file)
        if where == "in_chain" and stage.bypass:
            raise CommandError(f'stage "{stage_id}" is bypassed, so it has no place in the chain to measure')
    who = person(args.by, "who attached the measurement")
    with locked(args.file, who):  # a stale lock is taken over with a line saying so
        return _attach(args, where, stage_id, who)


def _attach(args: argparse.Namespace, where: str, stage_id: str | None, who: str) -> int:
    project = load(args.file)
    stage = None if stage_id is None else project.stage(stage_id)
    drive = project.input.drive if stage is None else stage.drive
    data_path = Path(args.data)
    try:
        data = read_measurement(data_path, drive=drive, columns=args.columns)
    except MeasurementError as error:
        raise CommandError(str(error)) from error
    try:
        measurement = attach_measurement(project, data, where, stage_id, who,
                                         measurement_id=args.measurement_id, instrument=args.instrument or "",
                                         setup=args.setup or "", note=args.note or "")
    except ValueError as error:
        raise CommandError(f"{args.file}: {error}") from error
    problems = validate(project)
    if problems:
        raise CommandError(f"{args.file}: after attaching the measurement the project is not valid: "
                           + "; ".join(problems))
    save_project(args.file, project)
    place = "the whole chain" if stage_id is None else f'stage "{stage_id}" {WHERE_WORDS[where]}'
    print(printable(f'Attached measurement "{measurement.id}" ({data.points} points, {data.kind}) to {place} in '
                    f"{args.file}."))
    print(printable(f"  read: {data.source}; SHA-256 {data.sha256}"))
    _print_comparison(project, measurement)
    return 0


def _print_comparison(project: Project, measurement: Measurement) -> None:
    from stagewise.engine.measured import compare_measurement  # noqa: PLC0415

    comparison = compare_measurement(project, measurement)
    if measurement.kind == "step":
        step = comparison.step
        if step is None:
            print(printable(f"  step: {comparison.why.get('step', 'not measurable')}"))
            return
        rise = "—" if step.rise_s is None else f"{step.rise_s:.4g} s"
        overshoot = "—" if step.overshoot_pct is None else f"{step.overshoot_pct:.3g} %"
        settle = "—" if step.settle_1pct_s is None else f"{step.settle_1pct_s:.4g} s"
        print(f"  step: rise {rise}, overshoot {overshoot}, settling (1 %) {settle}")
        return
    if comparison.dev_db_max is None:
        print(printable(f"  deviation: {comparison.why.get('dev_db_max', 'could not be computed')}"))
        return
    inside = ("—" if comparison.inside_spread_pct is None
              else f"{comparison.inside_spread_pct:.1f} % of points inside the predicted spread")
    print(f"  deviation from the prediction: largest {comparison.dev_db_max:.3g} dB and "
          f"{comparison.dev_deg_max:.3g}°; {inside}")
