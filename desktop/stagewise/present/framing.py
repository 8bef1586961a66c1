"""Plot framing shared by the program's views and the packet (no Qt: arrays in, ranges out).

Pole-zero plane on a signed logarithmic radius
----------------------------------------------
A stage's poles span many decades: a sensor's 0.1 Hz corner, the stage's kilohertz poles and an
op-amp model's far poles at hundreds of megahertz. On linear axes the far ones set the range and
every pole that matters sits in one dot at the origin. Here each root s keeps its direction
(so the angle still reads as damping: ζ = −cos of the angle from the negative real axis) and its
distance from the origin becomes ``log10(|s| / 2π / f_floor)``: decades above a floor frequency
one decade under the lowest non-zero root. Rings at whole decades are labelled in hertz. The view
is framed to the analysis band's top: a root above it is drawn on an edge ring just outside the
band's ring, in its own direction, and counted, so nothing is lost and nothing far sets the scale.
A root at s = 0 is drawn at the origin.

References
----------
Root locations and standard-form parameters of a pole pair, s² + (ω0/Q)s + ω0²: ω0 = |s|,
ζ = −Re(s)/|s|, Q = 1/(2ζ) (any control text, e.g. Ogata, *Modern Control Engineering*, ch. 5).
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

__all__ = ["PoleZeroFrame", "dominant_time_constant_s", "pole_zero_frame", "root_words", "step_span_s"]

TWO_PI = 2.0 * math.pi
# How far outside the band's ring the edge ring of off-scale roots sits (in decades).
EDGE_GAP_DECADES = 0.35


@dataclass(frozen=True, slots=True)
class PoleZeroFrame:
    """Where roots are drawn: ``map`` gives plot coordinates; ``limit`` the square half-width.

    ``f_floor_hz`` is the frequency at radius 0, ``f_top_hz`` the analysis band's top (its ring
    is at ``top_radius``); roots above it sit on ``edge_radius``. ``rings`` are (radius, hertz)
    of whole decades inside the frame.
    """

    f_floor_hz: float
    f_top_hz: float
    top_radius: float
    edge_radius: float
    limit: float
    rings: tuple[tuple[float, float], ...]

    def radius(self, f_hz: NDArray[np.float64]) -> NDArray[np.float64]:
        """Plot radius of a root of natural frequency ``f_hz`` (Hz), before the edge clamp."""
        f_hz = np.asarray(f_hz, dtype=float)
        with np.errstate(divide="ignore"):
            return np.where(f_hz > 0, np.log10(np.maximum(f_hz, 1e-300) / self.f_floor_hz), 0.0)

    def map(self, roots_rad_s: Iterable[complex]) -> tuple[NDArray[np.float64], NDArray[np.float64],
                                                          NDArray[np.bool_]]:
        """Plot coordinates (x, y) of roots in rad/s, and which ones lie above the band's top."""
        values = np.asarray(list(roots_rad_s), dtype=complex)
        if values.size == 0:
            empty = np.zeros(0)
            return empty, empty, np.zeros(0, dtype=bool)
        magnitude = np.abs(values)
        f_hz = magnitude / TWO_PI
        above = f_hz > self.f_top_hz * (1 + 1e-12)
        radius = np.maximum(self.radius(f_hz), 0.0)
        radius = np.where(above, self.edge_radius, radius)
        with np.errstate(invalid="ignore", divide="ignore"):
            direction = np.where(magnitude > 0, values / np.where(magnitude > 0, magnitude, 1.0), 0)
        return radius * direction.real, radius * direction.imag, above


def pole_zero_frame(poles_rad_s: Sequence[complex], zeros_rad_s: Sequence[complex],
                    f_top_hz: float) -> PoleZeroFrame:
    """The frame of a pole-zero plot: every root from the lowest to ``f_top_hz`` in view.

    Parameters
    ----------
    poles_rad_s, zeros_rad_s : sequence of complex
        Roots in rad/s (all traces of the plot together).
    f_top_hz : float
        The analysis band's top (``settings.f_max_hz``): roots above it go on the edge ring.
    """
    f_all = np.abs(np.asarray(list(poles_rad_s) + list(zeros_rad_s), dtype=complex)) / TWO_PI
    inside = f_all[(f_all > 0) & (f_all <= f_top_hz * (1 + 1e-12))]
    lowest = float(inside.min()) if inside.size else f_top_hz / 1e3
    f_floor = 10.0 ** (math.floor(math.log10(lowest)) - 1)
    top_radius = math.log10(f_top_hz / f_floor)
    edge_radius = top_radius + EDGE_GAP_DECADES
    limit = edge_radius * 1.08
    rings = tuple((float(decade), f_floor * 10.0 ** decade) for decade in range(1, int(math.floor(top_radius)) + 1))
    return PoleZeroFrame(f_floor, f_top_hz, top_radius, edge_radius, limit, rings)


def root_words(value: complex) -> dict[str, float | None]:
    """Natural frequency (Hz), and for a complex pair Q and ζ, of a root in rad/s."""
    magnitude = abs(value)
    words: dict[str, float | None] = {"f_hz": magnitude / TWO_PI, "q": None, "zeta": None}
    if magnitude > 0 and abs(value.imag) > 1e-12 * magnitude:
        zeta = -value.real / magnitude
        words["zeta"] = zeta
        words["q"] = 1.0 / (2.0 * zeta) if zeta != 0 else math.inf
    return words


# A step view spans this many of the slowest dominant time constant (e^-8 ≈ 0.03 % left).
STEP_SPAN_TIME_CONSTANTS = 8.0
# A pole is dominant in a step when its mode's amplitude is at least this share of the largest.
DOMINANT_SHARE = 1e-2


def dominant_time_constant_s(poles_rad_s: Sequence[complex], zeros_rad_s: Sequence[complex]) -> float | None:
    """The slowest time constant 1/|Re p| among the poles that shape a step response.

    The step response of H(s) = K·∏(s − z)/∏(s − p) is H(0) + Σ r_k/p_k·e^{p_k t}, r_k the residue
    of H at p_k (partial fractions; any control text, e.g. Ogata, ch. 5). A mode counts as
    dominant when |r_k/p_k| is at least 1 % of the largest mode's: a pole almost cancelled by a
    zero, or a far op-amp pole, barely moves the step and does not set its time scale. ``None``
    for an unstable or empty model (nothing settles).
    """
    poles = np.asarray(list(poles_rad_s), dtype=complex)
    zeros = np.asarray(list(zeros_rad_s), dtype=complex)
    if poles.size == 0 or np.any(poles.real >= 0):
        return None
    logs = np.empty(poles.size)
    for index, pole in enumerate(poles):
        scale = max(abs(pole), 1e-300)
        others = np.delete(poles, index)
        near = np.maximum(np.abs(pole - others), 1e-9 * scale)  # repeated poles: a large mode
        logs[index] = (np.sum(np.log(np.maximum(np.abs(pole - zeros), 1e-300))) - np.sum(np.log(near))
                       - math.log(scale))
    dominant = logs >= logs.max() + math.log(DOMINANT_SHARE)
    return float(1.0 / np.min(np.abs(poles.real[dominant])))


def step_span_s(poles_rad_s: Sequence[complex], zeros_rad_s: Sequence[complex]) -> float | None:
    """How long a step view shows: 8 slowest dominant time constants (see above), or None."""
    tau = dominant_time_constant_s(poles_rad_s, zeros_rad_s)
    return None if tau is None else STEP_SPAN_TIME_CONSTANTS * tau
