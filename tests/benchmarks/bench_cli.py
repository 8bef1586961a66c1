"""Command line: ``stagewise check`` on the hydrophone demo, cold (a fresh process).

check_cold
    A fresh interpreter runs ``python -m stagewise check`` on the demo and exits; timed from spawn
    to exit, so import cost counts. Goal: ≤ 1.0 s on this machine class. Baseline: a fresh
    interpreter that imports numpy and exits (the least any numerical command costs).
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

from run import Benchmark

ROOT = Path(__file__).resolve().parents[2]
DEMO = ROOT / "projects" / "hydrophone.stagewise.json"


def _environment() -> dict[str, str]:
    desktop = str(ROOT / "desktop")
    path = os.environ.get("PYTHONPATH", "")
    return {**os.environ, "PYTHONPATH": desktop + (os.pathsep + path if path else "")}


def _check(context: object) -> None:
    result = subprocess.run([sys.executable, "-m", "stagewise", "check", str(DEMO)], capture_output=True,
                            text=True, timeout=120, env=_environment())
    if result.returncode not in (0, 1) or "stage" not in result.stdout.lower():
        raise RuntimeError(f"check failed: {result.stderr.strip()[-400:]}")


def _numpy_only(context: object) -> None:
    subprocess.run([sys.executable, "-c", "import numpy"], check=True, timeout=120, env=_environment())


def benchmarks() -> list[Benchmark]:
    return [
        Benchmark("check_cold", _check, _numpy_only,
                  note="`stagewise check` on the hydrophone demo in a fresh process, spawn to exit; "
                       "baseline: a fresh interpreter importing numpy",
                  goal_seconds=1.0, repeats=5),
    ]
