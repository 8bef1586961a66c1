"""`stagewise check FILE [--json]`: every check's state as an aligned table (or JSON).

Exit 0 when every check is met, waived or answered n/a and there is no automatic finding; 1 when
any check is not met, has no value or is a manual check still open (or answered no), or when an
automatic finding stands (an unstable stage or chain, over-range at the converter, an op-amp
output that clips or is slew-limited: listed whether or not a check asks about them); 2 when
the file cannot be read. Values come from
the analysis engine (``stagewise.engine.analysis.metric_provider``); when that is not part of
the build, numeric checks show "no value" with that reason: nothing is made up.
"""

from __future__ import annotations

import argparse
import importlib
import math
from typing import Any

from stagewise.cli import printable
from stagewise.commands.common import print_json
from stagewise.files.project_file import file_sha256, load_project
from stagewise.model.project import Project
from stagewise.model.values import format_value
from stagewise.review.audit import check_records
from stagewise.review.checks import (
    FINDING_WORDS,
    AutomaticFinding,
    CheckResult,
    MetricProvider,
    UnavailableProvider,
    automatic_findings,
    evaluate_project,
    totals,
)
from stagewise.review.metrics import METRICS
from stagewise.review.signoff import signoff_states
from stagewise.review.words import FOUR_EYES_WORD, WHERE_WORDS

ENGINE_MODULE = "stagewise.engine.analysis"
NO_ENGINE = "the analysis engine is not available in this build"
TEXT_WIDTH = 44


def metric_provider_for(project: Project) -> MetricProvider:
    """The engine's metric provider, or one that says why there are no values."""
    try:
        module = importlib.import_module(ENGINE_MODULE)
    except ModuleNotFoundError as error:
        if error.name in (ENGINE_MODULE, "stagewise.engine"):
            return UnavailableProvider(NO_ENGINE)
        raise
    factory = getattr(module, "metric_provider", None)
    if factory is None:
        return UnavailableProvider(NO_ENGINE)
    try:
        provider: MetricProvider = factory(project)
    except (ValueError, ArithmeticError) as error:
        return UnavailableProvider(f"the analysis of the project failed: {error}")
    return provider


def _metric_text(result: CheckResult) -> str:
    if result.metric is None:
        return "manual"
    label = METRICS[result.metric].label if result.metric in METRICS else result.metric
    where = WHERE_WORDS.get(result.where or "", result.where or "")
    at = "" if result.at_hz is None else f" @ {format_value(result.at_hz, 'Hz')}"
    reference = f" ({result.reference})" if result.reference else ""
    return f"{label}, {where}{at}{reference}"


def _short(text: str, width: int) -> str:
    text = " ".join(text.split())
    return text if len(text) <= width else text[: width - 1] + "…"


def _table(results: list[CheckResult]) -> list[str]:
    header = ("STAGE", "CHECK", "STATE", "VALUE", "LIMITS", "METRIC", "TEXT")
    # Every cell from the file is printed with its control characters escaped (ids, texts).
    rows = [(printable(r.stage_id), printable(r.check_id), str(r.state), r.value_text() if r.metric else "",
             printable(r.limits), printable(_metric_text(r)), _short(printable(r.text), TEXT_WIDTH))
            for r in results]
    widths = [max(len(row[i]) for row in [header, *rows]) for i in range(len(header))]
    lines = []
    for row in [header, *rows]:
        cells = [cell.rjust(widths[i]) if i == 3 else cell.ljust(widths[i]) for i, cell in enumerate(row)]
        lines.append("  ".join(cells).rstrip())
    return lines


def _reasons(results: list[CheckResult]) -> list[str]:
    """Why each check holds the list back; one line per reason shared by several checks."""
    groups: dict[tuple[str, str], list[str]] = {}
    for r in results:
        if r.why and not r.passing:
            groups.setdefault((str(r.state), printable(r.why)), []).append(
                f"{printable(r.stage_id)}/{printable(r.check_id)}")
    lines = []
    for (state, why), names in groups.items():
        if len(names) <= 3:
            lines.append(f"{', '.join(names)} {state}: {why}")
        else:
            lines.append(f"{len(names)} checks {state}: {why}")
    return lines


def _finding_lines(findings: list[AutomaticFinding]) -> list[str]:
    if not findings:
        return []
    width = max(len(FINDING_WORDS.get(item.kind, item.kind)) for item in findings)
    lines = [f"automatic findings ({len(findings)}; not waivable, each fails the checklist):"]
    lines += [f"  {FINDING_WORDS.get(item.kind, item.kind).upper().ljust(width)}  {printable(item.sentence)}"
              for item in findings]
    return lines


def _json(path: str, project: Project, results: list[CheckResult],
          findings: list[AutomaticFinding]) -> dict[str, Any]:
    def number(value: float | None) -> float | None:
        return value if value is not None and math.isfinite(value) else None

    counted = totals(results)
    return {
        "file": path,
        "sha256": file_sha256(path),
        "checks": [
            {"stage": r.stage_id, "id": r.check_id, "text": r.text, "metric": r.metric, "where": r.where,
             "at_hz": r.at_hz, "value": number(r.value), "unit": r.unit, "limits": r.limits,
             "state": str(r.state), "why": r.why, "reference": r.reference}
            for r in results
        ],
        "totals": {"met": counted.met, "not_met": counted.not_met, "waived": counted.waived,
                   "open": counted.open, "no_value": counted.no_value, "n/a": counted.not_applicable,
                   "total": counted.total},
        "signoffs": {stage_id: str(state.state) for stage_id, state in signoff_states(project).items()},
        "findings": [{"kind": item.kind, "word": FINDING_WORDS.get(item.kind, item.kind), "stage": item.stage_id,
                      "where": item.where, "ref": item.ref, "text": item.sentence} for item in findings],
    }


def run(args: argparse.Namespace) -> int:
    path = str(args.file)
    project = load_project(path)
    provider = metric_provider_for(project)
    results = evaluate_project(project, provider)
    findings = list(automatic_findings(provider))
    counted = totals(results)
    passing = counted.all_passing and not findings
    if getattr(args, "json", False):
        document = _json(path, project, results, findings)
        document["four_eyes_breaches"] = breaches = _four_eyes_lines(signoff_states(project))
        document["record_problems"] = mismatches = [problem.sentence for problem in check_records(project).problems]
        print_json(document)
        return 0 if passing and not breaches and not mismatches else 1
    print(f"{printable(project.title)} (revision {printable(project.revision) or '—'}): {printable(path)}")
    print()
    if results:
        for line in _table(results):
            print(line)
    else:
        print("no checks in this project")
    reasons = _reasons(results)
    if reasons:
        print()
        for line in reasons:
            print(line)
    if findings:
        print()
        for line in _finding_lines(findings):
            print(line)
    print()
    print(counted.sentence() + (f"; {len(findings)} automatic finding{'s' if len(findings) != 1 else ''}"
                                if findings else ""))
    states = signoff_states(project)
    print("sign-offs: " + ", ".join(f"{printable(stage_id)} {state.state}" for stage_id, state in states.items()))
    breaches = _four_eyes_lines(states) + _record_lines(project)
    for line in breaches:
        print(line)
    return 0 if passing and not breaches else 1


def _record_lines(project: Project) -> list[str]:
    """One line per review record and audit event that do not match (written, edited or removed
    outside the program; ``verify`` says the same): the checklist cannot pass over them."""
    return [f"review record does not match the audit trail: {printable(problem.sentence)}"
            for problem in check_records(project).problems]


def _four_eyes_lines(states: dict[str, Any]) -> list[str]:
    """One line per acceptance that breaks the project's four-eyes rule (settings.four_eyes)."""
    return [f"four-eyes rule broken: stage {printable(stage_id)} {FOUR_EYES_WORD} "
            f"({printable(view.signoff.name)}, who last changed it, at {printable(view.signoff.time)}); "
            "another reviewer must accept it"
            for stage_id, state in states.items() for view in state.four_eyes_breaches if not view.replaced]
