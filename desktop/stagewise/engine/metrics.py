"""Metrics of a stage's response (DESIGN 3.5 and 6): gain, corners, peaking, phase, step.

Every value is taken from the exact response, never read off a plot: the reference gain is an
exact solve (at s = 0, at the mid-band frequency or at ``ref_hz``) or the model's |K|; the −3 dB
corners are bracketed on the log-frequency grid (extended by exact solves three decades beyond
the outermost roots) and refined by k-section search on the exact response; the peak is refined
the same way; phase is unwrapped and anchored to the phase of the pole/zero model, so it is
continuous in frequency and the same at any single frequency as on the sweep; group delay is
exact (−Re(H'(s)/H(s)) from a second solve), not a finite difference.

Definitions (the trade's, DESIGN 3.5):
- pass-band reference (:func:`passband_reference`): the DC gain of a low-pass shape, the
  high-frequency gain of a high-pass shape, the mid-band gain of a band-pass shape, decided from
  the pole/zero model; ``ref_hz`` only where it lies in a band-pass's flat mid-band or the shape
  has no pass-band gain of its own (an integrator). Every "M" document carries it as ``ref``
  (``kind``, ``f_hz``, ``gain_db``, ``shape``, ``note``).
- −3 dB corners: where the gain falls to half power (reference − 10·log10(2) ≈ −3.0103 dB), the
  first such point below (low corner) and above (high corner) the reference frequency.
- peaking: peak gain over the band minus the reference gain (never negative).
- attenuation at f: reference gain minus gain at f (positive when attenuated).
- ``gain_db`` of the "M" document: the gain at ``settings.ref_hz`` (a point value, DESIGN 6);
  without ``ref_hz``, the pass-band reference gain.

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
``passband_reference(analysis, settings) -> PassbandReference`` (``.as_dict()`` is ``ref``)
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

from stagewise.engine.poles import FIT_TOLERANCE, root_table, transfer_at
from stagewise.engine.stage import StageAnalysis, response_at
from stagewise.engine.sweep import SPARSE_MIN_UNKNOWNS, solve_batched
from stagewise.engine.timeresp import StepResponse, refine_crossing, step_response, step_response_of_pencil
from stagewise.model.project import Settings
from stagewise.model.values import format_value

__all__ = [
    "Bandwidth",
    "FrequencyResponse",
    "MetricValue",
    "PassbandReference",
    "attenuation_db_at",
    "bandwidth",
    "frequency_response",
    "frequency_response_at",
    "gain_db_at",
    "group_delay_s_at",
    "metric_at",
    "passband_reference",
    "phase_deg_at",
    "put_with_why",
    "reference_words",
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
    """Pass-band reference gain, peak and −3 dB corners; each ``None`` value has its reason in ``why``.

    ``ref_hz`` and ``gain_db`` are the reference's frequency (0 for DC, ``None`` for the
    high-frequency limit) and gain; ``reference`` says which reference it is.
    """

    ref_hz: float | None
    gain_db: float | None
    peak_hz: float | None
    peak_gain_db: float | None
    f_low_3db_hz: float | None
    f_high_3db_hz: float | None
    peaking_db: float | None
    why: dict[str, str]
    reference: PassbandReference | None = None


def _db(values: NDArray[np.complex128]) -> NDArray[np.float64]:
    with np.errstate(divide="ignore"):
        return np.asarray(20.0 * np.log10(np.abs(values)), dtype=float)


def _require(analysis: StageAnalysis) -> None:
    if analysis.why is not None or analysis.response is None or analysis.roots_model is None:
        raise ValueError(analysis.why or analysis.model_why or "the analysis has no response")


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
    """The exact angle of ``values`` on the 2π branch nearest the pole/zero phase.

    Without zeros (a system above the size limit) the branch is that of the exact phase
    unwrapped along the analysis grid, started in (−180°, 180°] (read between grid points
    in log frequency).
    """
    exact = np.angle(values)
    if analysis.model is None:
        swept_values = getattr(analysis, "response", None)  # the program passes a namespace without one
        grid = analysis.f_hz if swept_values is not None else np.asarray(f_hz, dtype=float)
        swept = np.unwrap(np.angle(swept_values if swept_values is not None else values))
        swept -= TWO_PI * np.round(swept[0] / TWO_PI)
        model_phase = np.interp(np.log10(np.asarray(f_hz, dtype=float)), np.log10(grid), swept)
    else:
        model_phase = _model_phase_rad(analysis, f_hz)
    turns = np.round((model_phase - exact) / TWO_PI)
    return np.asarray(np.degrees(exact + TWO_PI * turns), dtype=float)


def _group_delay_s(analysis: StageAnalysis, f_hz: NDArray[np.float64]) -> NDArray[np.float64]:
    """τ = −Re(H'(s)/H(s)) at s = jω, with H'(s) = −eᵀ(G+sC)⁻¹·C·(G+sC)⁻¹·b.

    Two batched solves with fixed right-hand sides: x = (G+sC)⁻¹·b and the adjoint
    w = (G+sC)⁻ᵀ·e, so that H'(s) = −wᵀ·C·x (sparse for long chains, see ``solve_batched``).
    """
    assert analysis.driven is not None
    driven = analysis.driven
    s = 1j * TWO_PI * np.atleast_1d(np.asarray(f_hz, dtype=float))
    x = solve_batched(driven.g, driven.c, driven.b.astype(complex), s)
    unit = np.zeros(len(driven.b), dtype=complex)
    unit[driven.output] = 1.0
    w = solve_batched(driven.g.T, driven.c.T, unit, s)
    h = x[:, driven.output]
    derivative = -np.einsum("kn,kn->k", w, x @ driven.c.T)
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


# -- the pass-band reference -------------------------------------------------------------------

REFERENCE_KINDS = ("dc", "hf", "midband", "ref_hz")
# A Bode asymptote is within 0.0004 dB of the exact gain two decades away from a first-order
# break; ``ref_hz`` counts as mid-band only that far inside the flat stretch of a band-pass, so
# that reading the reference there moves a corner by no more than 0.01 %.
MIDBAND_MARGIN = 100.0


@dataclass(frozen=True, slots=True)
class PassbandReference:
    """The pass-band gain that corners, peaking and attenuation are taken against.

    Attributes
    ----------
    kind : str or None
        ``"dc"`` (the DC gain of a low-pass shape), ``"hf"`` (the high-frequency gain of a
        high-pass shape), ``"midband"`` (the mid-band gain of a band-pass shape) or ``"ref_hz"``
        (the gain at ``settings.ref_hz``, where that lies in the pass band or the shape has no
        pass-band gain of its own); ``None`` when there is no reference (``why`` says why).
    f_hz : float or None
        Where the reference gain is read: 0 for ``dc``, ``None`` for ``hf`` (the limit s → ∞).
    gain_db : float or None
        The reference gain (dB, or dBΩ for a transimpedance).
    shape : str
        The response's shape as decided from its pole/zero model (``"low-pass"``,
        ``"high-pass"``, ``"band-pass"``, ``"flat at both ends"``, ``"rising"``,
        ``"integrating"``, ``"no pass band"``).
    note : str
        One sentence saying which reference this is and, where ``ref_hz`` was not used, why.
    why : str or None
        Why there is no reference (``kind`` None).
    """

    kind: str | None
    f_hz: float | None
    gain_db: float | None
    shape: str
    note: str
    why: str | None = None

    def as_dict(self) -> dict[str, Any]:
        """The ``ref`` record of ``analyze --json``: ``{kind, f_hz, gain_db, shape, note}``.

        Each null value has ``"<key>_why"`` beside it.
        """
        record: dict[str, Any] = {}
        put_with_why(record, "kind", self.kind, self.why)
        f_why = "the high-frequency limit (s → ∞): no finite frequency" if self.kind == "hf" else self.why
        put_with_why(record, "f_hz", self.f_hz, f_why)
        put_with_why(record, "gain_db", self.gain_db, self.why)
        record["shape"] = self.shape
        record["note"] = self.note
        return record

    def words(self) -> str:
        """The reference in a few words, for tables and read-outs (e.g. "re DC gain 0.00 dB")."""
        return reference_words(self.as_dict())


def reference_words(record: dict[str, Any], unit: str = "dB") -> str:
    """A ``ref`` record in a few words, the same in every view: "re DC gain 0.00 dB",
    "re high-frequency gain …", "re mid-band gain … at 1 kHz", "re gain … at the reference frequency 1 kHz"."""
    kind, gain_db, f_hz = record.get("kind"), record.get("gain_db"), record.get("f_hz")
    if record.get("unstable"):
        return "no pass-band reference: unstable"
    if kind is None or not isinstance(gain_db, int | float):
        return "no pass-band reference"
    gain = f"{round(float(gain_db), 2) + 0.0:.2f} {unit}"  # + 0.0: no "-0.00"
    if kind == "dc":
        return f"re DC gain {gain}"
    if kind == "hf":
        return f"re high-frequency gain {gain}"
    where = format_value(float(f_hz), "Hz") if isinstance(f_hz, int | float) else "an unknown frequency"
    if kind == "midband":
        return f"re mid-band gain {gain} at {where}"
    return f"re gain {gain} at the reference frequency {where}"


def _end_exponents(analysis: StageAnalysis) -> tuple[int, int, bool]:
    """(e0, e∞, from_model): |H| ~ ω^e0 as ω → 0 and ~ ω^e∞ as ω → ∞.

    From the pole/zero model (roots at s = 0 are exact, so e0 = zeros at 0 − poles at 0, and
    e∞ = zeros − poles) when the model reproduces the exact response; otherwise from the slope
    of exact solves far below and far above every pole (a deep chain whose zeros are
    ill-conditioned, or a system above the size limit whose zeros are not computed).
    """
    model = analysis.roots_model
    assert model is not None
    if not (model.fit_error > FIT_TOLERANCE):
        e0 = int(np.sum(model.zeros_rad_s == 0)) - int(np.sum(model.poles_rad_s == 0))
        return e0, -model.relative_degree, True
    roots = np.abs(model.poles_rad_s)
    roots = roots[roots > 0]
    low = float(np.min(roots)) if len(roots) else model.scale_rad_s
    high = float(np.max(roots)) if len(roots) else model.scale_rad_s
    omega = np.array([low * 1e-5, low * 1e-4, high * 1e4, high * 1e5])
    assert analysis.driven is not None
    driven = analysis.driven
    try:
        values = np.abs(transfer_at(driven.g, driven.c, driven.b, driven.output, 1j * omega))
    except np.linalg.LinAlgError:
        return 0, -model.relative_degree, False
    with np.errstate(divide="ignore"):
        logs = np.log10(values)
    e0 = int(round(float(logs[1] - logs[0]))) if np.all(np.isfinite(logs[:2])) else 0
    e_inf = int(round(float(logs[3] - logs[2]))) if np.all(np.isfinite(logs[2:])) else -model.relative_degree
    return e0, e_inf, False


def _dc_gain_db(analysis: StageAnalysis) -> float:
    """20·log10|H(0)| by an exact solve at s = 0 (the model where G alone is singular)."""
    model = analysis.roots_model
    assert analysis.driven is not None and model is not None
    driven = analysis.driven
    try:
        value = complex(transfer_at(driven.g, driven.c, driven.b, driven.output, 0j)[0])
    except np.linalg.LinAlgError:
        value = complex(model.evaluate(0j)[0])  # NaN without zeros: never a made-up gain
    return float(_db(np.array([value]))[0])


def _asymptote_log(model: Any, omega: float) -> float:
    """ln of the Bode straight-line magnitude at ω: |s − r| taken as max(ω, |r|)."""
    zeros = np.abs(model.zeros_rad_s)
    poles = np.abs(model.poles_rad_s)
    return float(model.log_gain + np.sum(np.log(np.maximum(omega, zeros)))
                 - np.sum(np.log(np.maximum(omega, poles))))


def _stretches(model: Any, e0: int) -> tuple[list[tuple[float, float]], list[float]]:
    """The flat stretches of the Bode asymptote and its peaks without a stretch, in rad/s.

    The asymptote's slope starts at e0 and changes by +1 at every non-zero zero and −1 at every
    non-zero pole (breaks at one frequency, a complex pair, act together). A flat stretch is
    ``(low, high)`` with ``low`` 0 for a flat low end and ``high`` inf for a flat high end; a
    peak without a stretch is a break where the slope jumps from rising to falling (the centre
    frequency of a narrow band-pass).
    """
    breaks = sorted([(abs(complex(z)), 1) for z in model.zeros_rad_s if z != 0]
                    + [(abs(complex(p)), -1) for p in model.poles_rad_s if p != 0])
    groups: list[tuple[float, int]] = []
    for omega, step in breaks:
        if groups and omega <= groups[-1][0] * (1.0 + 1e-9):
            groups[-1] = (groups[-1][0], groups[-1][1] + step)
        else:
            groups.append((omega, step))
    flats: list[tuple[float, float]] = []
    turns: list[float] = []
    if e0 == 0:
        flats.append((0.0, groups[0][0] if groups else math.inf))
    slope = e0
    for index, (omega, step) in enumerate(groups):
        before = slope
        slope += step
        following = groups[index + 1][0] if index + 1 < len(groups) else math.inf
        if slope == 0 and step == 0 and flats and flats[-1][1] == omega:
            flats[-1] = (flats[-1][0], following)  # a notch's zeros and poles at one frequency
        elif slope == 0:
            flats.append((omega, following))
        elif before > 0 and slope < 0:
            turns.append(omega)
    return flats, turns


def _stretch_level(model: Any, stretch: tuple[float, float]) -> float:
    """ln of the asymptote's gain on a flat stretch (the same anywhere on it)."""
    low, high = stretch
    omega = high / 10.0 if low == 0.0 else low * 10.0 if math.isinf(high) else math.sqrt(low * high)
    return _asymptote_log(model, omega)


def passband_reference(analysis: StageAnalysis, settings: Settings) -> PassbandReference:
    """The pass-band gain of a response, by the trade's definitions (DESIGN 3.5).

    The pass band is the flat stretch of the response's Bode asymptote (from its pole/zero
    model) with the highest gain (among stretches within 3 dB of the highest, the widest, so that
    near-cancelling pole/zero doublets cannot move it):

    - the stretch from DC (a low-pass, or the higher end of a band-stop or shelf): the DC gain;
    - the stretch to infinite frequency (a high-pass): the high-frequency gain |K|;
    - a stretch between two breaks (a band-pass): the mid-band gain, read at the stretch's
      geometric centre, or at ``ref_hz`` when that lies in the stretch at least two decades from
      both of its ends; a narrow band-pass, whose asymptote rises straight into falling, has its
      mid-band at that break (the centre frequency).

    So an op-amp stage whose gain falls to a tiny floor far above its band (the signal fed
    through its feedback network and output resistance) is still a low- or band-pass. A pole at
    s = 0 (an integrator), or a gain rising without bound above zeros at s = 0, gives no
    pass-band gain of its own: the gain at ``ref_hz`` is used when given, else there is no
    reference. ``ref_hz`` is never used for a low-pass or high-pass: their corners are 3 dB
    below the DC or high-frequency gain whatever ``ref_hz`` says; the note says so.

    Where the model's zeros are ill-conditioned (deep chains, ``fit_error``), the end slopes come
    from exact solves far outside the roots and a band-pass's mid-band gain is its largest.

    References
    ----------
    Half-power bandwidth: IEEE Std 100, 7th ed., "bandwidth". Mid-band gain as the flat gain
    between the low- and high-frequency corners: A. S. Sedra and K. C. Smith, *Microelectronic
    Circuits*, chapter on frequency response (the mid-band gain A_M).
    """
    model = analysis.roots_model
    if analysis.why is not None or model is None or analysis.response is None:
        reason = analysis.why or analysis.model_why or "the analysis has no response"
        return PassbandReference(None, None, None, "unknown", "no reference: the response is not known", reason)
    ref_hz = None if settings.ref_hz is None else float(settings.ref_hz.si)
    e0, e_inf, from_model = _end_exponents(analysis)
    unused = "" if ref_hz is None else f"; ref_hz ({format_value(ref_hz, 'Hz')}) is not used for this shape"

    def at_ref_hz(shape: str, because: str) -> PassbandReference:
        if ref_hz is None:
            why = f"a {shape} response has no pass-band gain of its own ({because}) and no reference frequency is set in the project settings"
            return PassbandReference(None, None, None, shape, f"no reference: {why}", why)
        return PassbandReference("ref_hz", ref_hz, gain_db_at(analysis, ref_hz), shape,
                                 f"the gain at the reference frequency: a {shape} response has no pass-band gain of its own "
                                 f"({because})")

    def at_dc(shape: str) -> PassbandReference:
        words = {"low-pass": "the DC gain of a low-pass shape",
                 "rising": "the DC gain: the gain rises without bound at high frequencies"}.get(
                     shape, "the DC gain, the higher flat end")
        return PassbandReference("dc", 0.0, _dc_gain_db(analysis), shape, words + unused)

    def at_hf(shape: str) -> PassbandReference:
        words = ("the high-frequency gain of a high-pass shape" if shape == "high-pass"
                 else "the high-frequency gain, the higher flat end")
        return PassbandReference("hf", None, _hf_gain_db(analysis, from_model), shape, words + unused)

    def midband(f_mid: float, gain_db: float, where: str) -> PassbandReference:
        note = f"the mid-band gain of a band-pass shape, at {where}"
        if ref_hz is not None:
            note += (f"; ref_hz ({format_value(ref_hz, 'Hz')}) is not used: it does not lie two decades or "
                     "more inside a flat mid-band")
        return PassbandReference("midband", f_mid, gain_db, "band-pass", note)

    if e0 < 0:
        return at_ref_hz("integrating", "a pole at s = 0: the gain grows without bound towards DC")
    if e0 > 0 and e_inf > 0:
        return at_ref_hz("rising", "zeros at s = 0 and a gain rising without bound")
    if not from_model:
        if e0 == 0:
            return at_dc("low-pass" if e_inf < 0 else "rising" if e_inf > 0 else "flat at both ends")
        if e_inf == 0:
            return at_hf("high-pass")
        f_peak, peak_db = _peak(analysis)
        return midband(f_peak, peak_db, "its largest gain in the band (this response's zeros are ill-conditioned, "
                                        "so its mid-band is not taken from the pole/zero model)")
    flats, turns = _stretches(model, e0)
    if not flats:
        omega = max(turns, key=lambda item: _asymptote_log(model, item)) if turns else model.scale_rad_s
        return midband(omega / TWO_PI, gain_db_at(analysis, omega / TWO_PI), "its centre frequency")
    # The pass band: among the stretches within 3 dB of the highest, the widest (in decades; an
    # end reaching DC or infinity counts as endless; on a tie the lower one). Near-cancelling
    # pole/zero doublets cut a flat stretch into pieces that differ by a hair; they do not move it.
    levels = [_stretch_level(model, stretch) for stretch in flats]
    top = max(levels)
    candidates = [stretch for stretch, level in zip(flats, levels, strict=True)
                  if level >= top - HALF_POWER_DB * math.log(10.0) / 20.0]

    def width(stretch: tuple[float, float]) -> float:
        low_end, high_end = stretch
        return math.inf if low_end == 0.0 or math.isinf(high_end) else math.log10(high_end / low_end)

    low, high = max(candidates, key=width)
    if low == 0.0:
        return at_dc("low-pass" if e_inf < 0 else "rising" if e_inf > 0 else "flat at both ends")
    if math.isinf(high):
        return at_hf("high-pass" if e0 > 0 else "flat at both ends")
    band = f"{format_value(low / TWO_PI, 'Hz')}–{format_value(high / TWO_PI, 'Hz')}"
    if ref_hz is not None and low * MIDBAND_MARGIN <= TWO_PI * ref_hz <= high / MIDBAND_MARGIN:
        return PassbandReference("ref_hz", ref_hz, gain_db_at(analysis, ref_hz), "band-pass",
                                 f"the mid-band gain read at the reference frequency, which lies in the flat mid-band ({band})")
    f_mid = math.sqrt(low * high) / TWO_PI
    return midband(f_mid, gain_db_at(analysis, f_mid), f"the centre of its flat mid-band ({band})")


def _hf_gain_db(analysis: StageAnalysis, from_model: bool) -> float:
    """20·log10|K|, the limit of |H| as s → ∞ for a relative degree of zero."""
    model = analysis.roots_model
    assert model is not None
    if from_model:
        return float(20.0 * model.log_gain / math.log(10.0))
    assert analysis.driven is not None
    driven = analysis.driven
    roots = np.abs(model.poles_rad_s)
    high = float(np.max(roots)) if len(roots) else model.scale_rad_s
    value = transfer_at(driven.g, driven.c, driven.b, driven.output, 1j * high * 1e6)
    return float(_db(value)[0])


def _reference(analysis: StageAnalysis, settings: Settings) -> tuple[float, float]:
    """(frequency, gain in dB) of the pass-band reference; raises ValueError when there is none."""
    reference = passband_reference(analysis, settings)
    if reference.gain_db is None:
        raise ValueError(reference.why or "no pass-band reference")
    return (reference.f_hz if reference.f_hz is not None else math.inf), reference.gain_db


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
    if analysis.roots_model is None:
        return MetricValue(None, analysis.model_why or "the analysis has no response")
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
        reference = passband_reference(analysis, settings)
        if reference.gain_db is None:
            return MetricValue(None, reference.why or "no pass-band reference")
        value = reference.gain_db - gain_db_at(analysis, at_hz)
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
    if 0 < index < len(f) - 1 and _one_point_at_a_time(analysis):
        # One sparse solve per point: Brent's bounded search instead of 132 points.
        from scipy.optimize import minimize_scalar  # noqa: PLC0415

        evaluate = _gain_db_of_log_f(analysis)
        found = minimize_scalar(lambda x: -float(evaluate(np.array([x]))[0]), method="bounded",
                                bounds=(math.log10(f[index - 1]), math.log10(f[index + 1])),
                                options={"xatol": 1e-10})
        if np.isfinite(found.fun) and -float(found.fun) > best_db:
            best_f, best_db = float(10.0 ** found.x), -float(found.fun)
    elif 0 < index < len(f) - 1:
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


def _one_point_at_a_time(analysis: StageAnalysis) -> bool:
    """Whether the system's exact solves cost a sparse LU per point (``sweep.solve_batched`` from
    ``SPARSE_MIN_UNKNOWNS``), or it is above the size limit: few sequential solves beat many
    batched ones there."""
    driven = analysis.driven
    return analysis.model is None or (driven is not None and driven.g.shape[0] >= SPARSE_MIN_UNKNOWNS)


def _crossing(analysis: StageAnalysis, evaluate: Any, low: float, high: float, level: float) -> float:
    """The first crossing of ``level`` in [low, high] (log10 f), exact.

    The k-section search of :func:`~stagewise.engine.timeresp.refine_crossing` (about 200 exact
    solves); where solves are sparse LUs one point at a time (:func:`_one_point_at_a_time`), one
    8-section round finds the first crossing's bracket and Brent's method
    (``scipy.optimize.brentq``) closes it to 1e-13 in log f in about ten solves.
    """
    if not _one_point_at_a_time(analysis):
        return refine_crossing(evaluate, low, high, level)
    from scipy.optimize import brentq  # noqa: PLC0415

    grid = np.linspace(low, high, 9)
    values = evaluate(grid) - level
    beyond = np.nonzero(np.sign(values) != np.sign(values[0]))[0]
    if len(beyond) == 0 or not np.all(np.isfinite(values)):
        return refine_crossing(evaluate, low, high, level)
    index = int(beyond[0])
    if values[index] == 0:
        return float(grid[index])
    ends = sorted((float(grid[index - 1]), float(grid[index])))
    return float(brentq(lambda x: float(evaluate(np.array([x]))[0]) - level, ends[0], ends[1], xtol=1e-13))


def _band_text(f_hz: NDArray[np.float64]) -> str:
    return f"{format_value(float(f_hz[0]), 'Hz')}–{format_value(float(f_hz[-1]), 'Hz')}"


def _search_points(analysis: StageAnalysis, *, below: bool = True,
                   above: bool = True) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """The analysis grid, extended by exact solves to three decades beyond the outermost roots
    (on the sides asked for).

    A corner is a property of the response, not of the plotted band: a low-pass whose corner
    lies below ``f_min_hz`` still has it there, found on the exact response.
    """
    model = analysis.roots_model
    assert analysis.response is not None and model is not None
    f = analysis.f_hz
    mag = _db(analysis.response)
    roots = np.abs(np.concatenate([model.poles_rad_s, model.zeros_rad_s])) / TWO_PI
    roots = roots[roots > 0]
    if not len(roots) or len(f) < 2:
        return f, mag
    low = max(float(np.min(roots)) * 1e-3, float(f[0]) * 1e-6)
    high = min(float(np.max(roots)) * 1e3, float(f[-1]) * 1e6)
    per_decade = max(20.0, (len(f) - 1) / max(math.log10(float(f[-1]) / float(f[0])), 1e-9))
    lower = np.zeros(0)
    upper = np.zeros(0)
    if below and low < f[0]:
        count = int(math.ceil(math.log10(float(f[0]) / low) * per_decade))
        lower = np.logspace(math.log10(low), math.log10(float(f[0])), count + 1)[:-1]
    if above and high > f[-1]:
        count = int(math.ceil(math.log10(high / float(f[-1])) * per_decade))
        upper = np.logspace(math.log10(float(f[-1])), math.log10(high), count + 1)[1:]
    if not len(lower) and not len(upper):
        return f, mag
    extra = np.concatenate([lower, upper])
    extra_mag = _db(response_at(analysis, extra))
    return (np.concatenate([lower, f, upper]),
            np.concatenate([extra_mag[:len(lower)], mag, extra_mag[len(lower):]]))


def bandwidth(analysis: StageAnalysis, settings: Settings) -> Bandwidth:
    """Pass-band reference, peak, −3 dB (half-power) corners and peaking of an analysis.

    The corners are where the gain falls 3 dB (10·log10 2) below the pass-band reference of
    :func:`passband_reference`: the first such point above the reference frequency (for a DC
    reference, the first above DC) and the first below it (for a high-frequency reference, the
    first below the high-frequency plateau). Peaking is the band's largest gain over the
    reference (never negative).
    """
    why: dict[str, str] = {}
    keys = ("gain_db", "peak_gain_db", "f_low_3db_hz", "f_high_3db_hz", "peaking_db")
    reference = passband_reference(analysis, settings)
    if analysis.why is not None or analysis.response is None or analysis.roots_model is None:
        reason = analysis.why or analysis.model_why or "the analysis has no response"
        return Bandwidth(None, None, None, None, None, None, None, dict.fromkeys(keys, reason), reference)
    peak_hz, peak_db = _peak(analysis)
    if reference.gain_db is None or not math.isfinite(reference.gain_db):
        reason = reference.why or "the pass-band gain is zero"
        return Bandwidth(reference.f_hz, None, peak_hz, peak_db, None, None, None,
                         {"gain_db": reason, "f_low_3db_hz": reason, "f_high_3db_hz": reason, "peaking_db": reason},
                         reference)
    ref_db = reference.gain_db
    f_ref = {"dc": 0.0, "hf": math.inf}.get(str(reference.kind), reference.f_hz or 0.0)
    if 0.0 < f_ref <= analysis.f_hz[-1] and f_ref >= analysis.f_hz[0] and ref_db > peak_db:
        peak_hz, peak_db = f_ref, ref_db
    level = ref_db - HALF_POWER_DB
    evaluate = _gain_db_of_log_f(analysis)
    f, mag = analysis.f_hz, _db(analysis.response)
    # The grid is extended (exact solves beyond it) on a side only where that can change a corner:
    # the first crossing above the reference depends on the points below the grid when the
    # reference lies below it (DC), and on those above only when the grid has no crossing; the
    # last crossing below the reference the other way round.
    high_on_grid = bool(np.any((f > f_ref) & (mag < level)))
    low_on_grid = bool(np.any((f < f_ref) & (mag < level)))
    below = (reference.kind != "hf" and f_ref < f[0]) or (reference.kind != "dc" and not low_on_grid)
    above = (reference.kind != "dc" and f_ref > f[-1]) or (reference.kind != "hf" and not high_on_grid)
    if below or above:
        f, mag = _search_points(analysis, below=below, above=above)
    words = reference.words()
    # High corner: the first point above the reference whose gain is below the level.
    f_high: float | None = None
    above = np.nonzero((f > f_ref) & (mag < level))[0]
    if reference.kind == "hf":
        why["f_high_3db_hz"] = "the pass band is the high-frequency plateau (a high-pass reference): no upper corner"
    elif len(above):
        index = int(above[0])
        start = float(f[index - 1]) if index > 0 and f[index - 1] > f_ref else f_ref
        if start > 0:
            f_high = 10.0 ** _crossing(analysis, evaluate, math.log10(start), math.log10(float(f[index])), level)
        else:
            why["f_high_3db_hz"] = (f"the gain is already 3 dB below its reference ({words}) at "
                                    f"{format_value(float(f[0]), 'Hz')}, the lowest frequency examined")
    else:
        why["f_high_3db_hz"] = (f"the gain stays within 3 dB of its reference ({words}) up to "
                                f"{format_value(float(f[-1]), 'Hz')}: no upper corner")
    f_low: float | None = None
    below = np.nonzero((f < f_ref) & (mag < level))[0]
    if reference.kind == "dc":
        why["f_low_3db_hz"] = "the pass band reaches down to DC (a DC reference): no lower corner"
    elif len(below):
        index = int(below[-1])
        stop = float(f[index + 1]) if index + 1 < len(f) and f[index + 1] < f_ref else f_ref
        if math.isfinite(stop):
            # Search downward from the reference side: the bracket runs from the inside out.
            f_low = 10.0 ** _crossing(analysis, evaluate, math.log10(stop), math.log10(float(f[index])), level)
        else:
            why["f_low_3db_hz"] = (f"the gain is still 3 dB below its reference ({words}) at "
                                   f"{format_value(float(f[-1]), 'Hz')}, the highest frequency examined")
    else:
        why["f_low_3db_hz"] = (f"the gain stays within 3 dB of its reference ({words}) down to "
                               f"{format_value(float(f[0]), 'Hz')}: no lower corner")
    return Bandwidth(
        ref_hz=reference.f_hz,
        gain_db=ref_db,
        peak_hz=peak_hz,
        peak_gain_db=peak_db,
        f_low_3db_hz=None if f_low is None else float(f_low),
        f_high_3db_hz=None if f_high is None else float(f_high),
        peaking_db=max(peak_db - ref_db, 0.0),
        why=why,
        reference=reference,
    )


# -- the "M" document -------------------------------------------------------------------------


def put_with_why(document: dict[str, Any], key: str, value: Any, why: str | None) -> None:
    """Set ``document[key]``; beside a ``None`` value, ``"<key>_why"`` says why (DESIGN section 6)."""
    document[key] = value
    if value is None:
        document[f"{key}_why"] = why or "not computed"


def stage_metrics(analysis: StageAnalysis, settings: Settings, *, shared_poles_why: str | None = None) -> dict[str, Any]:
    """The DESIGN section 6 "M" fields of one analysis (isolated stage, or any driven system).

    ``shared_poles_why``: for a system above the size limit whose poles are another place's
    (a stage seen from the chain's input has the chain's), the poles are not listed again but
    null with this sentence.

    Returns
    -------
    dict
        ``gain_db`` (at ``ref_hz``; without it the pass-band gain), ``ref_hz``, ``ref`` (the
        pass-band reference, :meth:`PassbandReference.as_dict`), ``peak_gain_db``, ``peak_hz``,
        ``f_low_3db_hz``, ``f_high_3db_hz``, ``peaking_db``, ``unit``, ``gain_constant``,
        ``poles`` and ``zeros`` (lists of ``{"re", "im", "f_hz", "q", "zeta", "half_plane"}``,
        re/im in rad/s, ``q_why``/``zeta_why`` beside nulls, a ``note`` on right-half-plane
        roots), ``cancelled`` (``[{"pole": …, "zero": …}]``), ``step`` (``rise_s``,
        ``overshoot_pct``, ``settle_1pct_s``, ``settle_0p1pct_s``, ``final``, ``settle_basis``).
        Beside every ``None`` value, ``"<key>_why"`` holds the reason. JSON-ready (floats,
        strings, lists, dicts; no NaN or infinity).
    """
    document: dict[str, Any] = {"unit": analysis.unit}
    limits = bandwidth(analysis, settings)
    if settings.ref_hz is not None and analysis.why is None:
        # gain_db is the gain at ref_hz (DESIGN 6); the pass-band reference is under "ref".
        point = metric_at(analysis, "gain_db", settings.ref_hz.si)
        put_with_why(document, "gain_db", point.value, point.why)
        document["ref_hz"] = settings.ref_hz.si
    else:
        put_with_why(document, "gain_db", limits.gain_db, limits.why.get("gain_db"))
        put_with_why(document, "ref_hz", limits.ref_hz,
                     "no reference frequency is set in the project settings and the pass-band reference is the high-frequency limit"
                     if limits.gain_db is not None else limits.why.get("gain_db"))
    reference = limits.reference or passband_reference(analysis, settings)
    document["ref"] = reference.as_dict()
    put_with_why(document, "peak_gain_db", limits.peak_gain_db, limits.why.get("peak_gain_db"))
    document["peak_hz"] = limits.peak_hz
    for key in ("f_low_3db_hz", "f_high_3db_hz", "peaking_db"):
        put_with_why(document, key, getattr(limits, key), limits.why.get(key))
    if analysis.why is None and analysis.model is None and analysis.model_why is not None:
        # Above the size limit: the poles when known, no zeros, gain constant or step response.
        if analysis.poles_model is not None and shared_poles_why is not None:
            put_with_why(document, "poles", None, shared_poles_why)
        elif analysis.poles_model is not None:
            document["poles"] = root_table(analysis.poles_model.poles_rad_s)
        else:
            put_with_why(document, "poles", None, analysis.model_why)
        for key in ("gain_constant", "zeros", "step"):
            put_with_why(document, key, None, analysis.model_why)
        document["cancelled"] = []
        return document
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
    document["zeros"] = root_table(model.zeros_rad_s, "zero")
    document["cancelled"] = [
        {"pole": root_table(np.array([pole]))[0], "zero": root_table(np.array([zero]), "zero")[0]}
        for pole, zero in model.cancelled
    ]
    document["step"] = _step_document(step_response(model))
    return document


def _step_document(step: StepResponse) -> dict[str, Any]:
    step_document: dict[str, Any] = {"settle_basis": step.settle_basis}
    for key in ("rise_s", "overshoot_pct", "settle_1pct_s", "settle_0p1pct_s", "final"):
        put_with_why(step_document, key, getattr(step, key), step.why.get(key))
    return step_document
