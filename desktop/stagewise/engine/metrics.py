"""Metrics of a stage's response (DESIGN 3.5 and 6): gain, corners, peaking, phase, step.

Every value is taken from the exact response, never read off a plot: the reference gain is an
extra solve at ``ref_hz``; the −3 dB corners are bracketed on the log-frequency grid and refined
by k-section search on the exact response; the peak is refined the same way; phase is unwrapped
and anchored to the phase of the pole/zero model, so it is continuous in frequency and the same
at any single frequency as on the sweep; group delay is exact (−Re(H'(s)/H(s)) from a second
solve), not a finite difference.

Definitions:
- reference gain: |H| at ``settings.ref_hz``; when ``ref_hz`` is null, the band maximum.
- −3 dB corners: where the gain falls to half power (reference − 10·log10(2) ≈ −3.0103 dB), the
  first such point below (low corner) and above (high corner) the reference frequency.
- peaking: peak gain over the band minus the reference gain (never negative).
- attenuation at f: reference gain minus gain at f (positive when attenuated).

A value that cannot be computed is ``None`` with a sentence under ``"<key>_why"``. When the
pole/zero model fails its check against the exact solve (zeros ill-conditioned by a high
relative degree, see ``PoleZeroModel.fit_error``), the zeros and K are null with that reason,
the poles are still listed and the step response comes from the poles and their residues.

Current-driven stages (``unit`` Ω) have their gains in dBΩ (20·log10 of the transimpedance).

Public API
----------
``stage_metrics(analysis, settings) -> dict``
    The "M" fields of DESIGN section 6 for one analysis.
``metric_at(analysis, name, at_hz, settings=None) -> MetricValue``
    ``gain_db``, ``phase_deg``, ``attenuation_db`` or ``group_delay_s`` at any frequency.
``frequency_response(analysis) -> FrequencyResponse``
    Magnitude (dB), unwrapped phase (degrees) and group delay (s) on the analysis grid.
``frequency_response_at(analysis, f_hz) -> FrequencyResponse``
    The same at any frequencies, exact (for ``stagewise response --freqs``); the complex values
    themselves come from ``stage.response_at``.
``bandwidth(analysis, settings) -> Bandwidth``
``gain_db_at``, ``phase_deg_at``, ``attenuation_db_at``, ``group_delay_s_at``.

References
----------
A. V. Oppenheim and R. W. Schafer, *Discrete-Time Signal Processing*, 3rd ed., sec. 5.1 (group
delay as −dφ/dω). Half-power bandwidth: IEEE Std 100, *The Authoritative Dictionary of IEEE
Standards Terms*, 7th ed., "bandwidth".
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from stagewise.engine.poles import FIT_TOLERANCE, root_table
from stagewise.engine.stage import StageAnalysis, response_at
from stagewise.engine.timeresp import StepResponse, refine_crossing, step_response, step_response_of_pencil
from stagewise.model.project import Settings
from stagewise.model.values import format_value

__all__ = [
    "Bandwidth",
    "FrequencyResponse",
    "MetricValue",
    "attenuation_db_at",
    "bandwidth",
    "frequency_response",
    "frequency_response_at",
    "gain_db_at",
    "group_delay_s_at",
    "metric_at",
    "phase_deg_at",
    "put_with_why",
    "stage_metrics",
]

TWO_PI = 2.0 * math.pi
HALF_POWER_DB = 10.0 * math.log10(2.0)  # 3.0103 dB
POINT_METRICS = ("gain_db", "phase_deg", "attenuation_db", "group_delay_s")


@dataclass(frozen=True, slots=True)
class FrequencyResponse:
    """Response on the analysis grid: magnitude, unwrapped phase and group delay."""

    f_hz: NDArray[np.float64]
    mag_db: NDArray[np.float64]
    phase_deg: NDArray[np.float64]
    group_delay_s: NDArray[np.float64]


@dataclass(frozen=True, slots=True)
class MetricValue:
    """A metric's value, or ``None`` and the reason."""

    value: float | None
    why: str | None = None


@dataclass(frozen=True, slots=True)
class Bandwidth:
    """Reference gain, peak and −3 dB corners; each ``None`` value has its reason in ``why``."""

    ref_hz: float | None
    gain_db: float | None
    peak_hz: float | None
    peak_gain_db: float | None
    f_low_3db_hz: float | None
    f_high_3db_hz: float | None
    peaking_db: float | None
    why: dict[str, str]


def _db(values: NDArray[np.complex128]) -> NDArray[np.float64]:
    with np.errstate(divide="ignore"):
        return np.asarray(20.0 * np.log10(np.abs(values)), dtype=float)


def _require(analysis: StageAnalysis) -> None:
    if analysis.why is not None or analysis.response is None or analysis.model is None:
        raise ValueError(analysis.why or "the analysis has no response")


def _model_phase_rad(analysis: StageAnalysis, f_hz: NDArray[np.float64]) -> NDArray[np.float64]:
    """Phase of K·∏(jω − z)/∏(jω − p), each factor continuous in ω (the natural unwrapping).

    For a root with Re r ≤ 0 the factor's angle is atan2(ω − Im r, −Re r) ∈ (−π/2, π/2]; for a
    right-half-plane root it is π − atan2(ω − Im r, Re r), continuous through ω = Im r.
    """
    assert analysis.model is not None
    model = analysis.model
    omega = TWO_PI * np.asarray(f_hz, dtype=float)

    def factor_angles(roots: NDArray[np.complex128], angular: NDArray[np.float64]) -> NDArray[np.float64]:
        total = np.zeros(angular.shape)
        for root in roots:
            y = angular - root.imag
            if root.real <= 0:
                total += np.arctan2(y, -root.real)
            else:
                total += math.pi - np.arctan2(y, root.real)
        return total

    def phase(angular: NDArray[np.float64]) -> NDArray[np.float64]:
        base = 0.0 if model.gain_sign > 0 else math.pi
        return np.asarray(base + factor_angles(model.zeros_rad_s, angular)
                          - factor_angles(model.poles_rad_s, angular), dtype=float)

    # Each right-half-plane root counts π at DC; shift by whole turns so that the phase at the
    # start of the analysed band lies in (−180°, 180°], as an engineer reads a Bode plot.
    start = float(phase(np.array([TWO_PI * float(analysis.f_hz[0])]))[0])
    return phase(omega) - TWO_PI * round(start / TWO_PI)


def _anchored_phase_deg(analysis: StageAnalysis, f_hz: NDArray[np.float64],
                        values: NDArray[np.complex128]) -> NDArray[np.float64]:
    """The exact angle of ``values`` on the 2π branch nearest the pole/zero phase."""
    exact = np.angle(values)
    model_phase = _model_phase_rad(analysis, f_hz)
    turns = np.round((model_phase - exact) / TWO_PI)
    return np.asarray(np.degrees(exact + TWO_PI * turns), dtype=float)


def _group_delay_s(analysis: StageAnalysis, f_hz: NDArray[np.float64]) -> NDArray[np.float64]:
    """τ = −Re(H'(s)/H(s)) at s = jω, with H'(s) = −eᵀ(G+sC)⁻¹·C·(G+sC)⁻¹·b (two batched solves)."""
    assert analysis.driven is not None
    driven = analysis.driven
    s = 1j * TWO_PI * np.atleast_1d(np.asarray(f_hz, dtype=float))
    matrices = driven.g[None, :, :] + s[:, None, None] * driven.c[None, :, :]
    right = np.broadcast_to(driven.b.astype(complex)[None, :, None], (len(s), len(driven.b), 1))
    x = np.linalg.solve(matrices, right)
    dx = np.linalg.solve(matrices, driven.c[None, :, :] @ x)
    h = x[:, driven.output, 0]
    derivative = -dx[:, driven.output, 0]
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.asarray(-np.real(derivative / h), dtype=float)


def frequency_response(analysis: StageAnalysis) -> FrequencyResponse:
    """Magnitude in dB, unwrapped phase in degrees and group delay in seconds on ``analysis.f_hz``.

    Raises
    ------
    ValueError
        When the analysis failed (its ``why``).
    """
    _require(analysis)
    assert analysis.response is not None
    return FrequencyResponse(
        f_hz=analysis.f_hz,
        mag_db=_db(analysis.response),
        phase_deg=_anchored_phase_deg(analysis, analysis.f_hz, analysis.response),
        group_delay_s=_group_delay_s(analysis, analysis.f_hz),
    )


def frequency_response_at(analysis: StageAnalysis, f_hz: NDArray[np.float64]) -> FrequencyResponse:
    """The same quantities at any frequencies (hertz), from exact solves there (not interpolated).

    The phase is on the same unwrapping branch as :func:`frequency_response` (anchored to the
    pole/zero phase), so a value printed for one frequency agrees with the plotted sweep.

    Raises
    ------
    ValueError
        When the analysis failed (its ``why``).
    """
    _require(analysis)
    points = np.atleast_1d(np.asarray(f_hz, dtype=float))
    values = response_at(analysis, points)
    return FrequencyResponse(
        f_hz=points,
        mag_db=_db(values),
        phase_deg=_anchored_phase_deg(analysis, points, values),
        group_delay_s=_group_delay_s(analysis, points),
    )


def gain_db_at(analysis: StageAnalysis, at_hz: float) -> float:
    """20·log10|H| at ``at_hz`` from an exact solve (dB re 1 V/V, or dBΩ for a current drive)."""
    _require(analysis)
    return float(_db(response_at(analysis, at_hz))[0])


def phase_deg_at(analysis: StageAnalysis, at_hz: float) -> float:
    """Phase in degrees at ``at_hz``, exact, on the same unwrapping branch as the sweep."""
    _require(analysis)
    f = np.array([float(at_hz)])
    return float(_anchored_phase_deg(analysis, f, response_at(analysis, f))[0])


def group_delay_s_at(analysis: StageAnalysis, at_hz: float) -> float:
    """Group delay −dφ/dω in seconds at ``at_hz``, exact."""
    _require(analysis)
    return float(_group_delay_s(analysis, np.array([float(at_hz)]))[0])


def _reference(analysis: StageAnalysis, settings: Settings) -> tuple[float, float]:
    """(frequency, gain in dB) of the reference: ``ref_hz`` if set, else the band maximum."""
    if settings.ref_hz is not None:
        f_ref = settings.ref_hz.si
        return f_ref, gain_db_at(analysis, f_ref)
    peak_hz, peak_db = _peak(analysis)
    return peak_hz, peak_db


def attenuation_db_at(analysis: StageAnalysis, at_hz: float, settings: Settings) -> float:
    """Reference gain minus the gain at ``at_hz``, in dB (positive when attenuated)."""
    _, ref_db = _reference(analysis, settings)
    return ref_db - gain_db_at(analysis, at_hz)


def metric_at(analysis: StageAnalysis, name: str, at_hz: float, settings: Settings | None = None) -> MetricValue:
    """A point metric at an arbitrary frequency, from an exact solve there.

    Parameters
    ----------
    name : {"gain_db", "phase_deg", "attenuation_db", "group_delay_s"}
    at_hz : float
        Frequency in hertz.
    settings : Settings
        Needed for ``attenuation_db`` (its reference gain).

    Returns
    -------
    MetricValue
        ``value`` None with ``why`` when the analysis failed or the value is not finite.
    """
    if analysis.why is not None:
        return MetricValue(None, analysis.why)
    if name not in POINT_METRICS:
        return MetricValue(None, f'"{name}" is not a metric taken at a frequency; use one of {", ".join(POINT_METRICS)}')
    if not (at_hz > 0 and math.isfinite(at_hz)):
        return MetricValue(None, f"{at_hz} Hz is not a frequency above zero")
    if name == "gain_db":
        value = gain_db_at(analysis, at_hz)
    elif name == "phase_deg":
        value = phase_deg_at(analysis, at_hz)
    elif name == "group_delay_s":
        value = group_delay_s_at(analysis, at_hz)
    else:
        if settings is None:
            return MetricValue(None, "attenuation needs the project settings (its reference gain)")
        value = attenuation_db_at(analysis, at_hz, settings)
    if not math.isfinite(value):
        return MetricValue(None, f"the response is zero or infinite at {format_value(at_hz, 'Hz')}")
    return MetricValue(value)


# -- peak and corners ------------------------------------------------------------------------


def _gain_db_of_log_f(analysis: StageAnalysis) -> Any:
    def evaluate(log_f: NDArray[np.float64]) -> NDArray[np.float64]:
        return _db(response_at(analysis, 10.0 ** np.asarray(log_f)))
    return evaluate


def _peak(analysis: StageAnalysis) -> tuple[float, float]:
    """Frequency and gain (dB) of the band maximum, refined between the grid neighbours."""
    assert analysis.response is not None
    mag = _db(analysis.response)
    index = int(np.argmax(mag))
    f = analysis.f_hz
    best_f, best_db = float(f[index]), float(mag[index])
    if 0 < index < len(f) - 1:
        evaluate = _gain_db_of_log_f(analysis)
        low, high = math.log10(f[index - 1]), math.log10(f[index + 1])
        for _ in range(4):
            grid = np.linspace(low, high, 33)
            values = evaluate(grid)
            k = int(np.argmax(values))
            if values[k] > best_db:
                best_f, best_db = float(10.0 ** grid[k]), float(values[k])
            low, high = float(grid[max(k - 1, 0)]), float(grid[min(k + 1, len(grid) - 1)])
    return best_f, best_db


def _band_text(f_hz: NDArray[np.float64]) -> str:
    return f"{format_value(float(f_hz[0]), 'Hz')}–{format_value(float(f_hz[-1]), 'Hz')}"


def bandwidth(analysis: StageAnalysis, settings: Settings) -> Bandwidth:
    """Reference gain, peak, −3 dB (half-power) corners and peaking of an analysis."""
    why: dict[str, str] = {}
    keys = ("gain_db", "peak_gain_db", "f_low_3db_hz", "f_high_3db_hz", "peaking_db")
    if analysis.why is not None or analysis.response is None:
        reason = analysis.why or "the analysis has no response"
        return Bandwidth(None, None, None, None, None, None, None, dict.fromkeys(keys, reason))
    f = analysis.f_hz
    mag = _db(analysis.response)
    f_ref, ref_db = _reference(analysis, settings)
    peak_hz, peak_db = _peak(analysis)
    if ref_db > peak_db:
        peak_hz, peak_db = f_ref, ref_db
    if not math.isfinite(ref_db):
        reason = f"the response is zero at the reference frequency {format_value(f_ref, 'Hz')}"
        return Bandwidth(f_ref, None, peak_hz, peak_db, None, None, None,
                         {"gain_db": reason, "f_low_3db_hz": reason, "f_high_3db_hz": reason, "peaking_db": reason})
    level = ref_db - HALF_POWER_DB
    evaluate = _gain_db_of_log_f(analysis)
    band = _band_text(f)
    # High corner: the first grid point above the reference whose gain is below the level.
    above = np.nonzero((f > f_ref) & (mag < level))[0]
    f_high: float | None = None
    if len(above):
        index = int(above[0])
        start = f[index - 1] if index > 0 and f[index - 1] > f_ref else f_ref
        f_high = 10.0 ** refine_crossing(evaluate, math.log10(start), math.log10(f[index]), level)
    else:
        why["f_high_3db_hz"] = (f"the gain stays within 3 dB of its reference above {format_value(f_ref, 'Hz')}: "
                                f"no high-frequency corner inside {band}")
    below = np.nonzero((f < f_ref) & (mag < level))[0]
    f_low: float | None = None
    if len(below):
        index = int(below[-1])
        stop = f[index + 1] if index + 1 < len(f) and f[index + 1] < f_ref else f_ref
        # Search downward from the reference side: the bracket runs from the inside out.
        f_low = 10.0 ** refine_crossing(evaluate, math.log10(stop), math.log10(f[index]), level)
    else:
        why["f_low_3db_hz"] = (f"the gain stays within 3 dB of its reference below {format_value(f_ref, 'Hz')}: "
                               f"no low-frequency corner inside {band}")
    return Bandwidth(
        ref_hz=f_ref,
        gain_db=ref_db,
        peak_hz=peak_hz,
        peak_gain_db=peak_db,
        f_low_3db_hz=None if f_low is None else float(f_low),
        f_high_3db_hz=None if f_high is None else float(f_high),
        peaking_db=max(peak_db - ref_db, 0.0),
        why=why,
    )


# -- the "M" document -------------------------------------------------------------------------


def put_with_why(document: dict[str, Any], key: str, value: Any, why: str | None) -> None:
    """Set ``document[key]``; beside a ``None`` value, ``"<key>_why"`` says why (DESIGN section 6)."""
    document[key] = value
    if value is None:
        document[f"{key}_why"] = why or "not computed"


def stage_metrics(analysis: StageAnalysis, settings: Settings) -> dict[str, Any]:
    """The DESIGN section 6 "M" fields of one analysis (isolated stage, or any driven system).

    Returns
    -------
    dict
        ``gain_db`` (at ``ref_hz``, or the band maximum), ``ref_hz``, ``peak_gain_db``,
        ``peak_hz``, ``f_low_3db_hz``, ``f_high_3db_hz``, ``peaking_db``, ``unit``,
        ``gain_constant``, ``poles`` and ``zeros`` (lists of ``{"re", "im", "f_hz", "q"}``, re/im
        in rad/s), ``cancelled`` (``[{"pole": …, "zero": …}]``), ``step`` (``rise_s``,
        ``overshoot_pct``, ``settle_1pct_s``, ``settle_0p1pct_s``, ``final``, ``settle_basis``).
        Beside every ``None`` value, ``"<key>_why"`` holds the reason. JSON-ready (floats,
        strings, lists, dicts; no NaN or infinity).
    """
    document: dict[str, Any] = {"unit": analysis.unit}
    limits = bandwidth(analysis, settings)
    put_with_why(document, "gain_db", limits.gain_db, limits.why.get("gain_db"))
    document["ref_hz"] = limits.ref_hz
    put_with_why(document, "peak_gain_db", limits.peak_gain_db, limits.why.get("peak_gain_db"))
    document["peak_hz"] = limits.peak_hz
    for key in ("f_low_3db_hz", "f_high_3db_hz", "peaking_db"):
        put_with_why(document, key, getattr(limits, key), limits.why.get(key))
    if analysis.why is not None or analysis.model is None:
        for key in ("gain_constant", "poles", "zeros", "step"):
            put_with_why(document, key, None, analysis.why)
        document["cancelled"] = []
        return document
    model = analysis.model
    trusted = not (model.fit_error > FIT_TOLERANCE)  # NaN (not checked) counts as trusted
    if not trusted:
        reason = (f"the zeros are ill-conditioned here (the pole/zero model departs from the exact response by "
                  f"{model.fit_error:.2g}, relative degree {model.relative_degree}); poles and response are exact")
        document["poles"] = root_table(model.all_poles_rad_s)
        put_with_why(document, "zeros", None, reason)
        put_with_why(document, "gain_constant", None, reason)
        document["cancelled"] = []
        assert analysis.driven is not None
        driven = analysis.driven
        step = step_response_of_pencil(driven.g, driven.c, driven.b, driven.output, model)
        document["step"] = _step_document(step)
        return document
    if math.isfinite(model.gain) and model.gain != 0:
        document["gain_constant"] = model.gain
    else:
        put_with_why(document, "gain_constant", None,
                  f"K = ±10^{model.log_gain / math.log(10):.1f} lies outside the floating-point range "
                  "(the product of many poles); the response and the roots are unaffected")
    document["poles"] = root_table(model.poles_rad_s)
    document["zeros"] = root_table(model.zeros_rad_s)
    document["cancelled"] = [
        {"pole": root_table(np.array([pole]))[0], "zero": root_table(np.array([zero]))[0]}
        for pole, zero in model.cancelled
    ]
    document["step"] = _step_document(step_response(model))
    return document


def _step_document(step: StepResponse) -> dict[str, Any]:
    step_document: dict[str, Any] = {"settle_basis": step.settle_basis}
    for key in ("rise_s", "overshoot_pct", "settle_1pct_s", "settle_0p1pct_s", "final"):
        put_with_why(step_document, key, getattr(step, key), step.why.get(key))
    return step_document
