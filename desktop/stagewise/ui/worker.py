"""The background compute worker: engine calls off the GUI thread, newest edit wins.

Each request snapshots the project (a deep copy, so the user can keep editing) and runs the
registered analyses on a private thread pool. Results come back as an :class:`Outcome` in three
phases: the quick ones (responses, step, poles and zeros) first, then the review state (check
evaluation, noise, the chain's step), then the Monte Carlo spread, which follows in the
background (``spread_busy`` says it is still running; the review state does not wait for it).
A result that belongs to an older edit than the newest request is dropped, so views never flash
old numbers after new ones.

Scheduling is a throttle with a trailing run: a request when the worker has been idle for the
debounce interval starts at once (one edit → plots update without waiting); requests that
arrive while computing, or within the interval, are merged into one run afterwards, so typing
and repeated undo never queue up work.

Analyses plug in through :data:`STAGE_ANALYSES` and :data:`CHAIN_ANALYSES` (see
:mod:`stagewise.ui.analyses`); each returns a value or raises, and a failure becomes a
:class:`Computed` with ``value=None`` and the reason, shown in the view.
"""

from __future__ import annotations

import copy
import dataclasses
import threading
import time
from dataclasses import dataclass, field
from typing import Any

from PySide6.QtCore import QElapsedTimer, QObject, QRunnable, QThreadPool, QTimer, Signal

from stagewise.model.project import Project
from stagewise.review.words import SPREAD_CANCELLED
from stagewise.ui import analyses
from stagewise.ui.document import Document

__all__ = ["Computed", "ComputeWorker", "Outcome", "compute_outcome"]


@dataclass(frozen=True, slots=True)
class Computed:
    """One analysis result: ``value``, or ``None`` with ``why`` it could not be computed."""

    value: Any = None
    why: str = ""

    @property
    def ok(self) -> bool:
        return self.value is not None


@dataclass(slots=True)
class Outcome:
    """Everything the views show for one state of the project.

    ``stage[stage_id][name]`` and ``chain[name]`` hold :class:`Computed` results; ``phase`` is 1
    for the quick results, 2 when the review state (checks, noise) is in too, and 3 when every
    analysis has run (the spread).
    """

    generation: int
    phase: int
    stage: dict[str, dict[str, Computed]] = field(default_factory=dict)
    chain: dict[str, Computed] = field(default_factory=dict)
    elapsed_s: float = 0.0
    # The engine's ProjectAnalysis these results came from (None when no analysis made one); the
    # packet reuses it so that nothing is computed twice.
    analysis: Any = None
    # Slower results of the state before the newest edit, shown (and said to be previous) while
    # their own phase runs, so that no view blanks: keys (stage id or "chain", name).
    carried: set[tuple[str, str]] = field(default_factory=set)
    # While a view draws, the keys it reads (see :meth:`begin_reading`).
    _read_log: set[tuple[str, str]] | None = None

    def of_stage(self, stage_id: str, name: str) -> Computed:
        if self._read_log is not None:
            self._read_log.add((stage_id, name))
        return self.stage.get(stage_id, {}).get(name, Computed(None, "not computed yet"))

    def of_chain(self, name: str) -> Computed:
        if self._read_log is not None:
            self._read_log.add(("chain", name))
        return self.chain.get(name, Computed(None, "not computed yet"))

    def is_previous(self, key: str, name: str) -> bool:
        """True when the result of (stage id or "chain", name) predates the newest edit."""
        return (key, name) in self.carried

    def begin_reading(self) -> None:
        """Start noting which results are read (a view calls this before it draws)."""
        self._read_log = set()

    def end_reading(self) -> set[tuple[str, str]]:
        """Stop noting; the keys read since :meth:`begin_reading`."""
        read, self._read_log = self._read_log or set(), None
        return read

    def carry_from(self, previous: Outcome, stage_ids: list[str]) -> None:
        """Show ``previous``'s results for what this outcome has not computed yet, marked carried."""
        for name, value in previous.chain.items():
            if name not in self.chain:
                self.chain[name] = value
                self.carried.add(("chain", name))
        for stage_id in stage_ids:
            results = self.stage.setdefault(stage_id, {})
            for name, value in previous.stage.get(stage_id, {}).items():
                if name not in results:
                    results[name] = value
                    self.carried.add((stage_id, name))


# What _run gives for an analysis with nothing new in this phase (analyses.Unchanged).
_UNCHANGED = Computed(None, "unchanged")


def _run(function: Any, *arguments: Any) -> Computed:
    try:
        value = function(*arguments)
    except analyses.Unchanged:
        return _UNCHANGED
    except analyses.NotAvailable as reason:
        return Computed(None, str(reason))
    except Exception as error:  # noqa: BLE001 - an analysis failure is shown in its view, never crashes the GUI
        return Computed(None, analyses.explain(error))
    if value is None:
        return Computed(None, "nothing to show")
    return Computed(value)


class Superseded(Exception):  # noqa: N818 - reads as "superseded by a newer edit"
    """A newer edit made the running computation pointless."""


def compute_outcome(project: Project, baseline: Project | None, generation: int, phase: int,
                    context: analyses.Context, previous: Outcome | None = None,
                    superseded: Any = None) -> Outcome:
    """Run the analyses of one phase on a snapshot (the worker thread calls this; tests too).

    ``superseded`` is asked between analyses; when it says so, :class:`Superseded` is raised
    and the rest is skipped (a newer edit is waiting).
    """
    start = time.perf_counter()
    outcome = Outcome(generation, phase)
    if previous is not None:
        outcome.stage = {key: dict(value) for key, value in previous.stage.items()}
        outcome.chain = dict(previous.chain)
        outcome.analysis = previous.analysis
        outcome.carried = set(previous.carried)
    context.begin(project, baseline)
    context.phase = phase

    def check() -> None:
        if superseded is not None and superseded():
            raise Superseded

    for stage in project.stages:
        results = outcome.stage.setdefault(stage.id, {})
        for name, analysis_phase, function in analyses.STAGE_ANALYSES:
            if analysis_phase == phase:
                check()
                computed = _run(function, stage, project, context)
                if computed is not _UNCHANGED:
                    results[name] = computed
                    outcome.carried.discard((stage.id, name))
    for name, analysis_phase, function in analyses.CHAIN_ANALYSES:
        if analysis_phase == phase:
            check()
            computed = _run(function, project, context)
            if computed is not _UNCHANGED:
                outcome.chain[name] = computed
                outcome.carried.discard(("chain", name))
    if phase == 3:
        check()  # a spread stopped early because a newer edit waits is dropped, not shown
    outcome.analysis = context.chain_state.get("project_analysis", outcome.analysis)
    outcome.elapsed_s = time.perf_counter() - start
    return outcome


# Quiet time after an edit's review state before the Monte Carlo starts (milliseconds).
SPREAD_DELAY_MS = 600


class _JobSignals(QObject):
    done = Signal(object)


class _Job(QRunnable):
    def __init__(self, work: Any, signals: _JobSignals) -> None:
        super().__init__()
        self.setAutoDelete(False)
        self._work = work
        self.signals = signals

    def run(self) -> None:
        self.signals.done.emit(self._work())


class ComputeWorker(QObject):
    """Recomputes the document's analyses in the background.

    Signals
    -------
    outcomeReady(Outcome) : new results (phase 1, 2, then 3) for the newest request.
    busyChanged(bool) : computing or waiting to compute; views mark their results stale.
    spreadBusyChanged(bool) : the Monte Carlo spread (phase 3) of the newest edit is running.
    spreadProgress(int, int) : the running Monte Carlo's work done and its total (from the
        engine's meter, between chunks of samples; ``done`` never decreases within one run).
        :meth:`cancel_spread` stops it: the spread is then "not computed: cancelled by the
        user", every other result stays, and the next edit starts afresh.
    formulaReady(str, object) : the symbolic formula of a stage (its fingerprint, the result).
    """

    outcomeReady = Signal(object)
    busyChanged = Signal(bool)
    spreadBusyChanged = Signal(bool)
    spreadProgress = Signal(int, int)
    formulaReady = Signal(str, object)

    def __init__(self, document: Document, debounce_ms: int = 150, parent: QObject | None = None,
                 spread_delay_ms: int = SPREAD_DELAY_MS) -> None:
        super().__init__(parent)
        self._document = document
        # Quick results and slow results run on separate threads, so that an edit made while the
        # spread is still computing is shown at once; each thread has its own context (caches).
        self._pool = QThreadPool(self)
        self._pool.setMaxThreadCount(1)
        self._slow_pool = QThreadPool(self)
        self._slow_pool.setMaxThreadCount(1)
        self._spread_pool = QThreadPool(self)
        self._spread_pool.setMaxThreadCount(1)
        self._formula_pool = QThreadPool(self)
        self._formula_pool.setMaxThreadCount(1)
        self._context = analyses.Context()
        self._slow_context = analyses.Context()
        self._spread_context = analyses.Context()
        self._formula_context = analyses.Context()
        self._generation = 0
        self._completed_generation = 0
        self._spread_generation = 0
        self._spread_busy = False
        # Set by cancel_spread; a new one for each run of the spread.
        self._spread_cancel = threading.Event()
        self._spread_running = False
        self._running = False
        self._pending = False
        self._busy = False
        self._latest: Outcome | None = None
        self._jobs: list[_Job] = []
        self._since_start = QElapsedTimer()
        self._debounce_ms = debounce_ms
        self._timer = QTimer(self)
        self._timer.setSingleShot(True)
        self._timer.timeout.connect(self._start)
        self._spread_delay_ms = spread_delay_ms
        self._spread_args: tuple[Outcome, Project, Project | None] | None = None
        self._spread_timer = QTimer(self)
        self._spread_timer.setSingleShot(True)
        self._spread_timer.timeout.connect(self._start_spread_now)
        self._formulas: dict[str, Computed] = {}
        self._formula_running: set[str] = set()
        self._deferred_formulas: list[str] = []
        self._started = False
        self._closed = False
        document.modelEdited.connect(self.request)

    @property
    def latest(self) -> Outcome | None:
        """The newest complete or partial outcome delivered."""
        return self._latest

    @property
    def quick_pending(self) -> bool:
        """The quick results of the newest edit are not delivered yet."""
        latest = self._latest
        return (self._running or self._pending or self._timer.isActive()
                or latest is None or latest.generation < self._generation)

    @property
    def is_busy(self) -> bool:
        """Computing or about to: quick results, or slow results of the newest edit."""
        return (self._running or self._pending or self._timer.isActive()
                or self._completed_generation < self._generation)

    @property
    def spread_busy(self) -> bool:
        """The spread (phase 3) of the newest edit is not in yet."""
        return self._spread_generation < self._generation

    def _set_spread_busy(self, busy: bool) -> None:
        if busy != self._spread_busy:
            self._spread_busy = busy
            self.spreadBusyChanged.emit(busy)

    def formula_busy(self) -> bool:
        return bool(self._formula_running)

    def request(self) -> None:
        """Ask for a recomputation of the document's current state."""
        if self._closed:
            return
        if not self._started:
            # Formulas asked for before the first analysis (while the window was being built)
            # start now: sympy then loads after the first paint, not during start-up.
            self._started = True
            for stage_id in self._deferred_formulas:
                self.request_formula(stage_id)
            self._deferred_formulas.clear()
        idle_long_enough = not self._since_start.isValid() or self._since_start.elapsed() >= self._debounce_ms
        if self._running:
            self._pending = True
        elif idle_long_enough and not self._timer.isActive():
            self._start()
        elif not self._timer.isActive():
            self._timer.start(self._debounce_ms)
        self._set_busy(True)

    def _set_busy(self, busy: bool) -> None:
        if busy != self._busy:
            self._busy = busy
            self.busyChanged.emit(busy)

    def _start(self) -> None:
        if self._closed:
            return
        if self._running:
            self._pending = True
            return
        self._pending = False
        self._generation += 1
        generation = self._generation
        project = copy.deepcopy(self._document.project)
        baseline = self._document.baseline
        context = self._context
        self._running = True
        self._since_start.start()
        self._set_spread_busy(True)

        def quick() -> Outcome:
            return compute_outcome(project, baseline, generation, 1, context)

        self._submit(self._pool, quick, lambda first: self._quick_done(first, project, baseline))

    def _submit(self, pool: QThreadPool, work: Any, on_done: Any) -> None:
        signals = _JobSignals()
        job = _Job(work, signals)
        self._jobs.append(job)

        def finished(result: object) -> None:
            if job in self._jobs:
                self._jobs.remove(job)
            on_done(result)

        signals.done.connect(finished)
        pool.start(job)

    def _quick_done(self, first: Outcome, project: Project, baseline: Project | None) -> None:
        if self._closed:
            return
        self._running = False
        newest = first.generation == self._generation and not self._pending
        if newest:
            if self._latest is not None:
                # Until the slow phase of this edit is done, its views show the previous slow
                # results (said to be previous) instead of blanking.
                first.carry_from(self._latest, [stage.id for stage in project.stages])
            self._latest = first
            self.outcomeReady.emit(first)
            slow_context = self._slow_context

            def slow() -> Outcome | None:
                # After the quick results (they share two cores and one interpreter lock, and the
                # plots come first); a newer edit makes it obsolete: skip the rest of the work.
                try:
                    return compute_outcome(project, baseline, first.generation, 2, slow_context, previous=first,
                                           superseded=lambda: first.generation != self._generation)
                except Superseded:
                    return None

            self._submit(self._slow_pool, slow, lambda second: self._slow_done(second, project, baseline))
        if self._pending:
            self._start()

    def _slow_done(self, outcome: Outcome | None, project: Project | None = None,
                   baseline: Project | None = None) -> None:
        if self._closed or outcome is None:
            return
        self._completed_generation = max(self._completed_generation, outcome.generation)
        if outcome.phase >= 3:
            self._spread_generation = max(self._spread_generation, outcome.generation)
        if outcome.generation == self._generation and not self._pending and not self._running:
            self._latest = outcome
            self.outcomeReady.emit(outcome)
        if not self.is_busy:
            self._set_busy(False)
        if not self.spread_busy:
            self._set_spread_busy(False)
        if outcome.phase == 2 and project is not None and outcome.generation == self._generation:
            # The Monte Carlo keeps both cores busy for a while: it starts once the user has
            # paused (no edit for SPREAD_DELAY_MS), so a run of edits gets its review state at once.
            self._spread_args = (outcome, project, baseline)
            self._spread_timer.start(self._spread_delay_ms)

    def _start_spread_now(self) -> None:
        arguments, self._spread_args = self._spread_args, None
        if arguments is None or self._closed or arguments[0].generation != self._generation:
            return
        self._start_spread(*arguments)

    def _start_spread(self, second: Outcome, project: Project, baseline: Project | None) -> None:
        """Phase 3 on a thread of its own, so that the next edit's review state never waits for it."""
        spread_context = self._spread_context
        cancel = self._spread_cancel = threading.Event()
        generation = second.generation
        shown = [-1]

        def progress(done: int, total: int) -> bool:
            # On the spread's thread: the signal is queued to the window's thread. Whole
            # thousandths only, so a run of many small chunks does not flood the event queue;
            # nothing once the run is to stop (cancelled, or a newer edit waits).
            if cancel.is_set() or generation != self._generation:
                return True
            step = 1000 * done // total if total > 0 else 0
            if step != shown[0]:
                shown[0] = step
                self.spreadProgress.emit(done, total)
            return False

        spread_context.spread_progress = progress
        self._spread_running = True

        def spread() -> Outcome | None:
            try:
                return compute_outcome(project, baseline, second.generation, 3, spread_context, previous=second,
                                       superseded=lambda: second.generation != self._generation)
            except Superseded:
                return None

        def done(outcome: Outcome | None) -> None:
            self._spread_running = False
            self._slow_done(outcome)

        self._submit(self._spread_pool, spread, done)

    @property
    def spread_running(self) -> bool:
        """A run of the spread's phase is on its thread now (not merely waiting for a pause)."""
        return self._spread_running

    def cancel_spread(self) -> None:
        """Stop the running Monte Carlo at its next chunk of samples (the Cancel button)."""
        self._spread_cancel.set()

    def analysis_of(self, project: Project) -> Any:
        """The engine's ProjectAnalysis of ``project`` as it is now, or ``None``.

        Given only when every analysis of the newest edit has finished (no thread still uses the
        object) and the analysed snapshot equals ``project``, its audit trail aside (recording
        an event changes no number).
        """
        latest = self._latest
        if self.is_busy or self.spread_busy or latest is None or latest.phase < 3 or latest.analysis is None:
            return None
        if latest.of_chain("spread").why == SPREAD_CANCELLED:
            return None  # the packet computes its spread afresh rather than print a cancelled one
        analysed = getattr(latest.analysis, "project", None)
        if not isinstance(analysed, Project):
            return None
        if dataclasses.replace(analysed, audit=[]) != dataclasses.replace(project, audit=[]):
            return None
        if getattr(latest.analysis, "spread_deferred", None) is not None:
            return None  # made before the spread's phase: its yield and envelopes were left out
        latest.analysis.spread_progress = None  # no thread uses it any more: nothing to report
        return latest.analysis

    # ----------------------------------------------------------------- formulas
    def request_formula(self, stage_id: str) -> Computed | None:
        """The symbolic formula of a stage: cached result now, or ``None`` and formulaReady later."""
        stage = self._document.project.stage(stage_id)
        if stage is None or self._closed:
            return None
        if not self._started:
            self._deferred_formulas.append(stage_id)
            return None
        key = analyses.stage_key(stage, self._document.project)
        if key in self._formulas:
            return self._formulas[key]
        if key in self._formula_running:
            return None
        snapshot = copy.deepcopy(stage)
        project = copy.deepcopy(self._document.project)
        self._formula_running.add(key)
        signals = _JobSignals()
        formula_context = self._formula_context
        job = _Job(lambda: _run(analyses.stage_formula, snapshot, project, formula_context), signals)
        self._jobs.append(job)

        def finished(result: object) -> None:
            if job in self._jobs:
                self._jobs.remove(job)
            self._formula_running.discard(key)
            assert isinstance(result, Computed)
            self._formulas[key] = result
            if not self._closed:
                self.formulaReady.emit(key, result)

        signals.done.connect(finished)
        self._formula_pool.start(job)
        return None

    def close(self) -> None:
        """Stop scheduling; wait for the running jobs so no thread outlives the window."""
        self._closed = True
        self._timer.stop()
        self._spread_timer.stop()
        for pool in (self._pool, self._slow_pool, self._spread_pool, self._formula_pool):
            pool.clear()
            pool.waitForDone(60000)
        self._set_busy(False)
        self._set_spread_busy(False)
