"""Bench measurements against the prediction: deviation, the Monte Carlo envelope, step metrics.

A frequency-response measurement is compared on its own frequencies (no interpolation of the
measurement): the prediction is solved exactly there, for the place it was taken (the stage
``isolated``, the stage ``in_chain`` where it sits, or the whole ``chain``).

- Deviation: ``dev_db = 20·log10|H_meas / H_pred|`` and ``dev_deg = arg(H_meas / H_pred)`` in
  degrees, within ±180°, so no phase unwrapping of noisy data is needed. ``dev_db_max`` and
  ``dev_deg_max`` are the largest absolute values, ``dev_db_rms`` and ``dev_deg_rms`` the root
  mean squares over the points.
- Spread: the project's Monte Carlo samples (same seed, count and distribution as the spread
  analysis, :func:`stagewise.engine.spread.sample_multipliers`) are solved at the measured
  frequencies; each sample's ratio to the nominal gives an envelope of relative magnitude (dB)
  and relative phase (degrees). A measured point lies *inside the spread* when both its
  ``dev_db`` and its ``dev_deg`` lie within that envelope (bounds included);
  ``inside_spread_pct`` is the share of such points. With no toleranced part there is no spread:
  the share is null, with that reason.
- A step capture is measured by :func:`stagewise.engine.timeresp.step_metrics`, the code of the
  predicted step: time zero is the input edge (the trigger; samples before it give the baseline,
  else the first sample does), the final value is the mean of the last tenth of the capture, and
  crossings are refined on straight lines between samples.

A measurement is *stale* when the fingerprint of what it depends on
(:func:`stagewise.model.fingerprint.measurement_fingerprint`) differs from the one stored when it
was attached: the numbers are still computed and shown, marked stale, and checks on them give no
value.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray

from stagewise.engine.chain import ChainEngine, load_admittance, merge_systems, merged_system
from stagewise.engine.mna import CircuitError, StageSystem
from stagewise.engine.spread import bounded_samples, sample_multipliers, sampled_response, tolerance_model
from stagewise.engine.sweep import TWO_PI, solve_batched
from stagewise.engine.timeresp import StepResponse, step_metrics
from stagewise.model.fingerprint import measurement_fingerprint
from stagewise.model.project import Measurement, Project

__all__ = [
    "FINAL_FRACTION",
    "MeasurementComparison",
    "capture_step",
    "compare_measurement",
    "comparison_to_json",
    "prediction_system",
]

# The final value of a capture: the mean of this last fraction of its samples.
FINAL_FRACTION = 0.1


@dataclass(frozen=True, slots=True)
class MeasurementComparison:
    """One measurement against the prediction at the same place (units in the field names).

    Frequency responses fill ``f_hz`` … ``inside``; step captures fill ``t_s``, ``v`` and
    ``step``. ``why`` maps a field name to the sentence saying why it has no value.
    """

    measurement: Measurement
    stale: bool
    points: int
    f_hz: NDArray[np.float64] = field(default_factory=lambda: np.zeros(0))
    measured: NDArray[np.complex128] = field(default_factory=lambda: np.zeros(0, dtype=complex))
    predicted: NDArray[np.complex128] | None = None
    dev_db: NDArray[np.float64] | None = None
    dev_deg: NDArray[np.float64] | None = None
    envelope_db: tuple[NDArray[np.float64], NDArray[np.float64]] | None = None
    envelope_deg: tuple[NDArray[np.float64], NDArray[np.float64]] | None = None
    inside: NDArray[np.bool_] | None = None
    dev_db_max: float | None = None
    dev_deg_max: float | None = None
    dev_db_rms: float | None = None
    dev_deg_rms: float | None = None
    inside_spread_pct: float | None = None
    t_s: NDArray[np.float64] = field(default_factory=lambda: np.zeros(0))
    v: NDArray[np.float64] = field(default_factory=lambda: np.zeros(0))
    step: StepResponse | None = None
    why: dict[str, str] = field(default_factory=dict)
    notes: tuple[str, ...] = ()

    @property
    def measured_mag_db(self) -> NDArray[np.float64]:
        with np.errstate(divide="ignore"):
            result: NDArray[np.float64] = 20.0 * np.log10(np.abs(self.measured))
        return result


def prediction_system(project: Project, where: str, stage_id: str | None,
                      engine: ChainEngine | None = None) -> tuple[StageSystem, bool]:
    """The undriven system whose input → output transfer is the prediction at ``where``.

    Returns the system and whether it is current-driven. ``in_chain``: the stage and everything
    after it (and the load) merged, read at the stage's output, as the analysis does.

    Raises
    ------
    CircuitError
        The place cannot be analysed (one sentence).
    """
    engine = engine or ChainEngine()
    if where == "chain":
        merged = merged_system(project)
        return merged.system, merged.current_drive
    stage = project.stage(stage_id or "")
    if stage is None:
        raise CircuitError(f'there is no stage "{stage_id}"')
    current = stage.drive == "current"
    if where == "isolated":
        return engine.system(stage, project), current
    if stage.bypass:
        raise CircuitError(f'stage "{stage.id}" is bypassed, so it is not in the chain')
    active = project.active_stages
    ids = [item.id for item in active]
    rest = active[ids.index(stage.id):]
    load_r, load_c = load_admittance(project)
    merged = merge_systems([item.id for item in rest], [engine.system(item, project) for item in rest],
                           current_drive=current, load_r_ohm=load_r, load_c_f=load_c)
    return dataclasses.replace(merged.system, output_index=merged.interface_indices[1]), current


def _relative(values: NDArray[np.complex128], nominal: NDArray[np.complex128]
              ) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    ratio = values / nominal
    with np.errstate(divide="ignore"):
        return 20.0 * np.log10(np.abs(ratio)), np.degrees(np.angle(ratio))


def compare_measurement(project: Project, measurement: Measurement,
                        engine: ChainEngine | None = None, *, envelope_why: str | None = None) -> MeasurementComparison:
    """Compare one measurement with the prediction at its place; never raises for a bad circuit.

    ``envelope_why``: leave out the Monte Carlo envelope (and ``inside_spread_pct``) for this
    reason (the program computes it with the spread, after the review state).
    """
    why: dict[str, str] = {}
    try:
        current = measurement_fingerprint(project, measurement.where, measurement.stage)
        stale = current != measurement.fingerprint
    except ValueError as error:
        stale, why["stale"] = True, str(error)
    if measurement.kind == "step":
        t_s, v = np.asarray(measurement.t_s, dtype=float), np.asarray(measurement.v, dtype=float)
        step, step_why = capture_step(t_s, v)
        if step_why:
            why["step"] = step_why
        return MeasurementComparison(measurement, stale, int(t_s.size), t_s=t_s, v=v, step=step, why=why)
    f_hz = np.asarray(measurement.f_hz, dtype=float)
    measured = np.asarray(measurement.re, dtype=float) + 1j * np.asarray(measurement.im, dtype=float)
    base: dict[str, Any] = {"measurement": measurement, "stale": stale, "points": int(f_hz.size), "f_hz": f_hz,
                            "measured": measured}
    try:
        system, current_drive = prediction_system(project, measurement.where, measurement.stage, engine)
        model = tolerance_model(system, current_drive=current_drive)
        s = 1j * TWO_PI * f_hz
        predicted = solve_batched(model.g0, model.c0, model.b.astype(complex), s)[:, model.output]
    except (CircuitError, np.linalg.LinAlgError) as error:
        reason = str(error) if isinstance(error, CircuitError) else "the prediction is singular at a measured frequency"
        for key in ("dev_db_max", "dev_deg_max", "inside_spread_pct"):
            why[key] = reason
        return MeasurementComparison(**base, why=why)
    if not np.all(np.isfinite(predicted)) or np.any(predicted == 0) or np.any(measured == 0):
        reason = "the prediction or the measurement is zero or not finite at a measured frequency"
        for key in ("dev_db_max", "dev_deg_max", "inside_spread_pct"):
            why[key] = reason
        return MeasurementComparison(**base, predicted=predicted, why=why)
    dev_db, dev_deg = _relative(measured, predicted)
    settings = project.settings
    envelope_db = envelope_deg = None
    notes: list[str] = []
    inside = None
    inside_pct: float | None = None
    if envelope_why is not None:
        why["inside_spread_pct"] = envelope_why
    elif model.refs:
        # The same cost bound as the spread's (a million samples asked took minutes and gigabytes
        # here): fewer samples with a note, none below the bound's minimum, saying why. Counted
        # with the place's loops, as the spread counts its own samples: the estimate leaves out
        # the per-sample work beside the solves, which dominates a small place (the hydrophone
        # bench place: 60,000 samples counted without loops took 12 s, not 8).
        samples = None
        try:
            count = bounded_samples(model, settings.mc_samples, f_hz.size, True, [])
        except ValueError as error:
            why["inside_spread_pct"] = str(error)
        else:
            if count < settings.mc_samples:
                notes.append(f"the spread envelope is from {count} of the {settings.mc_samples} samples asked "
                             "(settings.mc_samples): all of them would take past the Monte Carlo's bound of "
                             "about 8 s")
            multipliers = sample_multipliers(model.tol, count, settings.seed, settings.mc_distribution)
            try:
                samples = sampled_response(model, multipliers, f_hz)
            except np.linalg.LinAlgError:
                why["inside_spread_pct"] = "a Monte Carlo sample is singular at a measured frequency"
        if samples is not None:
            relative_db, relative_deg = _relative(samples, predicted[None, :])
            envelope_db = (relative_db.min(axis=0), relative_db.max(axis=0))
            envelope_deg = (relative_deg.min(axis=0), relative_deg.max(axis=0))
    else:
        why["inside_spread_pct"] = ("no part at this place has a tolerance, so the prediction has no spread for "
                                    "the measurement to lie inside")
    if envelope_db is not None and envelope_deg is not None:
        inside = ((dev_db >= envelope_db[0]) & (dev_db <= envelope_db[1])
                  & (dev_deg >= envelope_deg[0]) & (dev_deg <= envelope_deg[1]))
        inside_pct = 100.0 * float(np.mean(inside))
    return MeasurementComparison(
        **base, predicted=predicted, dev_db=dev_db, dev_deg=dev_deg, envelope_db=envelope_db,
        envelope_deg=envelope_deg, inside=inside,
        dev_db_max=float(np.max(np.abs(dev_db))), dev_deg_max=float(np.max(np.abs(dev_deg))),
        dev_db_rms=float(np.sqrt(np.mean(dev_db ** 2))), dev_deg_rms=float(np.sqrt(np.mean(dev_deg ** 2))),
        inside_spread_pct=inside_pct, why=why, notes=tuple(notes),
    )


def capture_step(t_s: NDArray[np.float64], v: NDArray[np.float64]) -> tuple[StepResponse | None, str | None]:
    """Step metrics of a capture (time zero at the input edge), or why not."""
    before = t_s < 0
    after = ~before
    if np.count_nonzero(after) < 3:
        return None, "the capture has fewer than three samples from time zero (the input edge) on"
    baseline = float(np.mean(v[before])) if np.any(before) else float(v[after][0])
    grid = t_s[after]
    y = v[after] - baseline
    tail = max(1, int(math.ceil(FINAL_FRACTION * grid.size)))
    final = float(np.mean(y[-tail:]))
    if final == 0.0:
        return None, "the capture ends where it started, so it has no step to measure"

    def response(t: NDArray[np.float64]) -> NDArray[np.float64]:
        result: NDArray[np.float64] = np.interp(t, grid, y)
        return result

    return step_metrics(grid, y, final, response), None


def _number(value: float | None) -> float | None:
    return None if value is None or not math.isfinite(value) else float(value)


def comparison_to_json(comparison: MeasurementComparison) -> dict[str, Any]:
    """One ``measurements[]`` entry of ``analyze --json`` (value or null with ``<key>_why``)."""
    measurement = comparison.measurement
    document: dict[str, Any] = {
        "id": measurement.id, "kind": measurement.kind, "file": measurement.file, "sha256": measurement.sha256,
        "where": measurement.where, "stage": measurement.stage, "stale": comparison.stale,
        "points": comparison.points, "by": measurement.by, "time": measurement.time,
    }
    if comparison.why.get("stale"):
        document["stale_why"] = comparison.why["stale"]
    if comparison.notes:
        document["notes"] = list(comparison.notes)
    response_keys = ("dev_db_max", "dev_deg_max", "dev_db_rms", "dev_deg_rms", "inside_spread_pct")
    if measurement.kind == "step":
        reason = "a step capture has no frequency response to compare"
        for key in response_keys:
            document[key] = None
            document[f"{key}_why"] = reason
        step = comparison.step
        if step is None:
            document["step"] = None
            document["step_why"] = comparison.why.get("step", "the capture has no step to measure")
        else:
            metrics: dict[str, Any] = {"final_v": _number(step.final)}
            for key in ("rise_s", "overshoot_pct", "settle_1pct_s", "settle_0p1pct_s"):
                metrics[key] = _number(getattr(step, key))
                if metrics[key] is None:
                    metrics[f"{key}_why"] = step.why.get(key, f"{key} could not be measured")
            document["step"] = metrics
        return document
    for key in response_keys:
        value = _number(getattr(comparison, key))
        document[key] = value
        if value is None:
            document[f"{key}_why"] = comparison.why.get(
                key, comparison.why.get("inside_spread_pct", "the deviation could not be computed"))
    return document
