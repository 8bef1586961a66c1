"""The whole analysis of a project: every stage isolated and in chain, and the chain itself.

This module joins the engine's parts into the document that ``stagewise analyze --json``
prints (DESIGN section 6), and into the :class:`ProjectAnalysis` object that the review layer
asks for check values (``metric_value``), the packet draws and the GUI shows.

How "in chain" is computed: given the voltage at a stage's input, what its output does depends
only on the stage and everything after it (the upstream only sets that voltage). So the stage
in chain, V_out/V_in, is exactly the stage driven by an ideal source at its input and loaded by
the rest of the chain and the load, which is one driven pencil: the stage engine's pole/zero
model, step response and metrics apply to it unchanged. A current-driven stage (a
transimpedance stage) is seen as V_out/I_in, with an ideal current source instead. The
port-relation cascade (:mod:`stagewise.engine.chain`) gives the same responses (a test holds
them to 1e-9) and the loading errors and interface impedances.

Cost against size (DEVELOPERS.md, cost table): every stage seen from the chain's input reads its
response off one sweep of the merged chain (``_chain_states``) and shares the chain's poles; a
stage in chain takes its response from the cascade where the sweep would be sparse. A place
above ``max_unknowns`` (``stage.MODEL_MAX_UNKNOWNS``) has no zeros or step response (null with
the reason); a stage in chain above it has no poles either, so its stability is not decided and
its response figures are null with that reason.

Every value that cannot be computed is ``None`` with a ``"<key>_why"`` sentence beside it.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from functools import cached_property, partial
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from stagewise.engine import loops as loops_module
from stagewise.engine.chain import (
    ChainEngine,
    ChainResult,
    MergedChain,
    StageInChain,
    load_admittance,
    merge_systems,
    merged_size,
    merged_system,
)
from stagewise.engine.diagnostics import Finding
from stagewise.engine.metrics import bandwidth, metric_at, put_with_why, reference_words, stage_metrics
from stagewise.engine.mna import CircuitError, StageSystem
from stagewise.engine.stability import Stability, stability_of_poles, stability_to_json
from stagewise.engine.stage import (
    MODEL_MAX_UNKNOWNS,
    StageAnalysis,
    analyze_stage,
    analyze_system,
    size_limit_why,
)
from stagewise.engine.sweep import SPARSE_MIN_UNKNOWNS, TWO_PI, DrivenSystem, drive, frequency_grid, solve_batched
from stagewise.model.project import Check, Project, Stage
from stagewise.model.values import format_value
from stagewise.review.words import SPREAD_CANCELLED

__all__ = ["ProjectAnalysis", "analyze_project", "metric_provider", "response_points"]

VOLTAGE_UNIT = "V/V"
MEMO_ENTRIES = 400
# The spread's progress: the chain's Monte Carlo counts as this many places (it costs about that
# much more than one place of its own).
CHAIN_SHARE = 4
CURRENT_UNIT = "Ω"

NO_OPAMP = "the stage has no finite-gain op-amp, so it has no loop to measure"
IDEAL_ONLY = "its op-amps are ideal (infinite gain): there is no loop gain to measure"

# Step keys of the metric table -> keys of the stage engine's step document.
STEP_KEYS = {"rise_s": "rise_s", "overshoot_pct": "overshoot_pct", "settle_1pct_s": "settle_1pct_s",
             "settle_01pct_s": "settle_0p1pct_s"}
BAND_KEYS = ("peak_gain_db", "peaking_db", "f_low_3db_hz", "f_high_3db_hz")
# Bench-measurement metrics -> (the kind of measurement, its comparison's field); the worst of
# the current measurements at the check's place.
MEASURED_KEYS = {"measured_dev_db_max": ("response", "dev_db_max"), "measured_dev_deg_max": ("response", "dev_deg_max"),
                 "measured_inside_spread_pct": ("response", "inside_spread_pct"),
                 "measured_rise_s": ("step", "rise_s"), "measured_overshoot_pct": ("step", "overshoot_pct"),
                 "measured_settle_1pct_s": ("step", "settle_1pct_s")}
# Response figures of an M that have no value when its system is unstable (the step fields say
# so themselves, from the same poles).
RESPONSE_KEYS = ("gain_db", "peak_gain_db", "peak_hz", "f_low_3db_hz", "f_high_3db_hz", "peaking_db")
# Metrics computed on the whole merged chain, whatever place a check names.
CHAIN_LEVEL_METRICS = frozenset({"noise_out_rms_v", "noise_in_rms", "snr_db", "snr_noise_only_db",
                                 "alias_attenuation_db", "converter_headroom_db", "yield_pct", "headroom_v",
                                 "slew_margin", "swing_margin_v", "slew_margin_pct"})
# Metrics the spread evaluates in every sample (the others are listed as not evaluated).
SAMPLED_METRICS = frozenset({"gain_db", "peak_gain_db", "peaking_db", "f_low_3db_hz", "f_high_3db_hz",
                             "attenuation_db"})
NOT_SAMPLED = ("the spread samples gains, corners, peaking, attenuation and phase margins; this metric is "
               "not evaluated per sample")
# The places of a stage whose stability is a verdict of its own, in the order they are shown.
STAGE_PLACES = ("isolated", "in_chain", "from_input")
PLACE_WORDS = {"isolated": "isolated", "in_chain": "in chain", "from_input": "seen from the chain's input",
               "chain": "the whole chain"}
POINT_KEYS = ("phase_deg", "attenuation_db", "group_delay_s")
# DC budget metrics of the table -> keys of the place's ``dc`` document.
DC_KEYS = {"dc_gain": "gain", "gain_error_pct": "gain_error_pct", "offset_out_v": "offset_out_v",
           "drift_out_v_per_c": "drift_out_v_per_c", "total_wc_v": "total_wc_v", "total_rss_v": "total_rss_v",
           "total_wc_lsb": "total_wc_lsb", "total_rss_lsb": "total_rss_lsb", "total_wc_pct_fs": "total_wc_pct_fs"}


def _finite(value: float | None) -> float | None:
    if value is None or not math.isfinite(value):
        return None
    return float(value)


@dataclass(frozen=True, slots=True)
class _Failure:
    why: str


class ProjectAnalysis:
    """Lazily computed analysis of one project (each piece computed once, when first asked).

    Parameters
    ----------
    project : Project
        A validated project. It must not change while this object is in use.
    engine : ChainEngine, optional
        A chain engine whose caches are reused (the GUI keeps one per document).
    spread : bool
        Whether the Monte Carlo spread is part of the document (it is the slowest piece).
    memo : dict, optional
        Results of earlier analyses of the same document, kept by the caller (the GUI's worker)
        and keyed here by what decides them: a stage alone by its id and fingerprint, a stage in
        chain by the ids and fingerprints of it and every stage after it and the load. After an
        edit only what the edit touches is computed again. Its size is bounded.
    max_unknowns : int
        The size limit of the pole/zero and step-response analysis of every place
        (``stage.MODEL_MAX_UNKNOWNS``; see :func:`~stagewise.engine.stage.analyze_system`).
    """

    def __init__(self, project: Project, engine: ChainEngine | None = None, *, spread: bool = True,
                 memo: dict[tuple[Any, ...], Any] | None = None, max_unknowns: int = MODEL_MAX_UNKNOWNS) -> None:
        self.project = project
        self.engine = engine or ChainEngine()
        self.with_spread = spread
        self._memo = memo
        self.max_unknowns = max_unknowns
        # The program sets these before the spread is asked for: its progress callback
        # (``progress(done, total) -> bool``, True cancels; see engine.spread.Meter), and, while
        # the review state must come quickly, the reason the yield and the measurements' Monte
        # Carlo envelopes are not computed yet.
        self.spread_progress: Any = None
        self.spread_deferred: str | None = None
        # The chain's Monte Carlo result behind ``spread`` (envelopes for the views), once run.
        self.spread_result: Any = None

    def _memoized(self, key: tuple[Any, ...], compute: Any) -> Any:
        if self._memo is None:
            return compute()
        settings = self.project.settings
        full = (settings.f_min_hz.si, settings.f_max_hz.si, settings.points_per_decade, self.max_unknowns, *key)
        if full not in self._memo:
            if len(self._memo) >= MEMO_ENTRIES:
                self._memo.clear()
            self._memo[full] = compute()
        return self._memo[full]

    @cached_property
    def _fingerprints(self) -> dict[str, str]:
        from stagewise.model.fingerprint import stage_fingerprint  # noqa: PLC0415

        return {stage.id: stage_fingerprint(stage, self.project) for stage in self.project.stages}

    # -- the pieces ------------------------------------------------------------------------

    @cached_property
    def f_hz(self) -> NDArray[np.float64]:
        """The project's analysis grid in hertz."""
        return frequency_grid(self.project.settings)

    @cached_property
    def chain(self) -> ChainResult | _Failure:
        """The port-relation cascade on the grid (loading errors, impedances), or why not."""
        try:
            return self.engine.analyze(self.project, self.f_hz)
        except CircuitError as error:
            return _Failure(str(error))
        except np.linalg.LinAlgError:
            return _Failure("the chain's equations are singular at an analysis frequency")

    @cached_property
    def merged(self) -> MergedChain | _Failure:
        """The whole active chain as one circuit, or why not."""
        try:
            return merged_system(self.project)
        except CircuitError as error:
            return _Failure(str(error))

    @cached_property
    def _systems(self) -> dict[str, StageSystem | _Failure]:
        systems: dict[str, StageSystem | _Failure] = {}
        for stage in self.project.stages:
            try:
                systems[stage.id] = self.engine.system(stage, self.project)
            except CircuitError as error:
                systems[stage.id] = _Failure(str(error))
        return systems

    def isolated(self, stage_id: str) -> StageAnalysis:
        """The stage alone: its own drive, output unloaded (cached)."""
        results = self._isolated
        if stage_id not in results:
            stage = self.project.stage(stage_id)
            if stage is None:
                raise KeyError(stage_id)
            results[stage_id] = self._memoized(
                ("isolated", stage_id, self._fingerprints[stage_id]),
                lambda: analyze_stage(stage, self.project, self.f_hz, max_unknowns=self.max_unknowns))
        return results[stage_id]

    @cached_property
    def _isolated(self) -> dict[str, StageAnalysis]:
        return {}

    def in_chain(self, stage_id: str) -> StageAnalysis | _Failure:
        """The stage where it sits: its own drive at its input, loaded by the rest of the chain.

        Computed for this stage only, when first asked (``check`` asks for a few stages).
        """
        results = self._in_chain
        if stage_id not in results:
            results[stage_id] = self._compute_in_chain(stage_id)
        return results[stage_id]

    def _in_chain_key(self, stage_id: str) -> tuple[Any, ...] | None:
        active = [stage.id for stage in self.project.active_stages]
        if stage_id not in active:
            return None
        rest = active[active.index(stage_id):]
        load = self.project.load
        return ("in_chain", tuple((item, self._fingerprints[item]) for item in rest),
                repr(load))

    @cached_property
    def _in_chain(self) -> dict[str, StageAnalysis | _Failure]:
        return {}

    def _compute_in_chain(self, stage_id: str) -> StageAnalysis | _Failure:
        stage = self.project.stage(stage_id)
        if stage is None:
            return _Failure(f'there is no stage "{stage_id}"')
        if stage.bypass:
            return _Failure(f'stage "{stage.id}" is bypassed, so it is not in the chain')
        try:
            load_r, load_c = load_admittance(self.project)
        except CircuitError as error:
            return _Failure(str(error))
        active = self.project.active_stages
        position = next(index for index, item in enumerate(active) if item.id == stage_id)
        rest = active[position:]
        systems = [self._systems[item.id] for item in rest]
        failed = next((system for system in systems if isinstance(system, _Failure)), None)
        if failed is not None:
            return _Failure(failed.why)
        current = stage.drive == "current"
        unit = CURRENT_UNIT if current else VOLTAGE_UNIT
        reason = self._undefined_in_chain(stage.id)
        if reason is not None:
            return _Failure(reason)
        size = merged_size([s for s in systems if isinstance(s, StageSystem)], current_drive=current)
        if size > self.max_unknowns:
            if position == 0 and current == (self.project.input.drive == "current"):
                # The first stage with the chain's own drive: the merged chain's pencil read at
                # this stage's output, which is the stage seen from the input (the chain's poles).
                return self.from_input(stage.id)
            return self._large_in_chain(stage.id, unit, size)

        def compute() -> StageAnalysis | _Failure:
            merged = merge_systems([item.id for item in rest], [s for s in systems if isinstance(s, StageSystem)],
                                   current_drive=current, load_r_ohm=load_r, load_c_f=load_c)
            driven = drive(merged.system, current)
            driven = DrivenSystem(driven.g, driven.c, driven.b, merged.interface_indices[1], current)
            # Where the sweep would take a sparse LU per frequency, the port-relation cascade has
            # the same response already (exact; a test holds them to 1e-9).
            entry = self._chain_entry(stage.id)
            response = entry.in_chain if entry is not None and size >= SPARSE_MIN_UNKNOWNS else None
            analysis = analyze_system(driven, self.f_hz, unit, stage.id, "", max_unknowns=self.max_unknowns,
                                      response=response)
            if analysis.why is not None:
                return _Failure(f'stage "{stage.id}" in chain: {analysis.why}')
            return analysis

        key = self._in_chain_key(stage_id)
        return compute() if key is None else self._memoized(key, compute)

    def _large_in_chain(self, stage_id: str, unit: str, size: int) -> StageAnalysis | _Failure:
        """A stage in chain above the size limit: its response from the port-relation cascade
        (exact, O(F) per stage), no poles, zeros or step response, so no stability verdict and
        no response figure (each null with the reason). The first stage, driven as the chain is,
        is the exception: it is the stage seen from the input (see ``_compute_in_chain``)."""
        entry = self._chain_entry(stage_id)
        chain = self.chain
        if entry is None or entry.in_chain is None:
            why = (chain.why if isinstance(chain, _Failure) else
                   f'stage "{stage_id}" in chain: {entry.in_chain_why if entry is not None else "not in the chain"}')
            return _Failure(why)
        return StageAnalysis(f_hz=self.f_hz, response=entry.in_chain, unit=unit, poles_rad_s=None,
                             zeros_rad_s=None, gain_constant=None, label=stage_id,
                             model_why=size_limit_why(size, self.max_unknowns, poles=True))

    def from_input(self, stage_id: str) -> StageAnalysis | _Failure:
        """The chain's drive to this stage's output, as it sits (V/V, or Ω for a current drive).

        The merged chain's pencil with the output read at the stage's output interface: the same
        poles as the whole chain, its own zeros. Computed per stage when first asked.
        """
        cache = self._from_input
        if stage_id not in cache:
            cache[stage_id] = self._compute_from_input(stage_id)
        return cache[stage_id]

    @cached_property
    def _from_input(self) -> dict[str, StageAnalysis | _Failure]:
        return {}

    def _compute_from_input(self, stage_id: str) -> StageAnalysis | _Failure:
        stage = self.project.stage(stage_id)
        if stage is not None and stage.bypass:
            return _Failure(f'stage "{stage_id}" is bypassed, so it is not in the chain')
        merged = self.merged
        if isinstance(merged, _Failure):
            return merged
        if stage_id not in merged.stage_ids:
            return _Failure(f'there is no stage "{stage_id}" in the chain')
        position = merged.stage_ids.index(stage_id) + 1
        if position == len(merged.stage_ids):
            return self.whole_chain  # the same system and output
        whole = self._whole_driven
        output = merged.interface_indices[position]
        driven = DrivenSystem(whole.g, whole.c, whole.b, output, whole.current_drive)
        unit = CURRENT_UNIT if merged.current_drive else VOLTAGE_UNIT
        whole_chain = self.whole_chain
        model = None if isinstance(whole_chain, _Failure) else whole_chain.roots_model
        known = None if model is None else model.all_poles_rad_s  # the same pencil: the same poles at every output
        states = self._chain_states
        response = None if isinstance(states, _Failure) else states[:, output]
        analysis = analyze_system(driven, self.f_hz, unit, stage_id, "", poles=known, response=response,
                                  max_unknowns=self.max_unknowns)
        if analysis.why is not None:
            return _Failure(f'stage "{stage_id}" seen from the chain input: {analysis.why}')
        return analysis

    def _in_chain_system(self, stage_id: str) -> tuple[StageSystem, bool] | _Failure:
        """The stage with the rest of the chain and the load after it, its own drive at its input,
        output at its output port; and whether that drive is a current."""
        active = self.project.active_stages
        position = next((index for index, item in enumerate(active) if item.id == stage_id), None)
        if position is None:
            return _Failure(f'stage "{stage_id}" is bypassed, so it is not in the chain')
        try:
            load_r, load_c = load_admittance(self.project)
        except CircuitError as error:
            return _Failure(str(error))
        rest = active[position:]
        systems = [self._systems[item.id] for item in rest]
        failed = next((system for system in systems if isinstance(system, _Failure)), None)
        if failed is not None:
            return _Failure(failed.why)
        current = active[position].drive == "current"
        merged = merge_systems([item.id for item in rest], [s for s in systems if isinstance(s, StageSystem)],
                               current_drive=current, load_r_ohm=load_r, load_c_f=load_c)
        return replace(merged.system, output_index=merged.interface_indices[1]), current

    def _undefined_in_chain(self, stage_id: str) -> str | None:
        chain = self.chain
        if isinstance(chain, _Failure):
            return None
        entry = self._chain_entry(stage_id)
        if entry is not None and entry.in_chain is None:
            return f'stage "{stage_id}" in chain: {entry.in_chain_why}'
        return None

    def _chain_entry(self, stage_id: str) -> StageInChain | None:
        chain = self.chain
        if isinstance(chain, _Failure):
            return None
        for entry in chain.stages:
            if entry.stage_id == stage_id:
                return entry
        return None

    @cached_property
    def _whole_driven(self) -> DrivenSystem:
        """The merged chain with its drive: one set of arrays for the chain and every stage seen
        from its input (so the sparse solver's caches serve them all)."""
        merged = self.merged
        assert not isinstance(merged, _Failure)
        return merged.driven()

    @cached_property
    def _chain_states(self) -> NDArray[np.complex128] | _Failure:
        """Every unknown of the driven merged chain on the grid, (F, N): one sweep gives the
        response at every stage's output seen from the chain's input."""
        whole = self._whole_driven
        try:
            points = np.asarray(1j * TWO_PI * self.f_hz, dtype=complex)
            return solve_batched(whole.g, whole.c, whole.b.astype(complex), points)
        except np.linalg.LinAlgError:
            return _Failure("the chain's equations are singular at an analysis frequency")

    @cached_property
    def whole_chain(self) -> StageAnalysis | _Failure:
        """Drive → last output of the merged chain, with its pole/zero model (above the size
        limit, its poles only)."""
        merged = self.merged
        if isinstance(merged, _Failure):
            return merged
        unit = CURRENT_UNIT if merged.current_drive else VOLTAGE_UNIT
        whole = self._whole_driven
        states = self._chain_states
        response = None if isinstance(states, _Failure) else states[:, whole.output]
        analysis = analyze_system(whole, self.f_hz, unit, "chain", "", response=response,
                                  max_unknowns=self.max_unknowns)
        if analysis.why is not None:
            return _Failure(f"the chain: {analysis.why}")
        return analysis

    @cached_property
    def isolated_loop_results(self) -> dict[str, tuple[loops_module.LoopResult, ...]]:
        """Each stage's loops alone, with their loop-gain curves (the packet draws them)."""
        result: dict[str, tuple[loops_module.LoopResult, ...]] = {}
        for stage in self.project.stages:
            system = self._systems[stage.id]
            if isinstance(system, _Failure) or stage.is_block:
                result[stage.id] = ()
                continue
            current = stage.drive == "current"
            result[stage.id] = self._memoized(
                ("loops", stage.id, self._fingerprints[stage.id]),
                lambda system=system, current=current, stage_id=stage.id: loops_module.loop_gains(
                    system, current_drive=current, stability=self.stability("isolated", stage_id)))
        return result

    @cached_property
    def isolated_loops(self) -> dict[str, list[dict[str, Any]]]:
        return {stage_id: loops_module.loops_to_json(results)
                for stage_id, results in self.isolated_loop_results.items()}

    @cached_property
    def chain_loop_results(self) -> tuple[loops_module.LoopResult, ...] | _Failure:
        """Every op-amp's loop in the merged chain (refs ``stage_id:ref``), with its curve."""
        merged = self.merged
        if isinstance(merged, _Failure):
            return merged
        return loops_module.loop_gains(merged.system, current_drive=merged.current_drive,
                                       stability=self.stability("chain", ""))

    @cached_property
    def chain_loops(self) -> list[dict[str, Any]] | _Failure:
        results = self.chain_loop_results
        return results if isinstance(results, _Failure) else loops_module.loops_to_json(results)

    def stage_chain_loops(self, stage_id: str) -> list[dict[str, Any]]:
        loops = self.chain_loops
        if isinstance(loops, _Failure):
            return []
        prefix = f"{stage_id}:"
        picked = []
        for entry in loops:
            if str(entry["ref"]).startswith(prefix):
                local = dict(entry)
                local["ref"] = str(entry["ref"])[len(prefix):]
                picked.append(local)
        return picked

    @cached_property
    def noise_result(self) -> Any:
        """The chain's :class:`~stagewise.engine.noise.NoiseResult`, or why not."""
        from stagewise.engine.noise import analyze_noise  # noqa: PLC0415

        merged = self.merged
        if isinstance(merged, _Failure):
            return merged
        try:
            return analyze_noise(merged.system, self.project, current_drive=merged.current_drive)
        except (ValueError, np.linalg.LinAlgError) as error:
            return _Failure(f"the noise analysis failed: {error}")

    @cached_property
    def noise(self) -> dict[str, Any] | _Failure:
        """The chain's noise document (DESIGN section 6 ``noise``), or why not."""
        from stagewise.engine.noise import noise_to_json  # noqa: PLC0415

        result = self.noise_result
        if isinstance(result, _Failure):
            return result
        return noise_to_json(result, self.project.converter)

    @cached_property
    def headroom(self) -> list[dict[str, Any]] | _Failure:
        """Headroom and slew at every op-amp output of the chain (DESIGN 3.5), or why not."""
        from stagewise.engine.headroom import headroom, headroom_to_json  # noqa: PLC0415

        merged = self.merged
        if isinstance(merged, _Failure):
            return merged
        try:
            return headroom_to_json(headroom(merged.system, self.project, current_drive=merged.current_drive,
                                             f_hz=self.f_hz))
        except (ValueError, np.linalg.LinAlgError) as error:
            return _Failure(f"the headroom analysis failed: {error}")

    @cached_property
    def converter_range(self) -> dict[str, Any] | _Failure:
        """``converter_peak_v``, ``converter_peak_hz`` and ``converter_headroom_db`` (each null with a
        ``*_why``) without the noise the other converter figures need; or why not."""
        from stagewise.engine.converter import converter_range  # noqa: PLC0415

        merged = self.merged
        if isinstance(merged, _Failure):
            return merged
        try:
            peak, peak_hz, headroom_db, why = converter_range(merged.system, self.project,
                                                              current_drive=merged.current_drive)
        except (ValueError, np.linalg.LinAlgError) as error:
            return _Failure(f"the converter headroom could not be computed: {error}")
        document: dict[str, Any] = {}
        for key, value in (("converter_peak_v", peak), ("converter_peak_hz", peak_hz),
                           ("converter_headroom_db", headroom_db)):
            put_with_why(document, key, value, why)
        return document

    @cached_property
    def converter(self) -> dict[str, Any] | _Failure:
        """The converter figures (alias attenuation, noise against LSB and full scale), or why not."""
        from stagewise.engine.converter import converter_review, converter_to_json  # noqa: PLC0415

        merged = self.merged
        if isinstance(merged, _Failure):
            return merged
        noise = self.noise_result
        corner = None
        record: dict[str, Any] | None = None
        chain = self.whole_chain
        if not isinstance(chain, _Failure):
            corner, _why = self._band_value("chain", "", chain, "f_high_3db_hz")
            record = self._metrics_document("chain", "", chain).get("ref")
        # The alias attenuation is taken against the chain's pass-band gain, like its corners.
        reference = None
        if isinstance(record, dict) and isinstance(record.get("gain_db"), int | float):
            reference = (record.get("f_hz"), float(record["gain_db"]))
        try:
            result = converter_review(merged.system, self.project, current_drive=merged.current_drive,
                                      noise=None if isinstance(noise, _Failure) else noise,
                                      f_high_3db_hz=corner, reference=reference)
        except (ValueError, np.linalg.LinAlgError) as error:
            return _Failure(f"the converter analysis failed: {error}")
        document = converter_to_json(result)
        if reference is not None:
            document["ref"] = record
        return document

    @cached_property
    def dc(self) -> Any:
        """The DC accuracy budgets of every place (:class:`~stagewise.engine.dc.DcBudgets`), or why not."""
        from stagewise.engine.dc import dc_budgets  # noqa: PLC0415

        merged = self.merged
        try:
            return dc_budgets(self.project, None if isinstance(merged, _Failure) else merged)
        except (ValueError, np.linalg.LinAlgError) as error:
            return _Failure(f"the DC budget failed: {error}")

    def dc_budget(self, where: str, stage_id: str) -> Any:
        """The :class:`~stagewise.engine.dc.DcBudget` of one place, or a :class:`_Failure`."""
        budgets = self.dc
        if isinstance(budgets, _Failure):
            return budgets
        if where == "chain":
            budget = budgets.chain
        else:
            table = {"isolated": budgets.isolated, "in_chain": budgets.in_chain,
                     "from_input": budgets.from_input}.get(where, {})
            budget = table.get(stage_id, f'stage "{stage_id}" has no DC budget {where}')
        return _Failure(budget) if isinstance(budget, str) else budget

    def dc_document(self, where: str, stage_id: str) -> tuple[dict[str, Any] | None, str | None]:
        """The ``dc`` object of a place in ``analyze --json`` (the chain's with converter units)."""
        from stagewise.engine.dc import budget_to_json  # noqa: PLC0415

        budget = self.dc_budget(where, stage_id)
        if isinstance(budget, _Failure):
            return None, budget.why
        if where == "in_chain":
            analysis = self.in_chain(stage_id)
            if isinstance(analysis, StageAnalysis) and analysis.poles_rad_s is None and analysis.model_why:
                return None, analysis.model_why  # its stability is not decided: no operating point to budget
        # Seen from the chain's input a stage has the whole chain's poles: its verdict is the chain's.
        verdict = self.stability("chain", "") if where == "from_input" else self.stability(where, stage_id)
        if verdict is not None and not verdict.stable:
            subject = "the chain" if where == "chain" else f'stage "{stage_id}" {PLACE_WORDS.get(where, where)}'
            return None, (f"{subject} is unstable: {verdict.reason}; it never settles to a DC operating point, "
                          "so it has no DC budget")
        return budget_to_json(budget, self.project.converter if where == "chain" else None), None

    @cached_property
    def spread(self) -> Any:
        """Monte Carlo spread of the chain, with the yield against every numeric check.

        Every numeric check is counted where the spread can evaluate it per sample (gains,
        corners, peaking and attenuation of the chain, of a stage isolated or in chain, and the
        op-amps' phase margins), each place sampled with the same part values; the others are
        listed in ``not_evaluated`` with the reason. The yield is the share of samples that meet
        every counted check; ``limits`` says, per check, how many samples met it.
        """
        from stagewise.engine.spread import SpreadCancelled  # noqa: PLC0415

        try:
            return self._spread()
        except SpreadCancelled:
            return _Failure(SPREAD_CANCELLED)

    def _spread(self) -> Any:
        from stagewise.engine.spread import Readout, monte_carlo, spread_to_json  # noqa: PLC0415

        merged = self.merged
        if isinstance(merged, _Failure):
            return merged
        plan, skipped = self._yield_plan()
        chain_limits = plan.pop(("chain", ""), [])
        # The places whose pencil is the merged chain's (every stage seen from the chain input,
        # the first stage in chain when it takes the chain's drive) are read from the chain's
        # own solves: other outputs of the same samples.
        shared: dict[tuple[str, str], Any] = {}
        failed: dict[tuple[str, str], _Failure] = {}
        for (where, stage_id), limits in plan.items():
            output = self._shared_output(where, stage_id)
            if isinstance(output, _Failure):
                failed[(where, stage_id)] = output
            elif output is not None:
                shared[(where, stage_id)] = Readout(output, tuple(limits))
        # Progress in equal thousandths per run: the chain's (CHAIN_SHARE of them) and each other place's.
        separate = [place for place in plan if place not in shared and place not in failed]
        report = _Slots(self.spread_progress, CHAIN_SHARE + len(separate))
        try:
            result = monte_carlo(merged.system, self.project, current_drive=merged.current_drive,
                                 limits=chain_limits, readouts={f"{where}/{stage_id}": readout
                                                                for (where, stage_id), readout in shared.items()},
                                 progress=report.slot(0, CHAIN_SHARE))
        except (ValueError, np.linalg.LinAlgError) as error:
            return _Failure(f"the spread analysis failed: {error}")
        document = spread_to_json(result)
        counted: list[tuple[str, Any]] = []
        for limit in chain_limits:
            self._count(limit, result.sample_values, counted, skipped)
        by_ref = dict(zip(result.parts, result.sample_values.multipliers.T, strict=True))
        for (where, stage_id), limits in plan.items():
            place: Any
            if (where, stage_id) in failed:
                place = failed[(where, stage_id)]
            elif (where, stage_id) in shared:
                place = result.readouts[f"{where}/{stage_id}"]
            else:
                place = self._place_samples(where, stage_id, by_ref, result.samples, limits,
                                            report.slot(CHAIN_SHARE + separate.index((where, stage_id)), 1))
            if isinstance(place, _Failure):
                skipped += [(limit.label, place.why) for limit in limits]
                continue
            for limit in limits:
                self._count(limit, place, counted, skipped)
        report.finish()
        samples = result.samples
        all_met = np.ones(samples, dtype=bool)
        per_check: dict[str, Any] = {}
        for label, met in counted:  # a check with several op-amps is met when all of them are
            per_check[label] = met if label not in per_check else per_check[label] & met
        for met in per_check.values():
            all_met &= met
        document["limits"] = [{"label": label, "pass_count": int(np.count_nonzero(met)),
                               "pass_pct": 100.0 * float(np.mean(met))} for label, met in per_check.items()]
        document["not_evaluated"] = [{"label": label, "why": reason} for label, reason in skipped]
        document["yield_basis"] = list(per_check)
        if per_check:
            document["yield_pct"] = 100.0 * float(np.mean(all_met))
            document.pop("yield_pct_why", None)
        else:
            document["yield_pct"] = None
            document["yield_pct_why"] = ("no numeric check of the project can be evaluated per sample"
                                         + ("" if not skipped else f" ({len(skipped)} listed under not_evaluated)"))
        # Only a run that went to its end is kept: a cancel while the places were sampled leaves
        # ``spread_result`` None beside the cancelled ``spread``, never the chain's half of a run.
        self.spread_result = result
        return document

    @staticmethod
    def _count(limit: Any, samples: Any, counted: list[tuple[str, Any]], skipped: list[tuple[str, str]]) -> None:
        try:
            counted.append((limit.label, limit.met(samples)))
        except KeyError as error:
            skipped.append((limit.label, str(error.args[0]) if error.args else "not sampled"))

    def _shared_output(self, where: str, stage_id: str) -> int | _Failure | None:
        """The output index in the merged chain of a place whose pencil is the chain's, else None."""
        merged = self.merged
        stage = self.project.stage(stage_id)
        if isinstance(merged, _Failure) or stage is None or where not in ("from_input", "in_chain"):
            return None
        if stage.bypass:
            return _Failure(f'stage "{stage_id}" is bypassed: its parts are not sampled with the chain')
        position = merged.stage_ids.index(stage_id)
        if where == "in_chain":
            built = self._in_chain_system(stage_id)
            if isinstance(built, _Failure) or built[1] != merged.current_drive or not _same_pencil(
                    built[0], merged.system):
                return None
        return int(merged.interface_indices[position + 1])

    def _place_samples(self, where: str, stage_id: str, by_ref: dict[str, Any], samples: int, limits: list[Any],
                       progress: Any = None) -> Any:
        """The per-sample metrics of a stage isolated or in chain on its own system (a place whose
        pencil is not the chain's), with the chain's part values."""
        from stagewise.engine.spread import Readout, place_samples  # noqa: PLC0415

        stage = self.project.stage(stage_id)
        assert stage is not None
        if stage.bypass:
            return _Failure(f'stage "{stage_id}" is bypassed: its parts are not sampled with the chain')
        if where == "isolated":
            system = self._systems[stage_id]
            if isinstance(system, _Failure):
                return system
            current, prefix = stage.drive == "current", f"{stage_id}:"
        else:  # in chain (every place seen from the input is read from the chain's solves)
            built = self._in_chain_system(stage_id)
            if isinstance(built, _Failure):
                return built
            system, current, prefix = built[0], built[1], ""
        mapped = {ref[len(prefix):]: values for ref, values in by_ref.items() if ref.startswith(prefix)}
        try:
            places = place_samples(system, self.project, current_drive=current, multipliers_by_ref=mapped,
                                   samples=samples, readouts={"place": Readout(system.output_index, tuple(limits))},
                                   progress=progress)
        except (ValueError, np.linalg.LinAlgError) as error:
            return _Failure(f"the spread of stage \"{stage_id}\" {PLACE_WORDS[where]} failed: {error}")
        return places["place"]

    def _yield_plan(self) -> tuple[dict[tuple[str, str], list[Any]], list[tuple[str, str]]]:
        """Every numeric check as a per-sample limit at its place, or the reason it cannot be one."""
        from stagewise.engine.spread import YieldLimit  # noqa: PLC0415

        plan: dict[tuple[str, str], list[Any]] = {}
        skipped: list[tuple[str, str]] = []
        settings = self.project.settings
        for stage in self.project.stages:
            for check in stage.checks:
                if check.metric is None:
                    continue
                label = f"{stage.id}/{check.id}"
                if check.waiver is not None:
                    skipped.append((label, "waived: accepted whatever its value, so not counted"))
                    continue
                low = None if check.min is None else check.min.si
                high = None if check.max is None else check.max.si
                at_hz = None if check.at_hz is None else check.at_hz.si
                place = (check.where, "" if check.where == "chain" else stage.id)
                if check.metric in SAMPLED_METRICS:
                    if check.metric == "gain_db" and at_hz is None and settings.ref_hz is not None:
                        at_hz = settings.ref_hz.si
                    if check.metric == "attenuation_db":
                        if at_hz is None:
                            skipped.append((label, "attenuation is read at a frequency, and the check names none"))
                            continue
                        limit = YieldLimit(check.metric, low, high, at_hz=at_hz, label=label,
                                           function=partial(_sampled_attenuation, at_hz=at_hz))
                    else:
                        limit = YieldLimit(check.metric, low, high, at_hz=at_hz, label=label)
                    plan.setdefault(place, []).append(limit)
                elif check.metric == "phase_margin_deg" and check.where in ("in_chain", "from_input", "chain"):
                    refs = self._chain_opamps(None if check.where == "chain" else stage.id)
                    if not refs:
                        skipped.append((label, NO_OPAMP))
                        continue
                    plan.setdefault(("chain", ""), []).extend(
                        YieldLimit("phase_margin_deg", low, high, opamp=ref, label=label) for ref in refs)
                elif check.metric == "phase_margin_deg":
                    refs = [opamp.ref for opamp in self._stage_opamps(stage.id)]
                    if not refs:
                        skipped.append((label, NO_OPAMP))
                        continue
                    plan.setdefault(place, []).extend(
                        YieldLimit("phase_margin_deg", low, high, opamp=ref, label=label) for ref in refs)
                else:
                    skipped.append((label, NOT_SAMPLED))
        return plan, skipped

    def _chain_opamps(self, stage_id: str | None) -> list[str]:
        merged = self.merged
        if isinstance(merged, _Failure):
            return []
        refs = [opamp.ref for opamp in merged.system.opamps]
        return refs if stage_id is None else [ref for ref in refs if ref.startswith(f"{stage_id}:")]

    def _stage_opamps(self, stage_id: str) -> tuple[Any, ...]:
        system = self._systems.get(stage_id)
        return () if system is None or isinstance(system, _Failure) else system.opamps

    # -- impedances ------------------------------------------------------------------------

    def isolated_impedances(self, stage_id: str, f_hz: float) -> tuple[complex | None, complex | None, str | None]:
        """Z_in (output unloaded) and Z_out (its own drive zeroed) of a stage alone, at ``f_hz``."""
        system = self._systems.get(stage_id)
        if system is None or isinstance(system, _Failure):
            return None, None, None if system is None else system.why
        stage = self.project.stage(stage_id)
        assert stage is not None
        s = np.array([1j * TWO_PI * f_hz])
        n = system.size
        try:
            injected = np.zeros(n, dtype=complex)
            injected[system.input_index] = 1.0
            z_in = complex(solve_batched(system.g, system.c, injected, s)[0, system.input_index])
        except np.linalg.LinAlgError:
            z_in = None
        try:
            if stage.drive == "current":
                g, c = system.g, system.c
            else:
                shorted = drive(system, False)
                g, c = shorted.g, shorted.c
            injected = np.zeros(g.shape[0], dtype=complex)
            injected[system.output_index] = 1.0
            z_out = complex(solve_batched(g, c, injected, s)[0, system.output_index])
        except np.linalg.LinAlgError:
            z_out = None
        return z_in, z_out, None

    def chain_impedances(self, stage_id: str, f_hz: float) -> tuple[complex | None, complex | None, str | None]:
        """Z_in looking into the stage where it sits and Z_out looking back from its output."""
        stage = self.project.stage(stage_id)
        if stage is None or stage.bypass:
            return None, None, f'stage "{stage_id}" is bypassed, so it is not in the chain'
        try:
            result = self.engine.analyze(self.project, [f_hz])
        except CircuitError as error:
            return None, None, str(error)
        entry = result.stage(stage_id)
        return complex(entry.z_in_ohm[0]), complex(entry.z_out_ohm[0]), None

    # -- stability and automatic findings ----------------------------------------------------

    def stability(self, where: str, stage_id: str) -> Stability | None:
        """The closed-loop verdict of a place (``None`` when that place cannot be analysed)."""
        if where == "from_input":
            # Seen from the input, a stage has the merged chain's pencil (only its output differs),
            # so its poles are among the chain's: a stable chain settles it without more work.
            chain = self.stability("chain", "")
            whole = self.whole_chain
            hidden = [] if isinstance(whole, _Failure) else [pole for pole, _ in whole.cancelled]
            if chain is not None and chain.stable and stability_of_poles(hidden).stable:
                return chain
        analysis = self._analysis_for(where, stage_id)
        if isinstance(analysis, _Failure) or analysis.poles_rad_s is None:
            return None
        return stability_of_poles(analysis.poles_rad_s, analysis.cancelled)

    def stability_unknown_why(self, where: str, stage_id: str) -> str:
        """Why a place has no verdict (:meth:`stability` gave ``None``): its analysis failed, or it is
        above the size limit of the pole analysis (the sentence names the sizes)."""
        analysis = self._analysis_for(where, stage_id)
        if isinstance(analysis, _Failure):
            return analysis.why
        return analysis.model_why or analysis.why or "its poles could not be computed"

    def unstable_why(self, where: str, stage_id: str) -> str | None:
        """One sentence when the place is unstable (its response metrics have no value), else ``None``."""
        verdict = self.stability(where, stage_id)
        if verdict is None or verdict.stable:
            return None
        subject = "the chain" if where == "chain" else f'stage "{stage_id}" {PLACE_WORDS.get(where, where)}'
        return f"{subject} is unstable: {verdict.reason}; a response metric of an unstable system has no value"

    def _metric_places(self, metric: str, where: str, stage_id: str) -> list[tuple[str, str]]:
        """The places whose stability a check's value depends on."""
        if metric in CHAIN_LEVEL_METRICS:
            return [("chain", "")]
        if metric == "loading_error_db_max":
            return [("isolated", stage_id), ("in_chain", stage_id)]
        return [(where, stage_id)]

    def findings(self) -> list[Finding]:
        """What fails whether or not anyone wrote a check: instability, over-range, clipping, slew.

        Every stage isolated and in chain and the whole chain get a stability verdict; the
        converter headroom and each op-amp's swing and slew margin for the declared input are
        read from the chain (they are left out when the chain itself is unstable: their values
        would mean nothing, and the instability is already a finding).
        """
        return list(self._findings)

    @cached_property
    def _findings(self) -> tuple[Finding, ...]:
        found: list[Finding] = []
        active = self.project.active_stages
        last = active[-1].id if active else None
        for stage in self.project.stages:
            for place in STAGE_PLACES:
                if place != "isolated" and stage.bypass:
                    continue
                if place == "from_input" and stage.id == last:
                    continue  # the last stage seen from the input is the chain itself (said below)
                verdict = self.stability(place, stage.id)
                if verdict is not None and not verdict.stable:
                    found.append(Finding("unstable", stage.id, place, None,
                                         f'stage "{stage.id}" {PLACE_WORDS[place]} is unstable: {verdict.reason}'))
        whole = self.whole_chain
        if isinstance(whole, _Failure) and active:
            # Nothing about the chain can be shown to hold: that fails the design too.
            # The stage's own diagnosis names the node or part; the chain's pencil only says "singular".
            stages = [self.isolated(stage.id).why for stage in active]
            why = next((reason for reason in stages if reason), whole.why.removeprefix("the chain: "))
            found.append(Finding("not_analysed", None, "chain", None, f"the chain cannot be analysed: {why}"))
            return tuple(found)
        verdict = self.stability("chain", "")
        if verdict is not None and not verdict.stable:
            found.append(Finding("unstable", None, "chain", None, f"the chain is unstable: {verdict.reason}"))
            return tuple(found)
        found.extend(self._range_findings())
        return tuple(found)

    def _range_findings(self) -> list[Finding]:
        found: list[Finding] = []
        converter = self.converter_range
        headroom_db = None if isinstance(converter, _Failure) else converter.get("converter_headroom_db")
        if isinstance(converter, dict) and headroom_db is not None and headroom_db < 0:
            amplitude = self.project.input.amplitude
            unit = "A" if self.project.input.drive == "current" else "V"
            declared = "" if amplitude is None else f" ({format_value(amplitude.si, unit)} peak)"
            peak = float(converter["converter_peak_v"])
            full_scale_peak = peak * 10.0 ** (headroom_db / 20.0)  # the headroom's own definition
            found.append(Finding(
                "over_range", None, "chain", None,
                f"the converter input is over-range: the declared input{declared} gives "
                f"{format_value(peak, 'V')} peak at {format_value(converter['converter_peak_hz'], 'Hz')} "
                f"against a full scale of ±{format_value(full_scale_peak, 'V')} ({headroom_db:.3g} dB of headroom)"))
        headroom = self.headroom
        if isinstance(headroom, _Failure):
            return found
        for entry in headroom:
            ref = str(entry["ref"])
            stage_id = ref.split(":", 1)[0] if ":" in ref else None
            margin = entry.get("swing_margin_v")
            if margin is not None and margin < 0:
                found.append(Finding("swing", stage_id, "chain", ref,
                                     f"op-amp {ref} clips: its output needs {format_value(entry['peak_v'], 'V')} peak "
                                     f"at {format_value(entry['at_hz'], 'Hz')}, {format_value(-margin, 'V')} beyond "
                                     f"its swing ({_swing_text(entry)}) for the declared input"))
            slew = entry.get("slew_margin_pct")
            if slew is not None and slew < 0:
                found.append(Finding("slew", stage_id, "chain", ref,
                                     f"op-amp {ref} is slew-limited: its output needs "
                                     f"{format_value(entry['slew_needed_v_per_s'], 'V/s')} at "
                                     f"{format_value(entry['slew_at_hz'], 'Hz')}, {-slew:.3g} % more than its "
                                     "slew rate, for the declared input"))
        return found

    # -- the metric provider for checks ------------------------------------------------------

    def _analysis_for(self, where: str, stage_id: str) -> StageAnalysis | _Failure:
        if where == "chain":
            return self.whole_chain
        if where == "isolated":
            analysis = self.isolated(stage_id)
            return _Failure(analysis.why) if analysis.why is not None else analysis
        if where == "from_input":
            return self.from_input(stage_id)
        return self.in_chain(stage_id)

    def metric_value(self, metric: str, where: str, stage_id: str,
                     at_hz: float | None) -> tuple[float | None, str | None]:
        """A check's metric (DESIGN section 4), or ``(None, why)``. Units as in the metric table."""
        if self.project.stage(stage_id) is None:
            return None, f'there is no stage "{stage_id}"'
        for place, place_stage in self._metric_places(metric, where, stage_id):
            unstable = self.unstable_why(place, place_stage)
            if unstable is not None:
                return None, unstable
        try:
            return self._metric_value(metric, where, stage_id, at_hz)
        except (ValueError, np.linalg.LinAlgError) as error:
            return None, f"{metric} could not be computed: {error}"

    def _metric_value(self, metric: str, where: str, stage_id: str,
                      at_hz: float | None) -> tuple[float | None, str | None]:
        settings = self.project.settings
        if metric in ("gain_db", *POINT_KEYS, *BAND_KEYS, *STEP_KEYS):
            analysis = self._analysis_for(where, stage_id)
            if isinstance(analysis, _Failure):
                return None, analysis.why
            if metric == "gain_db" and at_hz is None:
                document = self._metrics_document(where, stage_id, analysis)
                return _document_value(document, "gain_db")
            if metric == "gain_db" or metric in POINT_KEYS:
                if at_hz is None:
                    return None, f"{metric} needs a frequency (at_hz)"
                point = metric_at(analysis, metric, at_hz, settings)
                return _finite(point.value), point.why
            if metric in BAND_KEYS:
                return self._band_value(where, stage_id, analysis, metric)
            document = self._metrics_document(where, stage_id, analysis)
            step = document.get("step")
            if not isinstance(step, dict):
                return None, str(document.get("step_why", "the step response could not be computed"))
            return _document_value(step, STEP_KEYS[metric])
        if metric in ("phase_margin_deg", "gain_margin_db", "crossover_hz"):
            loops = self.stage_chain_loops(stage_id) if where == "in_chain" else self.isolated_loops.get(stage_id, [])
            if where == "chain":
                chain_loops = self.chain_loops
                loops = [] if isinstance(chain_loops, _Failure) else chain_loops
            return _loop_value(loops, metric)
        if metric in ("loading_error_db_max", "loading_error_db"):
            entry = self._chain_entry(stage_id)
            if entry is None:
                chain = self.chain
                return None, chain.why if isinstance(chain, _Failure) else f'stage "{stage_id}" is not in the chain'
            value = entry.loading_error_db_max if metric == "loading_error_db_max" else entry.loading_error_db_signed
            return _finite(value), entry.loading_error_why
        if metric in ("zin_ohm", "zout_ohm"):
            frequency = at_hz if at_hz is not None else _reference_hz(self.project)
            if frequency is None:
                return None, "no frequency: give the check a frequency (at_hz) or set the project's reference frequency"
            if where == "isolated":
                z_in, z_out, why = self.isolated_impedances(stage_id, frequency)
            else:
                z_in, z_out, why = self.chain_impedances(stage_id, frequency)
            impedance = z_in if metric == "zin_ohm" else z_out
            if impedance is None:
                return None, why or "the impedance is undefined (the equations are singular there)"
            magnitude = abs(impedance)
            if not math.isfinite(magnitude):
                return None, "the impedance is infinite there (an open circuit)"
            return magnitude, None
        if metric in ("noise_out_rms_v", "noise_in_rms"):
            noise = self.noise
            if isinstance(noise, _Failure):
                return None, noise.why
            return _document_value(noise, {"noise_out_rms_v": "out_rms_v", "noise_in_rms": "in_rms"}[metric])
        if metric == "converter_headroom_db":
            peak = self.converter_range
            return (None, peak.why) if isinstance(peak, _Failure) else _document_value(peak, metric)
        if metric in ("alias_attenuation_db", "snr_db", "snr_noise_only_db"):
            converter = self.converter
            if isinstance(converter, _Failure):
                return None, converter.why
            return _document_value(converter, metric)
        if metric in ("headroom_v", "swing_margin_v", "slew_margin", "slew_margin_pct"):
            return self._headroom_value(metric, where, stage_id)
        if metric in MEASURED_KEYS:
            return self._measured_value(metric, where, stage_id)
        if metric in DC_KEYS:
            budget, why = self.dc_document(where, stage_id)
            if budget is None:
                return None, why
            return _document_value(budget, DC_KEYS[metric])
        if metric == "yield_pct":
            if self.spread_deferred is not None and "spread" not in self.__dict__:  # not run yet: say it follows
                return None, self.spread_deferred
            spread = self.spread
            if isinstance(spread, _Failure):
                return None, spread.why
            return _document_value(spread, "yield_pct")
        return None, f'"{metric}" is not a metric Stagewise computes'

    @cached_property
    def measurements(self) -> list[Any]:
        """Every bench measurement compared with the prediction at its place
        (:class:`~stagewise.engine.measured.MeasurementComparison`, in file order)."""
        from stagewise.engine.measured import compare_measurement  # noqa: PLC0415

        return [compare_measurement(self.project, item, self.engine, envelope_why=self.spread_deferred)
                for item in self.project.measurements]

    def _measurement_document(self, comparison: Any, entry: dict[str, Any]) -> dict[str, Any]:
        """A step capture's entry gains the predicted step at the same place, measured by the same code."""
        measurement = comparison.measurement
        if measurement.kind != "step":
            return entry
        analysis = self._analysis_for(measurement.where, measurement.stage or "")
        if isinstance(analysis, _Failure):
            entry["predicted_step"] = None
            entry["predicted_step_why"] = analysis.why
            return entry
        where = measurement.where
        step = self._metrics_document(where, measurement.stage or "", analysis).get("step")
        entry["predicted_step"] = step if isinstance(step, dict) else None
        if not isinstance(step, dict):
            entry["predicted_step_why"] = "the predicted step response could not be computed"
        return entry

    def _measured_value(self, metric: str, where: str, stage_id: str) -> tuple[float | None, str | None]:
        place = "the whole chain" if where == "chain" else f'stage "{stage_id}" {where.replace("_", " ")}'
        kind, key = MEASURED_KEYS[metric]
        found = [item for item in self.measurements
                 if item.measurement.kind == kind and item.measurement.where == where
                 and (where == "chain" or item.measurement.stage == stage_id)]
        if not found:
            what = "frequency-response measurement" if kind == "response" else "step capture"
            return None, f"no {what} is attached to {place}"
        current = [item for item in found if not item.stale]
        if not current:
            names = ", ".join(f'"{item.measurement.id}"' for item in found)
            return None, (f"the measurement {names} of {place} is out of date: the circuit changed after it was "
                          "measured; measure the board again")
        values: list[float] = []
        for item in current:
            figures = item.step if kind == "step" else item  # a capture's step metrics, or the comparison
            value = None if figures is None else getattr(figures, key)
            if value is None:
                why = item.why.get("step") if figures is None else figures.why.get(key)
                return None, f'measurement "{item.measurement.id}": {why or "no value"}'
            values.append(float(value))
        return (min(values) if key == "inside_spread_pct" else max(values)), None

    def metric_reference(self, metric: str, where: str, stage_id: str) -> dict[str, Any] | None:
        """The ``ref`` record a corner, peaking or attenuation at ``where`` was taken against.

        ``None`` for metrics that are not taken against a pass-band reference, and where the
        analysis failed (the value then says why).
        """
        from stagewise.review.metrics import METRICS  # noqa: PLC0415 - the table lives above

        entry = METRICS.get(metric)
        if entry is None or not entry.referenced:
            return None
        analysis = self._analysis_for(where, stage_id)
        if isinstance(analysis, _Failure):
            return None
        record = self._metrics_document(where, stage_id, analysis).get("ref")
        return record if isinstance(record, dict) else None

    def metric_reference_words(self, metric: str, where: str, stage_id: str) -> str | None:
        """:meth:`metric_reference` in a few words ("re DC gain 166.02 dBΩ"), for tables."""
        record = self.metric_reference(metric, where, stage_id)
        if record is None:
            return None
        analysis = self._analysis_for(where, stage_id)
        unit = "dBΩ" if not isinstance(analysis, _Failure) and analysis.unit == CURRENT_UNIT else "dB"
        return reference_words(record, unit)

    def _headroom_value(self, metric: str, where: str, stage_id: str) -> tuple[float | None, str | None]:
        headroom = self.headroom
        if isinstance(headroom, _Failure):
            return None, headroom.why
        entries = headroom
        if where == "in_chain":
            entries = [entry for entry in entries if str(entry.get("ref", "")).startswith(f"{stage_id}:")]
        key = "swing_margin_v" if metric == "headroom_v" else metric
        values = [float(entry[key]) for entry in entries if entry.get(key) is not None]
        if values:
            return min(values), None
        reasons = [str(entry.get(f"{key}_why")) for entry in entries if entry.get(f"{key}_why")]
        if reasons:
            return None, reasons[0]
        return None, "no op-amp with a swing or slew model sits there"

    # -- documents -------------------------------------------------------------------------

    def _metrics_document(self, where: str, stage_id: str, analysis: StageAnalysis) -> dict[str, Any]:
        key = (where, stage_id if where != "chain" else "")
        cache = self._documents
        if key not in cache:
            shared = None
            if where == "from_input" and analysis.model is None:
                # Listed once, under the chain: O(N) per stage would make the document quadratic.
                shared = ("the same as the whole chain's poles (listed under chain): seen from the chain's input a "
                          "stage has the chain's matrices, only the output differs")
            document = stage_metrics(analysis, self.project.settings, shared_poles_why=shared)
            if analysis.poles_rad_s is None:
                # Above the size limit in chain: no poles, so no verdict (and no response figure).
                document["stability"] = {"verdict": None, "why": analysis.model_why or analysis.why, "poles": []}
                cache[key] = document
                return document
            verdict = stability_of_poles(analysis.poles_rad_s, analysis.cancelled)
            document["stability"] = stability_to_json(verdict)
            if not verdict.stable:
                why = (f"the system is unstable: {verdict.reason}; "
                       "a response metric of an unstable system has no value")
                for name in RESPONSE_KEYS:
                    if name in document:
                        document[name] = None
                        document[f"{name}_why"] = why
                # The pass-band reference goes with the figures taken against it: an unstable
                # system has no steady pass-band gain to refer to either.
                if isinstance(document.get("ref"), dict):
                    document["ref"] = {**document["ref"], "gain_db": None, "gain_db_why": why, "unstable": True,
                                       "note": "no reference gain: the system is unstable"}
            cache[key] = document
        return cache[key]

    @cached_property
    def _documents(self) -> dict[tuple[str, str], dict[str, Any]]:
        return {}

    def _band_value(self, where: str, stage_id: str, analysis: StageAnalysis,
                    metric: str) -> tuple[float | None, str | None]:
        """A corner, peak or peaking figure without the rest of the metrics document (whose step
        response is the slowest piece of it: ``check`` and the converter need only the corners)."""
        document = self._documents.get((where, stage_id if where != "chain" else ""))
        if document is None:
            key = (where, stage_id if where != "chain" else "")
            if key not in self._bands:
                self._bands[key] = bandwidth(analysis, self.project.settings)
            limits = self._bands[key]
            document = {metric: getattr(limits, metric), f"{metric}_why": limits.why.get(metric) or "not computed"}
        return _document_value(document, metric)

    @cached_property
    def _bands(self) -> dict[tuple[str, str], Any]:
        return {}

    def stage_document(self, stage: Stage) -> dict[str, Any]:
        """One ``stages[]`` entry of the ``analyze --json`` document."""
        document: dict[str, Any] = {"id": stage.id, "name": stage.name}
        if stage.bypass:
            document["bypass"] = True
        isolated = self.isolated(stage.id)
        if isolated.why is not None:
            document["isolated"] = None
            document["isolated_why"] = isolated.why
        else:
            metrics = dict(self._metrics_document("isolated", stage.id, isolated))
            metrics["loops"] = self.isolated_loops.get(stage.id, [])
            dc, dc_why = self.dc_document("isolated", stage.id)
            put_with_why(metrics, "dc", dc, dc_why)
            document["isolated"] = metrics
        in_chain = self.in_chain(stage.id)
        if isinstance(in_chain, _Failure):
            document["in_chain"] = None
            document["in_chain_why"] = in_chain.why
        else:
            metrics = dict(self._metrics_document("in_chain", stage.id, in_chain))
            metrics["loops"] = self.stage_chain_loops(stage.id)
            dc, dc_why = self.dc_document("in_chain", stage.id)
            put_with_why(metrics, "dc", dc, dc_why)
            document["in_chain"] = metrics
        from_input = self.from_input(stage.id)
        if isinstance(from_input, _Failure):
            document["from_input"] = None
            document["from_input_why"] = from_input.why
        else:
            metrics = dict(self._metrics_document("from_input", stage.id, from_input))
            metrics["loops"] = self.stage_chain_loops(stage.id)
            document["from_input"] = metrics
        value, why = self.metric_value("loading_error_db_max", "in_chain", stage.id, None)
        put_with_why(document, "loading_error_db_max", value, why)
        # Signed (in chain minus isolated) at the frequency of the largest deviation.
        value, why = self.metric_value("loading_error_db", "in_chain", stage.id, None)
        put_with_why(document, "loading_error_db", value, why)
        entry = self._chain_entry(stage.id)
        put_with_why(document, "loading_error_f_hz", None if value is None or entry is None else entry.loading_error_f_hz,
                     why)
        for key, metric in (("zin_ohm_at_ref", "zin_ohm"), ("zout_ohm_at_ref", "zout_ohm")):
            if stage.bypass:
                put_with_why(document, key, None, f'stage "{stage.id}" is bypassed, so it is not in the chain')
                continue
            value, why = self.metric_value(metric, "in_chain", stage.id, None)
            put_with_why(document, key, value, why)
        if isinstance(document.get("from_input"), dict):  # the place from the chain's drive, where it exists
            dc, dc_why = self.dc_document("from_input", stage.id)
            put_with_why(document["from_input"], "dc", dc, dc_why)
        document["checks"] = [self.check_document(stage, check) for check in stage.checks]
        return document

    def check_document(self, stage: Stage, check: Check) -> dict[str, Any]:
        """A check with its computed state, through the review layer's evaluation."""
        from stagewise.review.checks import evaluate_check  # noqa: PLC0415

        result = evaluate_check(check, stage, self.project, self)
        document: dict[str, Any] = {
            "id": check.id,
            "text": check.text,
            "metric": check.metric,
            "where": check.where if check.metric is not None else None,
            "at_hz": result.at_hz,
            "min": None if check.min is None else check.min.si,
            "max": None if check.max is None else check.max.si,
            "value": _finite(result.value),
            "unit": result.unit,
            "state": str(result.state),
        }
        if result.why:
            document["why"] = result.why
        if check.metric is not None:
            record = self.metric_reference(check.metric, check.where, stage.id)
            if record is not None:
                document["ref"] = record
        return document

    def chain_document(self) -> dict[str, Any] | None:
        """The ``chain`` M of the document (None when the chain cannot be analysed)."""
        chain = self.whole_chain
        if isinstance(chain, _Failure):
            return None
        document = dict(self._metrics_document("chain", "", chain))
        loops = self.chain_loops
        document["loops"] = [] if isinstance(loops, _Failure) else loops
        for key, piece in (("noise", self.noise), ("headroom", self.headroom), ("converter", self.converter)):
            if isinstance(piece, _Failure):
                document[key] = None
                document[f"{key}_why"] = piece.why
            else:
                document[key] = piece
        for key in ("snr_db", "snr_noise_only_db", "alias_attenuation_db", "converter_headroom_db"):
            value, why = self.metric_value(key, "chain", self.project.stages[0].id, None)
            put_with_why(document, key, value, why)
        dc, dc_why = self.dc_document("chain", "")
        put_with_why(document, "dc", dc, dc_why)
        if self.with_spread:
            spread = self.spread
            if isinstance(spread, _Failure):
                put_with_why(document, "spread", None, spread.why)
            else:
                document["spread"] = spread
        else:
            put_with_why(document, "spread", None, "the spread analysis was not asked for")
        return document

    def document(self, path: str | Path | None = None, sha256: str | None = None) -> dict[str, Any]:
        """The whole ``analyze --json`` document (DESIGN section 6)."""
        document: dict[str, Any] = {
            "file": None if path is None else str(path),
            "sha256": sha256,
            "title": self.project.title,
            "revision": self.project.revision,
            "stages": [self.stage_document(stage) for stage in self.project.stages],
        }
        chain = self.chain_document()
        if chain is None:
            failure = self.whole_chain
            document["chain"] = None
            document["chain_why"] = failure.why if isinstance(failure, _Failure) else "the chain cannot be analysed"
        else:
            document["chain"] = chain
        from stagewise.engine.measured import comparison_to_json  # noqa: PLC0415

        document["measurements"] = [self._measurement_document(item, comparison_to_json(item))
                                    for item in self.measurements]
        ready: dict[str, Any] = _json_ready(document)
        return ready


class _Slots:
    """One progress callback over several runs: run k reports within its own slots of the whole.

    Each run's ``(done, total)`` is mapped into thousandths of its slots; the slots follow one
    another, so the whole never goes back while each run's progress does not.
    """

    def __init__(self, progress: Any, slots: int) -> None:
        self.progress = progress
        self.total = 1000 * slots

    def slot(self, first: int, count: int) -> Any:
        if self.progress is None:
            return None
        progress, start, width, total = self.progress, 1000 * first, 1000 * count, self.total

        def report(done: int, run_total: int) -> bool:
            return bool(progress(start + (width * done // run_total if run_total > 0 else 0), total))

        return report

    def finish(self) -> None:
        if self.progress is not None:
            self.progress(self.total, self.total)


def _same_pencil(first: StageSystem, second: StageSystem) -> bool:
    """Whether two assembled systems are the same circuit (unknowns, matrices and input)."""
    return (first.unknowns == second.unknowns and first.input_index == second.input_index
            and np.array_equal(first.g, second.g) and np.array_equal(first.c, second.c)
            and first.elements == second.elements)


def _sampled_attenuation(samples: Any, at_hz: float) -> NDArray[np.float64]:
    """Each sample's pass-band gain minus its gain at ``at_hz``, in dB (as the nominal figure)."""
    reference = samples.gain_db if samples.pass_gain_db is None else samples.pass_gain_db
    values: NDArray[np.float64] = reference - samples.metric("gain_db", at_hz)
    return values


def _swing_text(entry: dict[str, Any]) -> str:
    """``bias 0 V, limits −2.45 … 2.45 V`` from a headroom entry (as much as it knows)."""
    bias = entry.get("bias_v")
    low, high = entry.get("swing_low_v"), entry.get("swing_high_v")
    if low is not None and high is not None:
        return f"{format_value(low, 'V')} … {format_value(high, 'V')} about {format_value(bias or 0.0, 'V')}"
    return f"biased at {format_value(bias or 0.0, 'V')}"


def _reference_hz(project: Project) -> float | None:
    return None if project.settings.ref_hz is None else project.settings.ref_hz.si


def _document_value(document: dict[str, Any], key: str) -> tuple[float | None, str | None]:
    value = document.get(key)
    if value is None:
        return None, str(document.get(f"{key}_why") or f"{key} could not be computed")
    return _finite(float(value)), None


def _loop_value(loops: list[dict[str, Any]], metric: str) -> tuple[float | None, str | None]:
    if not loops:
        return None, NO_OPAMP
    values = [float(entry[metric]) for entry in loops if entry.get(metric) is not None]
    if values:
        # The weakest loop decides: smallest margin; for crossover, the lowest frequency.
        return min(values), None
    reasons = [str(entry.get(f"{metric}_why")) for entry in loops if entry.get(f"{metric}_why")]
    return None, reasons[0] if reasons else IDEAL_ONLY


def _json_ready(value: Any) -> Any:
    """Replace NaN/inf by None and numpy scalars by Python numbers, recursively."""
    if isinstance(value, dict):
        return {key: _json_ready(item) for key, item in value.items()}
    if isinstance(value, list | tuple):
        return [_json_ready(item) for item in value]
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


# -- entry points ----------------------------------------------------------------------------


def analyze_project(project: Project, path: str | Path | None = None, *, spread: bool = True) -> dict[str, Any]:
    """The ``analyze --json`` document of a project (DESIGN section 6).

    Parameters
    ----------
    project : Project
        A validated project.
    path : str or Path, optional
        The file it came from: its name and SHA-256 go into the document.
    spread : bool
        Include the Monte Carlo spread (the slowest piece).
    """
    sha256 = None
    if path is not None:
        from stagewise.files.project_file import file_sha256  # noqa: PLC0415

        sha256 = file_sha256(path)
    return ProjectAnalysis(project, spread=spread).document(path, sha256)


def metric_provider(project: Project) -> ProjectAnalysis:
    """The review layer's :class:`~stagewise.review.checks.MetricProvider` for ``project``."""
    return ProjectAnalysis(project)


def response_points(project: Project, f_hz: list[float], stage_id: str | None = None,
                    in_chain: bool = False, *, from_input: bool = False
                    ) -> tuple[str, NDArray[np.complex128] | None, str | None]:
    """The response at chosen frequencies: the chain, a stage isolated, in chain or from the input.

    ``from_input`` gives the chain's drive to the stage's output, where it sits (the
    port-relation cascade's interface voltage per unit drive: V/V, or Ω for a current drive).

    Returns
    -------
    (unit, values, why)
        ``values`` is None when the response is undefined, ``why`` then says why.

    Raises
    ------
    ValueError
        An unknown stage id, or ``in_chain``/``from_input`` for a bypassed stage (one sentence each).
    """
    engine = ChainEngine()
    if stage_id is None:
        result = engine.analyze(project, f_hz)
        return result.unit, result.response, None
    stage = project.stage(stage_id)
    if stage is None:
        known = ", ".join(item.id for item in project.stages)
        raise ValueError(f'there is no stage "{stage_id}" (stages: {known})')
    if not in_chain and not from_input:
        isolated = engine.isolated(stage, project, np.asarray(f_hz, dtype=float))
        return isolated.unit, isolated.response, isolated.why
    if stage.bypass:
        place = "seen from the chain input" if from_input else "in chain"
        raise ValueError(f'stage "{stage_id}" is bypassed, so it has no response {place}')
    if from_input:
        result = engine.analyze(project, f_hz)
        position = result.stage_ids.index(stage_id) + 1
        return result.unit, result.interface_response[:, position], None
    entry = engine.analyze(project, f_hz).stage(stage_id)
    return entry.unit, entry.in_chain, entry.in_chain_why

