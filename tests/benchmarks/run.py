"""Benchmark runner: ``python tests/benchmarks/run.py [--json] [--only NAME ...] [--repeats N]``.

Every ``bench_*.py`` module beside this file provides ``benchmarks() -> list[Benchmark]``. Each
benchmark times our code and a baseline measured in the same run (medians of several repeats),
and prints their ratio, so results compare across machines. With ``--json`` the output is
``{"benchmarks": [{"name", "ours_s", "baseline_s", "ratio", "goal", "met", "note"}]}``.
"""

from __future__ import annotations

import argparse
import importlib.util
import json
import statistics
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent.parent / "desktop"))
# Before any benchmark module imports numpy: the package sets its BLAS thread count, as the
# program does when it starts (stagewise/__init__.py).
import stagewise  # noqa: E402, F401


@dataclass
class Benchmark:
    """One entry: ``ours`` and ``baseline`` are callables timed alike.

    ``setup`` runs once before timing and its result is passed to both callables; ``before``, when
    given, runs before every timed call, outside the timing (a pause a user would make). The goal is
    ``ratio <= goal_ratio`` when ``goal_ratio`` is set; ``goal_seconds`` bounds ``ours_s`` for
    targets stated in seconds on this machine class (the baseline then shows the machine's speed).
    """

    name: str
    ours: Callable[[object], object]
    baseline: Callable[[object], object]
    note: str = ""
    setup: Callable[[], object] | None = None
    goal_ratio: float | None = None
    goal_seconds: float | None = None
    repeats: int = 5
    before: Callable[[object], object] | None = None


def _median_seconds(function: Callable[[object], object], context: object, repeats: int,
                    before: Callable[[object], object] | None = None) -> float:
    if before is not None:
        before(context)
    function(context)  # warm-up: imports, caches of the library (not ours: see each benchmark)
    samples = []
    for _ in range(repeats):
        if before is not None:
            before(context)
        start = time.perf_counter()
        function(context)
        samples.append(time.perf_counter() - start)
    return statistics.median(samples)


def discover() -> list[Benchmark]:
    """All benchmarks of the ``bench_*.py`` modules, in file order."""
    found: list[Benchmark] = []
    for path in sorted(HERE.glob("bench_*.py")):
        spec = importlib.util.spec_from_file_location(path.stem, path)
        assert spec is not None and spec.loader is not None
        module = importlib.util.module_from_spec(spec)
        sys.modules[path.stem] = module
        spec.loader.exec_module(module)
        found.extend(module.benchmarks())
    return found


def run(benchmark: Benchmark, repeats: int | None = None) -> dict[str, object]:
    context = benchmark.setup() if benchmark.setup else None
    count = repeats or benchmark.repeats
    ours = _median_seconds(benchmark.ours, context, count, benchmark.before)
    baseline = _median_seconds(benchmark.baseline, context, count, benchmark.before)
    ratio = ours / baseline if baseline > 0 else float("inf")
    goals = []
    met = True
    if benchmark.goal_ratio is not None:
        goals.append(f"ratio <= {benchmark.goal_ratio:g}")
        met = met and ratio <= benchmark.goal_ratio
    if benchmark.goal_seconds is not None:
        goals.append(f"ours_s <= {benchmark.goal_seconds:g}")
        met = met and ours <= benchmark.goal_seconds
    return {
        "name": benchmark.name,
        "ours_s": round(ours, 6),
        "baseline_s": round(baseline, 6),
        "ratio": round(ratio, 4),
        "goal": " and ".join(goals),
        "met": met,
        "note": benchmark.note,
    }


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--json", action="store_true", help="print JSON")
    parser.add_argument("--only", nargs="*", metavar="NAME", help="run only these benchmarks")
    parser.add_argument("--repeats", type=int, help="override the number of timed repeats")
    args = parser.parse_args(argv)
    results = []
    for benchmark in discover():
        if args.only and benchmark.name not in args.only:
            continue
        result = run(benchmark, args.repeats)
        results.append(result)
        if not args.json:
            mark = "met" if result["met"] else "NOT MET"
            print(f"{result['name']:<28} ours {result['ours_s']:.4f} s  baseline {result['baseline_s']:.4f} s  "
                  f"ratio {result['ratio']:.3f}  goal {result['goal']}: {mark}  {result['note']}")
    if args.json:
        print(json.dumps({"benchmarks": results}, indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main())
