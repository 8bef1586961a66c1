"""Desktop program: start-up to first paint, and one edit to updated plots.

gui_first_paint
    A fresh process opens the hydrophone demo offscreen and quits once the main window has
    painted (``STAGEWISE_FIRST_PAINT=1``); timed from spawn to exit. Baseline: a process that
    paints a bare PySide6 window and quits the same way. Goal: ≤ 1.5 s on this machine class.
gui_edit_to_plot
    One part value edited through the document (as the parts table does) until every plot
    showing quick results (response, step, poles and zeros) has redrawn with the new values.
    Baseline: the same analyses called directly, without the GUI. Goal: ≤ 0.1 s. Each timed
    edit follows an untimed pause of 0.2 s (``PAUSE_S``), as between a user's edits.
gui_edit_to_all_results
    The same edit until the review state is shown: check states, noise and the headline figures
    (phase 2 of the worker). Goal: ≤ 0.3 s. The Monte Carlo spread (phase 3) follows on a thread
    of its own, with the spread view saying it is running, once the user has paused for
    ``worker.SPREAD_DELAY_MS`` (0.6 s); the 0.2 s pauses between the timed edits are shorter, as
    between a user's quick edits, so it does not run beside them here.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

from run import Benchmark

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

ROOT = Path(__file__).resolve().parents[2]
DEMO = ROOT / "projects" / "hydrophone.stagewise.json"

BARE_WINDOW = """
import sys, time
from PySide6.QtCore import QEvent, QObject, QTimer
from PySide6.QtWidgets import QApplication, QMainWindow
app = QApplication(sys.argv[:1])
window = QMainWindow()
class Painted(QObject):
    def eventFilter(self, watched, event):
        if event.type() == QEvent.Type.Paint:
            watched.removeEventFilter(self)
            QTimer.singleShot(0, lambda: (print(f"first-paint {time.time():.6f}", flush=True), app.quit()))
        return False
painted = Painted()
window.installEventFilter(painted)
window.resize(1440, 900)
window.show()
app.exec()
"""


def _environment(folder: str) -> dict[str, str]:
    return {**os.environ, "QT_QPA_PLATFORM": "offscreen", "STAGEWISE_FIRST_PAINT": "1",
            "STAGEWISE_SETTINGS": str(Path(folder) / "settings.ini")}


def _spawn(arguments: list[str], folder: str) -> None:
    result = subprocess.run(arguments, capture_output=True, text=True, timeout=120, env=_environment(folder),
                            cwd=folder)
    if "first-paint" not in result.stdout:
        raise RuntimeError(f"no first paint reported: {result.stderr.strip()[-400:]}")


def _first_paint_setup() -> dict[str, str]:
    folder = tempfile.mkdtemp(prefix="stagewise-bench-")
    project = Path(folder) / DEMO.name
    shutil.copyfile(DEMO, project)
    return {"folder": folder, "project": str(project)}


def _ours_first_paint(context: object) -> None:
    assert isinstance(context, dict)
    _spawn([sys.executable, "-m", "stagewise", context["project"]], context["folder"])


def _bare_first_paint(context: object) -> None:
    assert isinstance(context, dict)
    _spawn([sys.executable, "-c", BARE_WINDOW], context["folder"])


class _EditContext:
    """A main window on the demo with its first analysis done, and values to alternate."""

    def __init__(self) -> None:
        from stagewise.files.project_file import load_project
        from stagewise.ui.app import application
        from stagewise.ui.main_window import MainWindow

        self.folder = tempfile.mkdtemp(prefix="stagewise-bench-")
        os.environ["STAGEWISE_SETTINGS"] = str(Path(self.folder) / "settings.ini")
        self.app = application()
        self.window = MainWindow(load_project(DEMO), None, interactive=False)
        self.window.resize(1440, 900)
        self.window.show()
        if not self.window.wait_until_idle(120):
            raise RuntimeError("the first analysis did not finish")
        stage = next(s for s in self.window.document.project.stages
                     if any(p.type == "R" for p in s.parts))
        self.stage_id = stage.id
        self.ref = next(p.ref for p in stage.parts if p.type == "R")
        original = next(p for p in stage.parts if p.ref == self.ref).value
        self.values = [str(original.raw), f"{original.si * 1.1:.6g}"]
        self.document = self.window.document
        self.document.set_current_stage(self.stage_id)
        self.count = 0

    def edit(self) -> None:
        self.count += 1
        self.document.set_part_field(self.stage_id, self.ref, "value", self.values[self.count % 2])

    def wait_phase(self, phase: int) -> None:
        import time

        worker = self.window.worker
        start_generation = worker._generation  # noqa: SLF001 - the request the edit started
        deadline = time.monotonic() + 120
        while time.monotonic() < deadline:
            self.app.processEvents()
            latest = worker.latest
            if latest is not None and latest.generation >= start_generation and latest.phase >= phase:
                return
            time.sleep(0.0005)
        raise RuntimeError("the edit was not recomputed in time")


def _edit_setup() -> _EditContext:
    return _EditContext()


# A user pauses between two committed edits; the worker starts an edit at once after such a
# pause and merges edits closer together than its 150 ms debounce. Each timed call therefore
# follows this pause, outside the timing.
PAUSE_S = 0.2


def _pause(context: object = None) -> None:
    import time

    from stagewise.ui.app import application

    app = application()
    end = time.monotonic() + PAUSE_S
    while time.monotonic() < end:
        app.processEvents()
        time.sleep(0.002)


def _settle_and_pause(context: object) -> None:
    """Untimed: the previous edit's quick results are in, then a user's pause."""
    assert isinstance(context, _EditContext)
    context.wait_phase(1)
    _pause()


def _ours_edit_to_plot(context: object) -> None:
    # No waiting for the previous edit's slow results: they run on their own thread, as when
    # a user types while the spread is still being computed.
    assert isinstance(context, _EditContext)
    context.edit()
    context.wait_phase(1)


def _ours_edit_to_all(context: object) -> None:
    assert isinstance(context, _EditContext)
    context.edit()
    context.wait_phase(2)


def _baseline_engine_only(context: object) -> None:
    """The phase-1 analyses of the same project called directly (no Qt, no worker, no caches)."""
    import copy

    from stagewise.ui import analyses
    from stagewise.ui.worker import compute_outcome

    assert isinstance(context, _EditContext)
    project = copy.deepcopy(context.document.project)
    compute_outcome(project, None, 0, 1, analyses.Context())


def benchmarks() -> list[Benchmark]:
    return [
        Benchmark("gui_first_paint", _ours_first_paint, _bare_first_paint,
                  note="spawn to first paint of the main window on the hydrophone demo, then exit; "
                       "baseline: a bare PySide6 window process",
                  setup=_first_paint_setup, goal_seconds=1.5, repeats=3),
        Benchmark("gui_edit_to_plot", _ours_edit_to_plot, _baseline_engine_only,
                  note=f"one value edited (after an untimed {PAUSE_S:g} s pause) to response/step/pole plots "
                       "redrawn; baseline: the same analyses without the GUI, uncached",
                  setup=_edit_setup, goal_seconds=0.1, repeats=7, before=_settle_and_pause),
        Benchmark("gui_edit_to_all_results", _ours_edit_to_all, _baseline_engine_only,
                  note="one value edited to check states, noise and headline figures shown (the Monte Carlo "
                       "follows in the background); baseline: the phase-1 analyses without the GUI, uncached",
                  setup=_edit_setup, goal_seconds=0.3, repeats=5, before=_pause),
    ]
