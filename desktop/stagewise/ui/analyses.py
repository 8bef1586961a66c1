"""What the worker computes for the views: thin adapters from engine results to view data.

Every function here takes model objects (and a :class:`Context` with the frequency grid and
caches), calls the engine, and returns a small frozen record the views draw. No numerics of our
own: conversions are the engine's. Engine modules are imported inside the functions, so this
module costs nothing at start-up and sympy or scipy.signal load only in the worker thread.

Two registries say what runs for each stage and for the whole chain, and in which phase
(1: quick, shown at once; 2: the review state, shown when ready; 3: the Monte Carlo spread,
which follows in the background). A view looks its results up by name.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from stagewise.model.project import Project, Stage

__all__ = [
    "CHAIN_ANALYSES",
    "STAGE_ANALYSES",
    "Context",
    "NotAvailable",
    "Unchanged",
    "ResponseTrace",
    "explain",
    "stage_formula",
    "stage_key",
]


class Unchanged(Exception):  # noqa: N818 - reads as "the result is unchanged"
    """The analysis has nothing new in this phase: the result of an earlier phase stands."""


class NotAvailable(Exception):  # noqa: N818 - it reads as "not available: why"
    """An analysis that does not apply here; the message says why in one sentence."""


@dataclass(frozen=True, slots=True)
class ResponseTrace:
    """A frequency response ready to draw: frequencies (Hz), magnitude (dB), phase (degrees)."""

    f_hz: NDArray[np.float64]
    mag_db: NDArray[np.float64]
    phase_deg: NDArray[np.float64]
    unit: str = "V/V"


class Context:
    """Per-worker state: the analysis grid of the current snapshot and caches by fingerprint.

    Only one thread uses a context at a time (each worker pool has its own).
    """

    def __init__(self) -> None:
        self.f_hz: NDArray[np.float64] = np.zeros(0)
        self.baseline: Project | None = None
        self._cache: dict[tuple[str, ...], Any] = {}
        self._grid_key: tuple[float, float, int] = (0.0, 0.0, 0)
        self.chain_state: dict[str, Any] = {}
        self._engine: Any = None
        # Results of the engine's project analysis kept across snapshots (keyed by what decides
        # them: see ProjectAnalysis), and the steps drawn from in-chain analyses already seen.
        self.analysis_memo: dict[tuple[Any, ...], Any] = {}
        self.steps_of: dict[int, tuple[Any, Any]] = {}
        # The Monte Carlo's progress callback (engine.spread.Meter): the worker sets it on the
        # spread's context; ``progress(done, total) -> bool``, True to stop.
        self.spread_progress: Any = None
        # The worker's phase this context computes (1 quick, 2 review state, 3 spread; 0 outside
        # the worker): before phase 3 the yield is said to follow rather than computed.
        self.phase = 0

    @property
    def engine(self) -> Any:
        """The chain engine of this worker: its stage reductions are cached by fingerprint, so
        after an edit only the edited stage is reduced again."""
        if self._engine is None:
            from stagewise.engine.chain import ChainEngine

            self._engine = ChainEngine()
        return self._engine

    def begin(self, project: Project, baseline: Project | None) -> None:
        """Start work on a snapshot: new grid when the settings changed, keep valid caches."""
        from stagewise.engine.sweep import frequency_grid

        settings = project.settings
        key = (settings.f_min_hz.si, settings.f_max_hz.si, settings.points_per_decade)
        if key != self._grid_key:
            self._grid_key = key
            self.f_hz = frequency_grid(settings)
            self._cache.clear()
        self.baseline = baseline
        self.chain_state = {}
        # Keep the cache small: a long session of edits must not grow it without end.
        if len(self._cache) > 400:
            self._cache.clear()
        if len(self.steps_of) > 100:
            self.steps_of.clear()

    def cached(self, key: tuple[str, ...], compute: Any) -> Any:
        if key not in self._cache:
            self._cache[key] = compute()
        return self._cache[key]


def stage_key(stage: Stage, project: Project) -> str:
    """The stage's fingerprint: caches and formula requests are keyed by it."""
    from stagewise.model.fingerprint import stage_fingerprint

    return stage_fingerprint(stage, project)


def explain(error: BaseException) -> str:
    """One sentence for an analysis that failed."""
    text = " ".join(str(error).split()) or type(error).__name__
    if isinstance(error, np.linalg.LinAlgError):
        return "the circuit cannot be solved (its matrix is singular): check for floating nodes or loops of sources"
    return text


def _problems(stage: Stage, project: Project) -> None:
    from stagewise.model.validate import validate_stage

    index = project.stages.index(stage) if stage in project.stages else 0
    problems = validate_stage(stage, project, f"stages[{index}]")
    if problems:
        raise NotAvailable(problems[0].partition(": ")[2] or problems[0])


def _trace(f_hz: NDArray[np.float64], response: NDArray[np.complex128], unit: str) -> ResponseTrace:
    # Decibels of a magnitude ratio and the phase unwrapped along the sweep: presentation of
    # the engine's complex response, as the engine's own metrics define them.
    magnitude = np.abs(response)
    with np.errstate(divide="ignore"):
        mag_db = 20.0 * np.log10(magnitude)
    phase_deg = np.degrees(np.unwrap(np.angle(response)))
    return ResponseTrace(f_hz, mag_db, phase_deg, unit)


@dataclass(frozen=True, slots=True)
class RootSet:
    """Poles and zeros (rad/s) of a minimal model, and the pairs that cancelled."""

    poles_rad_s: NDArray[np.complex128]
    zeros_rad_s: NDArray[np.complex128]
    cancelled: tuple[tuple[complex, complex], ...] = ()


@dataclass(frozen=True, slots=True)
class NoiseTrace:
    """Output noise density (V/√Hz): total and the largest contributions, plus a summary line."""

    f_hz: NDArray[np.float64]
    total: NDArray[np.float64]
    contributions: tuple[tuple[str, NDArray[np.float64]], ...]
    summary: str


def _stage_analysis(stage: Stage, project: Project, context: Context) -> Any:
    from stagewise.engine.stage import analyze_stage

    _problems(stage, project)
    return context.cached(("stage", stage_key(stage, project)),
                          lambda: analyze_stage(stage, project, context.f_hz))


def _usable(analysis: Any) -> Any:
    if analysis.why is not None:
        raise NotAvailable(analysis.why)
    return analysis


def _mag_phase(model: Any, f_hz: NDArray[np.float64], values: NDArray[np.complex128], unit: str) -> ResponseTrace:
    """Magnitude and phase as the engine's metrics define them (engine/metrics.py: 20·log10|H|,
    the exact angle on the branch of the pole/zero phase). The phase helper is called directly:
    ``frequency_response`` would also compute the group delay, which no plot shows and which
    costs as much again. Should the helper move, the phase is unwrapped from the low end."""
    from types import SimpleNamespace

    from stagewise.engine import metrics

    anchored = getattr(metrics, "_anchored_phase_deg", None)
    if anchored is None:  # the helper moved: take the engine's public route (slower, same numbers)
        phase_deg = np.degrees(np.unwrap(np.angle(values)))
    else:
        phase_deg = anchored(SimpleNamespace(model=model, f_hz=f_hz), f_hz, values)
    with np.errstate(divide="ignore"):
        mag_db = 20.0 * np.log10(np.abs(values))
    return ResponseTrace(f_hz, mag_db, phase_deg, unit)


def _analysis_trace(analysis: Any) -> ResponseTrace:
    return _mag_phase(analysis.model, analysis.f_hz, analysis.response, analysis.unit)


def isolated_response(stage: Stage, project: Project, context: Context) -> ResponseTrace:
    """The stage alone: ideal drive at its input, output unloaded."""
    analysis = _usable(_stage_analysis(stage, project, context))
    return _analysis_trace(analysis)


@dataclass(frozen=True, slots=True)
class StepTrace:
    """A unit-step response: time (s), output, final value and the step metrics' summary."""

    t_s: NDArray[np.float64]
    y: NDArray[np.float64]
    final: float | None
    summary: str
    unit: str = "V/V"
    # The window the view frames: 8 slowest dominant time constants (present/framing.py).
    span_s: float | None = None


def _step(analysis: Any) -> StepTrace:
    from stagewise.engine.timeresp import step_response
    from stagewise.model.values import format_value
    from stagewise.present.framing import step_span_s

    if analysis.model is None:
        raise NotAvailable(analysis.why or getattr(analysis, "model_why", None) or "no pole/zero model")
    span = step_span_s(analysis.model.poles_rad_s, analysis.model.zeros_rad_s)
    # Computed on the window the view shows, so the edge is drawn from many points; the metrics
    # are refined on the exact response whatever the grid.
    step = step_response(analysis.model, None if span is None else np.linspace(0.0, span, 1201))
    words = []
    if step.rise_s is not None:
        words.append(f"rise {format_value(step.rise_s, 's')}")
    if step.overshoot_pct is not None:
        words.append(f"overshoot {step.overshoot_pct:.3g} %")
    # Both settling bands, named, so the summary reads the same figure a check on either takes.
    bands = [(band, getattr(step, name, None)) for band, name in (("1 %", "settle_1pct_s"),
                                                                  ("0.1 %", "settle_0p1pct_s"))]
    settled = [f"within {band} in {format_value(value, 's')}" for band, value in bands if value is not None]
    if settled:
        words.append("settles " + " and ".join(settled))
    return StepTrace(step.t_s, step.y, step.final, ", ".join(words), str(getattr(analysis, "unit", "V/V")), span)


def isolated_step(stage: Stage, project: Project, context: Context) -> StepTrace:
    """Unit-step response of the stage alone (engine/timeresp.py, from its pole/zero model)."""
    analysis = _usable(_stage_analysis(stage, project, context))
    return context.cached(("step", stage_key(stage, project)), lambda: _step(analysis))  # type: ignore[no-any-return]


def isolated_roots(stage: Stage, project: Project, context: Context) -> RootSet:
    """Poles and zeros of the stage alone (from the pencil, engine/poles.py)."""
    analysis = _usable(_stage_analysis(stage, project, context))
    if analysis.model is None:
        raise NotAvailable(analysis.model_why or "no pole/zero model")
    return RootSet(analysis.poles_rad_s, analysis.zeros_rad_s, analysis.cancelled)


def _once_per_snapshot(name: str, project: Project, context: Context, compute: Any) -> Any:
    """``compute()`` once per snapshot (the project or its baseline); a ValueError it raises is
    kept too and reported as NotAvailable each time it is asked for."""
    key = name if project is not context.baseline else f"baseline_{name}"
    if key not in context.chain_state:
        try:
            context.chain_state[key] = compute()
        except ValueError as error:
            context.chain_state[key] = error
    value = context.chain_state[key]
    if isinstance(value, Exception):
        raise NotAvailable(explain(value))
    return value


def _merged(project: Project, context: Context) -> Any:
    """The merged whole-chain circuit of this snapshot."""
    from stagewise.engine.chain import merged_system

    return _once_per_snapshot("merged", project, context, lambda: merged_system(project))


def _chain_result(project: Project, context: Context) -> Any:
    """The chain with loading on this snapshot's grid (engine/chain.py: port relations cached by
    stage fingerprint, so an edit re-reduces one stage)."""
    return _once_per_snapshot("chain_result", project, context,
                              lambda: context.engine.analyze(project, context.f_hz))


def in_chain_response(stage: Stage, project: Project, context: Context) -> ResponseTrace:
    """The stage where it sits in the chain, loaded by the next stage: V_out/V_in, or V_out/I_in
    for a current-driven stage (the same unit as the stage alone)."""
    if stage.bypass:
        raise NotAvailable("the stage is bypassed: it is not in the chain")
    entry = _chain_result(project, context).stage(stage.id)
    if entry.in_chain is None:
        raise NotAvailable(entry.in_chain_why or "the stage has no response in chain")
    return _trace(context.f_hz, entry.in_chain, entry.unit)


def from_input_response(stage: Stage, project: Project, context: Context) -> ResponseTrace:
    """The chain's drive to this stage's output, everything before and after it in place (V/V, or
    Ω for a current drive): the cascade's interface response, already solved for the chain."""
    if stage.bypass:
        raise NotAvailable("the stage is bypassed: it is not in the chain")
    result = _chain_result(project, context)
    position = result.stage_ids.index(stage.id) + 1
    return _trace(context.f_hz, result.interface_response[:, position], result.unit)


@dataclass(frozen=True, slots=True)
class ReviewSummary:
    """The evaluated checks of a stage (``stagewise.review.checks``) and a one-line summary."""

    results: tuple[Any, ...]
    check_states: dict[str, str]
    summary: str
    summary_tip: str
    findings: tuple[Any, ...] = ()  # automatic findings of this stage and of the whole chain


def _project_analysis(project: Project, context: Context) -> Any:
    """The engine's lazy whole-project analysis of this snapshot (engine/analysis.py), shared by
    the check evaluation and the in-chain step and poles, so nothing is computed twice."""
    from stagewise.engine.analysis import ProjectAnalysis
    from stagewise.review.words import SPREAD_FOLLOWS

    if "project_analysis" not in context.chain_state:
        analysis = ProjectAnalysis(project, context.engine, memo=context.analysis_memo)
        analysis.spread_progress = context.spread_progress
        analysis.spread_deferred = SPREAD_FOLLOWS if context.phase in (1, 2) else None
        context.chain_state["project_analysis"] = analysis
    return context.chain_state["project_analysis"]


def _metric_provider(project: Project, context: Context) -> Any:
    """The review layer's metric provider: the engine's project analysis."""
    return _project_analysis(project, context)


def _placed_analysis(stage: Stage, project: Project, context: Context, place: str = "in_chain") -> Any:
    """The stage ``in_chain`` or ``from_input`` from the shared project analysis, with its model."""
    whole = _project_analysis(project, context)
    analysis = whole.in_chain(stage.id) if place == "in_chain" else whole.from_input(stage.id)
    why = getattr(analysis, "why", None)
    if why is not None or getattr(analysis, "model", None) is None:
        raise NotAvailable(why or getattr(analysis, "model_why", None) or f"no pole/zero model {place.replace('_', ' ')}")
    return analysis


def _in_chain_analysis(stage: Stage, project: Project, context: Context) -> Any:
    return _placed_analysis(stage, project, context)


def _from_input_analysis(stage: Stage, project: Project, context: Context) -> Any:
    return _placed_analysis(stage, project, context, "from_input")


def from_input_step(stage: Stage, project: Project, context: Context) -> StepTrace:
    """Unit-step response from the chain's drive to this stage's output."""
    return _step(_from_input_analysis(stage, project, context))


def from_input_poles(stage: Stage, project: Project, context: Context) -> RootSet:
    """Poles and zeros from the chain's drive to this stage's output."""
    analysis = _from_input_analysis(stage, project, context)
    return RootSet(analysis.poles_rad_s, analysis.zeros_rad_s, analysis.cancelled)


def in_chain_step(stage: Stage, project: Project, context: Context) -> StepTrace:
    """Unit-step response of the stage where it sits, loaded by the rest of the chain.

    The project analysis gives back the same in-chain analysis object while the stage and
    everything after it are unchanged; its step is then not computed again.
    """
    analysis = _in_chain_analysis(stage, project, context)
    known = context.steps_of.get(id(analysis))
    if known is not None and known[0] is analysis:
        return known[1]  # type: ignore[no-any-return]
    trace = _step(analysis)
    context.steps_of[id(analysis)] = (analysis, trace)
    return trace


def in_chain_poles(stage: Stage, project: Project, context: Context) -> RootSet:
    """Poles and zeros of the stage where it sits (V_out/V_in with the rest of the chain as load)."""
    analysis = _in_chain_analysis(stage, project, context)
    return RootSet(analysis.poles_rad_s, analysis.zeros_rad_s, analysis.cancelled)


def stage_review(stage: Stage, project: Project, context: Context) -> ReviewSummary:
    """Evaluate the stage's checks against the analysis of this snapshot."""
    from stagewise.review.checks import automatic_findings, evaluate_stage, totals
    from stagewise.review.words import CheckState

    provider = _metric_provider(project, context)
    results = tuple(evaluate_stage(stage, project, provider))
    findings = tuple(item for item in automatic_findings(provider) if item.stage_id in (stage.id, None))
    counts = totals(results)
    states = {result.check_id: str(result.state) for result in results}
    found = f"; {len(findings)} automatic finding{'s' if len(findings) != 1 else ''}" if findings else ""
    if not results:
        return ReviewSummary(results, states, "no checks" + found, "This stage has no checks" + found + ".",
                             findings)
    # A waived check is not met: the short count names it apart (and so does a not-applicable one).
    apart = "".join(f", {number} {word}" for number, word in ((counts.waived, CheckState.WAIVED),
                                                             (counts.not_applicable, CheckState.NOT_APPLICABLE))
                    if number)
    return ReviewSummary(results, states, f"{counts.met}/{len(results)} {CheckState.MET}{apart}{found}",
                         counts.sentence() + found, findings)


# Check metrics computed with the Monte Carlo, after the review state (phase 3 in the program).
AFTER_SPREAD_METRICS = frozenset({"yield_pct", "measured_inside_spread_pct"})


def stage_review_after_spread(stage: Stage, project: Project, context: Context) -> ReviewSummary:
    """The stage's checks again once the spread is in (phase 3), for a stage with a check of
    :data:`AFTER_SPREAD_METRICS`; any other stage keeps its review state of phase 2
    (:class:`Unchanged`)."""
    if not any(check.metric in AFTER_SPREAD_METRICS for check in stage.checks):
        raise Unchanged
    return stage_review(stage, project, context)


def peaking_reference(stage: Stage, project: Project, context: Context) -> dict[str, float]:
    """The pass-band reference gain (dB) where the stage's peaking checks are taken, so the view
    can draw their limit as a level: reference + the allowed peaking (peak gain − peaking)."""
    wheres = sorted({check.where for check in stage.checks if check.metric == "peaking_db" and check.where})
    if not wheres:
        raise NotAvailable("the stage has no peaking check")
    from stagewise.present.limits import peaking_reference_db

    analysis = _project_analysis(project, context)
    found: dict[str, float] = {}
    for where in wheres:
        reference = peaking_reference_db({key: analysis.metric_value(key, where, stage.id, None)[0]
                                          for key in ("peak_gain_db", "peaking_db")})
        if reference is not None:
            found[where] = reference
    return found


@dataclass(frozen=True, slots=True)
class LoopTrace:
    """One op-amp's loop gain T(j2πf) (engine/loops.py), alone or in chain, and its margins."""

    label: str
    place: str  # "alone" or "in chain"
    f_hz: NDArray[np.float64]
    loop_gain: NDArray[np.complex128]
    crossover_hz: float | None
    phase_margin_deg: float | None
    gain_margin_db: float | None
    phase_crossover_hz: float | None
    why: str | None


def _loop_traces(results: Any, place: str, prefix: str = "") -> list[LoopTrace]:
    traces = []
    for result in results:
        if prefix and not str(result.ref).startswith(prefix):
            continue
        ref = str(result.ref)[len(prefix):]
        if len(result.loop_gain) == 0:
            continue  # an ideal op-amp: no loop to draw
        traces.append(LoopTrace(f"{ref} {place}", place, result.f_hz, result.loop_gain, result.crossover_hz,
                                result.phase_margin_deg, result.gain_margin_db, result.phase_crossover_hz,
                                result.phase_margin_why))
    return traces


def stage_loops(stage: Stage, project: Project, context: Context) -> tuple[LoopTrace, ...]:
    """Loop gain of each finite op-amp of the stage, alone and where it sits in the chain."""
    from stagewise.engine.loops import loop_gains
    from stagewise.engine.loops import stage_loops as alone_loops

    if stage.is_block or not any(part.type == "opamp" for part in stage.parts):
        raise NotAvailable("the stage has no op-amp, so no loop to draw")
    _problems(stage, project)
    traces = _loop_traces(context.cached(("loops", stage_key(stage, project)), lambda: alone_loops(stage, project)),
                          "alone")
    if not stage.bypass:
        def chain() -> Any:
            merged = _merged(project, context)
            return loop_gains(merged.system, current_drive=merged.current_drive)

        traces += _loop_traces(_once_per_snapshot("chain_loops", project, context, chain), "in chain", f"{stage.id}:")
    if not traces:
        raise NotAvailable("its op-amps are ideal (infinite gain): there is no loop gain to draw")
    return tuple(traces)


STAGE_ANALYSES: list[tuple[str, int, Any]] = [
    ("response", 1, isolated_response),
    ("poles", 1, isolated_roots),
    ("step", 1, isolated_step),
    ("review", 2, stage_review),
    ("review", 3, stage_review_after_spread),  # a yield or envelope check follows the spread
    ("peaking_reference", 2, peaking_reference),
    ("loops", 3, stage_loops),  # a view, not the review state: with the spread, after a pause
    ("in_chain_step", 2, in_chain_step),
    ("in_chain_poles", 2, in_chain_poles),
    ("in_chain_response", 1, in_chain_response),
    ("from_input_response", 1, from_input_response),
    # Step and poles from the chain input need a pole/zero model of the whole chain per stage:
    # computed with the spread (phase 3), so that an edit's check states never wait for them.
    ("from_input_step", 3, from_input_step),
    ("from_input_poles", 3, from_input_poles),
]


# ----------------------------------------------------------------------------- chain analyses
def _chain_model(project: Project, context: Context) -> Any:
    """The pole/zero model of the whole chain (engine/poles.py on the merged pencil)."""
    from stagewise.engine.poles import pole_zero_model
    from stagewise.engine.stage import MODEL_MAX_UNKNOWNS, size_limit_why

    def compute() -> Any:
        driven = _merged(project, context).driven()
        if driven.g.shape[0] > MODEL_MAX_UNKNOWNS:  # the engine's size limit (DEVELOPERS.md cost table)
            raise ValueError(size_limit_why(int(driven.g.shape[0])))
        return pole_zero_model(driven.g, driven.c, driven.b, driven.output)

    return _once_per_snapshot("model", project, context, compute)


def chain_response(project: Project, context: Context) -> ResponseTrace:
    """Drive → last output of the whole chain, with loading (the cascade shared with the in-chain
    responses; its phase follows the merged chain's pole/zero model)."""
    result = _chain_result(project, context)
    try:
        model = _chain_model(project, context)
    except NotAvailable:  # above the size limit: the phase is unwrapped along the sweep instead
        model = None
    return _mag_phase(model, context.f_hz, result.response, result.unit)


def chain_step(project: Project, context: Context) -> StepTrace:
    """Unit-step response of the whole chain (slow for chains with very slow poles: phase 2)."""
    from types import SimpleNamespace

    merged = _merged(project, context)
    return _step(SimpleNamespace(model=_chain_model(project, context), why=None,
                                 unit="Ω" if merged.current_drive else "V/V"))


@dataclass(frozen=True, slots=True)
class SpreadTrace:
    """Envelopes of the chain's magnitude over part tolerances (Monte Carlo, engine/spread.py)."""

    f_hz: NDArray[np.float64]
    nominal_db: NDArray[np.float64]
    min_db: NDArray[np.float64]
    max_db: NDArray[np.float64]
    low_db: NDArray[np.float64]
    high_db: NDArray[np.float64]
    low_pct: float
    high_pct: float
    samples: int
    summary: str


def chain_spread(project: Project, context: Context) -> SpreadTrace:
    """Monte Carlo over the tolerances of the whole chain (seeded by the project): the project
    analysis's spread, whose yield counts every numeric check (shared with the review state and
    the packet, so it runs once).

    With ``context.spread_progress`` set, the run reports its progress and stops when asked:
    then nothing of it is shown (``review.words.SPREAD_CANCELLED`` says why), never a part of the
    samples.
    """
    from stagewise.model.values import format_value

    analysis = _project_analysis(project, context)
    document = analysis.spread
    why = getattr(document, "why", None)
    if why is not None:
        raise NotAvailable(why)
    result = analysis.spread_result
    levels = result.percentile_levels
    low_index, high_index = 0, len(levels) - 1
    words = [f"{result.samples} samples, seed {result.seed}, {result.distribution} within each tolerance."]
    corner = result.metrics.get("f_high_3db_hz")
    if corner is not None and getattr(corner, "minimum", None) is not None:
        # Each sample's corner is 3 dB below its own pass-band gain, read where the nominal's is.
        reference = analysis.metric_reference_words("f_high_3db_hz", "chain", "")
        against = f" (each sample against its own pass-band gain; nominal {reference})" if reference else ""
        words.append(f"Upper corner {format_value(corner.minimum, 'Hz')} to "
                      f"{format_value(corner.maximum, 'Hz')}{against}.")
    if document.get("yield_pct") is not None:
        counted = len(document.get("yield_basis", ()))
        words.append(f"Yield {document['yield_pct']:.1f} % (samples meeting every one of the {counted} "
                     "numeric checks counted).")
    else:
        words.append(f"No yield: {document.get('yield_pct_why')}.")
    words.extend(document.get("notes", ()))
    return SpreadTrace(result.f_hz, result.nominal_mag_db, result.mag_db_min, result.mag_db_max,
                       result.mag_db_percentiles[low_index], result.mag_db_percentiles[high_index],
                       levels[low_index], levels[high_index], result.samples, " ".join(words))


def chain_roots(project: Project, context: Context) -> RootSet:
    model = _chain_model(project, context)
    return RootSet(model.poles_rad_s, model.zeros_rad_s, model.cancelled)


def baseline_chain(project: Project, context: Context) -> ResponseTrace:
    """The whole chain of the baseline revision, on the current grid."""
    if context.baseline is None:
        raise NotAvailable("no baseline loaded")
    return chain_response(context.baseline, context)


def chain_noise(project: Project, context: Context) -> NoiseTrace:
    """Output noise of the whole chain: total density and the largest sources (engine/noise.py)."""
    from stagewise.model.values import format_value

    result = _project_analysis(project, context).noise_result
    if not hasattr(result, "out_density_v_rthz"):
        raise NotAvailable(getattr(result, "why", None) or "the noise analysis failed")
    top = tuple((source.name, source.out_density_v_rthz) for source in result.sources[:3])
    summary = (f"Output noise {format_value(result.out_rms_v, 'V')} rms over "
               f"{format_value(result.band_hz[0], 'Hz')}–{format_value(result.band_hz[1], 'Hz')}; "
               f"{format_value(result.out_density_v_rthz_at_ref, 'V/√Hz')} at "
               f"{format_value(result.ref_hz, 'Hz')}.")
    if result.in_rms is not None:
        summary += f" Input-referred {format_value(result.in_rms, result.in_unit)} rms."
    if result.sources:
        leader = result.sources[0]
        summary += f" Largest source: {leader.name} ({leader.share_pct:.0f} % of the power)."
    if result.notes:
        summary += " " + " ".join(result.notes)
    return NoiseTrace(result.f_hz, result.out_density_v_rthz, top, summary)


@dataclass(frozen=True, slots=True)
class DcPlace:
    """The DC budget at one place: its table (engine/dc.py) and a summary line, or why none."""

    table: Any  # engine.dc.BudgetTable, or None with ``why``
    summary: str
    why: str = ""


@dataclass(frozen=True, slots=True)
class DcTrace:
    """The DC budgets the "DC accuracy" view can show: the chain at the converter input and every
    stage in chain and alone, keyed ``("chain", "")``, ``("in_chain", id)``, ``("isolated", id)``."""

    places: dict[tuple[str, str], DcPlace]

    @property
    def table(self) -> Any:
        return self.places[("chain", "")].table

    @property
    def summary(self) -> str:
        return self.places[("chain", "")].summary


def _dc_place(document: dict[str, Any] | None, why: str | None, where: str) -> DcPlace:
    from stagewise.engine.dc import budget_table
    from stagewise.model.values import format_value

    if document is None:
        return DcPlace(None, "", why or "the DC budget could not be computed")
    parts = []
    for key, label in (("total_wc_v", "worst case"), ("total_rss_v", "RSS")):
        value = document.get(key)
        if value is None:
            parts.append(f"{label}: {document.get(f'{key}_why')}")
            continue
        text = f"{label} {format_value(value, 'V')}"
        lsb = document.get(key.replace("_v", "_lsb"))
        if lsb is not None:
            text += f" = {lsb:.3g} LSB"
        pct = document.get(key.replace("_v", "_pct_fs"))
        if pct is not None:
            text += f" = {pct:.3g} % of full scale"
        parts.append(text)
    span = document.get("temp_range_c")
    when = (f"over {span[0]:g} to {span[1]:g} °C" if span else "at 25 °C only (no temperature range given)")
    summary = f"DC error at {where} {when}: " + "; ".join(parts) + "."
    if document.get("offset_out_v") is not None:
        summary += f" Offset alone (25 °C, worst case) {format_value(document['offset_out_v'], 'V')}."
    if document.get("gain_error_pct") is not None:
        summary += f" Gain error {document['gain_error_pct']:.3g} % (worst case)."
    else:
        summary += f" Gain error: {document.get('gain_error_pct_why')}."
    return DcPlace(budget_table(document), summary)


def chain_dc(project: Project, context: Context) -> DcTrace:
    """The DC accuracy budgets (engine/dc.py): the chain at the converter input, every stage in
    chain and alone."""
    analysis = _project_analysis(project, context)
    places: dict[tuple[str, str], DcPlace] = {}
    document, why = analysis.dc_document("chain", "")
    places[("chain", "")] = _dc_place(document, why, "the converter input")
    for stage in project.stages:
        for where, words in (("in_chain", f"the output of {stage.id}, in chain"),
                             ("from_input", f"the output of {stage.id}, every stage up to it"),
                             ("isolated", f"the output of {stage.id}, alone")):
            document, why = analysis.dc_document(where, stage.id)
            places[(where, stage.id)] = _dc_place(document, why, words)
    return DcTrace(places)


def measurements(project: Project, context: Context) -> list[Any]:
    """Every bench measurement against the prediction at its place (engine/measured.py); before
    phase 3 without the Monte Carlo envelope of a frequency response, which follows."""
    return list(_project_analysis(project, context).measurements)


def measurements_with_envelope(project: Project, context: Context) -> list[Any]:
    """The measurements again in phase 3, with their envelopes (when any frequency response is
    attached; else the phase-2 result stands)."""
    if not any(item.kind == "response" for item in project.measurements):
        raise Unchanged
    return measurements(project, context)


CHAIN_ANALYSES: list[tuple[str, int, Any]] = [
    ("response", 1, chain_response),
    ("poles", 1, chain_roots),
    ("baseline_response", 1, baseline_chain),
    ("step", 2, chain_step),
    ("noise", 2, chain_noise),
    ("dc", 2, chain_dc),
    ("spread", 3, chain_spread),
    ("measurements", 2, measurements),
    ("measurements", 3, measurements_with_envelope),
]


# ----------------------------------------------------------------------------- formula
@dataclass(frozen=True, slots=True)
class FormulaText:
    """The stage formula laid out for the formula view, and the plain transfer function."""

    html: str
    transfer: str
    numeric: bool


def stage_formula(stage: Stage, project: Project, context: Context) -> FormulaText:
    """The symbolic transfer function of a stage (engine/symbolic.py; sympy loads in this thread)."""
    from stagewise.engine.symbolic import finite_gain_form, symbolic_form
    from stagewise.ui.formula_html import formula_html

    # An op-amp stage with finite op-amps: its ideal-op-amp form and the finite-gain factor
    # (never the coefficient soup of the models' numbers).
    finite = finite_gain_form(stage, project)
    form = finite["ideal"] if finite is not None else symbolic_form(stage, project).as_dict()
    if not form.get("denominator"):
        raise NotAvailable(form.get("why") or "the stage has no transfer function")
    return FormulaText(formula_html(form, stage.name, finite), str(form.get("transfer") or ""),
                       bool(form.get("numeric")))


def finite(values: NDArray[np.float64]) -> NDArray[np.float64]:
    """Values with ±inf (a magnitude of exactly zero in dB) replaced by NaN, so plots skip them."""
    out = np.asarray(values, dtype=float).copy()
    out[~np.isfinite(out)] = math.nan
    return out
