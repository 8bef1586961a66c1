"""Headroom and slew of every op-amp output for the declared input amplitude.

The input is a sine of the declared peak amplitude (``project.input.amplitude``, volts for a
voltage drive, amperes for a current drive) at any frequency of the analysis band. At each
op-amp output the peak is ``max_f |V_out(f)/u|·amplitude`` and the slew rate it needs is
``max_f 2πf·|V_out(f)/u|·amplitude`` (the steepest point of a sine of peak V and frequency f
has slope 2πf·V). Both maxima are taken over the analysis grid (``sweep.frequency_grid``); a
peak between grid points is not refined.

Swing margin: the output is assumed biased at 0 V when its swing limits straddle 0 V (a split
supply), otherwise at the middle of the swing (a single-supply stage biased mid-rail); the
margin is the distance from the bias to the nearer limit minus the signal peak. Negative means
clipping. Slew margin is the ratio model slew rate / slew rate needed (below 1: slew-limited);
``slew_margin_pct`` says the same as a percentage, ``100·(slew rate − needed)/needed``: how much
faster the op-amp can slew than the signal asks (negative: slew-limited).

This is a small-signal estimate: it does not see offsets, bias errors or the converter's
common-mode range (DESIGN section 9).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from stagewise.engine.mna import CircuitError, StageSystem
from stagewise.engine.sweep import drive, frequency_grid, solve_batched
from stagewise.model.project import Project

__all__ = ["HeadroomResult", "headroom", "headroom_to_json", "ideal_output_index"]

TWO_PI = 2.0 * math.pi
IDEAL_WHY = "ideal op-amp: no swing or slew limits in its model"


@dataclass(frozen=True, slots=True)
class HeadroomResult:
    """Peak, swing margin and slew of one op-amp output; ``None`` values carry a ``*_why``."""

    ref: str
    peak_v: float | None
    at_hz: float | None
    bias_v: float | None
    swing_low_v: float | None
    swing_high_v: float | None
    swing_margin_v: float | None
    slew_needed_v_per_s: float | None
    slew_at_hz: float | None
    slew_v_per_s: float | None
    slew_margin: float | None
    peak_why: str | None
    swing_why: str | None
    slew_why: str | None


def ideal_output_index(system: StageSystem, ref: str) -> int | None:
    """The output node of an ideal op-amp, found from its output-current unknown ``i(ref)``.

    The nullor's current enters its output node's row with coefficient −1 (``mna``). In a merged
    chain the unknown reads ``stage:i(U1)`` for the op-amp ``stage:U1``.
    """
    names = {f"i({ref})"}
    if ":" in ref:
        prefix, local = ref.rsplit(":", 1)
        names.add(f"{prefix}:i({local})")
    for column, name in enumerate(system.unknowns):
        if name in names:
            rows = np.flatnonzero(system.g[:, column] == -1.0)
            node_rows = [int(row) for row in rows if system.unknowns[row].split(":")[-1].startswith("v(")]
            if len(node_rows) == 1:
                return node_rows[0]
    return None


def headroom(system: StageSystem, project: Project, *, current_drive: bool,
             f_hz: NDArray[np.float64] | None = None) -> tuple[HeadroomResult, ...]:
    """Peak amplitude, swing margin and slew at every op-amp output of a driven system.

    Parameters
    ----------
    system : StageSystem
        The merged chain (``chain.merged_system(project).system``) or a stage.
    project : Project
        ``input.amplitude`` (peak), the op-amp models (``swing_v``, ``slew_v_per_s``) and the
        analysis band (``settings``).
    current_drive : bool
        How the input is driven.
    f_hz : ndarray, optional
        Frequencies in hertz; by default the project's analysis grid.

    Returns
    -------
    tuple of HeadroomResult
        Finite op-amps first, then ideal ones; volts, V/s, hertz.
    """
    grid = frequency_grid(project.settings) if f_hz is None else np.asarray(f_hz, dtype=float)
    amplitude = None if project.input.amplitude is None else float(project.input.amplitude.si)
    outputs: list[tuple[str, int | None, str | None]] = [(o.ref, o.output, o.model) for o in system.opamps]
    outputs += [(ref, ideal_output_index(system, ref), None) for ref in system.ideal_opamps]
    if not outputs:
        return ()
    if amplitude is None:
        why = "the project's input amplitude is not given"
        return tuple(HeadroomResult(ref, None, None, None, None, None, None, None, None, None, None, why, why, why)
                     for ref, _, _ in outputs)
    driven = drive(system, current_drive)
    try:
        s_values: NDArray[np.complex128] = np.asarray(1j * TWO_PI * grid, dtype=complex)
        x = solve_batched(driven.g, driven.c, driven.b.astype(complex), s_values)
    except np.linalg.LinAlgError as error:
        raise CircuitError("the circuit cannot be solved for headroom: its matrix is singular") from error
    results: list[HeadroomResult] = []
    for ref, index, model_name in outputs:
        if index is None:
            why = "the ideal op-amp's output node could not be located in the system"
            results.append(HeadroomResult(ref, None, None, None, None, None, None, None, None, None, None,
                                          why, why, why))
            continue
        magnitude = np.abs(x[:, index]) * amplitude
        peak_at = int(np.argmax(magnitude))
        slope = TWO_PI * grid * magnitude
        slew_at = int(np.argmax(slope))
        peak, slew_needed = float(magnitude[peak_at]), float(slope[slew_at])
        model = None if model_name is None else project.opamp_models.get(model_name)
        bias = low = high = margin = slew = slew_margin = None
        swing_why = slew_why = IDEAL_WHY if model_name is None else None
        if model is not None and model.swing_v is not None:
            low, high = float(model.swing_v[0].si), float(model.swing_v[1].si)
            bias = 0.0 if low < 0.0 < high else 0.5 * (low + high)
            margin = min(high - bias, bias - low) - peak
        elif model_name is not None:
            swing_why = f"model {model_name!r} gives no swing_v"
        if model is not None and model.slew_v_per_s is not None:
            slew = float(model.slew_v_per_s.si)
            slew_margin = slew / slew_needed if slew_needed > 0 else math.inf
        elif model_name is not None:
            slew_why = f"model {model_name!r} gives no slew_v_per_s"
        results.append(HeadroomResult(
            ref=ref, peak_v=peak, at_hz=float(grid[peak_at]), bias_v=bias, swing_low_v=low, swing_high_v=high,
            swing_margin_v=margin, slew_needed_v_per_s=slew_needed, slew_at_hz=float(grid[slew_at]),
            slew_v_per_s=slew, slew_margin=slew_margin, peak_why=None, swing_why=swing_why, slew_why=slew_why,
        ))
    return tuple(results)


def headroom_to_json(results: tuple[HeadroomResult, ...] | list[HeadroomResult]) -> list[dict[str, Any]]:
    """The DESIGN section 6 ``headroom`` list: per op-amp ``ref``, ``peak_v``, ``at_hz``,
    ``swing_margin_v``, ``slew_needed_v_per_s``, ``slew_margin`` (model slew / needed),
    ``slew_margin_pct`` (100·(model slew − needed)/needed), plus
    ``bias_v``, ``swing_low_v``, ``swing_high_v`` and ``slew_at_hz``; a ``*_why`` beside every null."""
    document: list[dict[str, Any]] = []
    for result in results:
        entry: dict[str, Any] = {
            "ref": result.ref,
            "peak_v": result.peak_v,
            "at_hz": result.at_hz,
            "bias_v": result.bias_v,
            "swing_low_v": result.swing_low_v,
            "swing_high_v": result.swing_high_v,
            "swing_margin_v": result.swing_margin_v,
            "slew_needed_v_per_s": result.slew_needed_v_per_s,
            "slew_at_hz": result.slew_at_hz,
            "slew_margin": None if result.slew_margin is None or math.isinf(result.slew_margin)
            else result.slew_margin,
        }
        entry["slew_margin_pct"] = None if entry["slew_margin"] is None else 100.0 * (entry["slew_margin"] - 1.0)
        if result.peak_v is None:
            for key in ("peak_v", "at_hz", "slew_needed_v_per_s", "slew_at_hz"):
                entry[f"{key}_why"] = result.peak_why
        if result.swing_margin_v is None:
            for key in ("swing_margin_v", "bias_v", "swing_low_v", "swing_high_v"):
                entry[f"{key}_why"] = result.swing_why
        if entry["slew_margin"] is None:
            entry["slew_margin_why"] = (result.slew_why if result.slew_margin is None
                                        else "no slew is needed (the output does not move)")
            entry["slew_margin_pct_why"] = entry["slew_margin_why"]
        document.append(entry)
    return document
