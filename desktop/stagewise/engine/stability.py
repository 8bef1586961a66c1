"""Stability as a verdict of its own, from the closed-loop poles.

A linear system is stable when every natural frequency (every finite eigenvalue of its pencil
``G + sC`` with the drive zeroed) lies strictly in the left half-plane. That is what this
module decides, for a stage isolated, a stage in chain, the chain seen from its input and the
whole chain. It looks at every pole of the minimal model and at the poles of the pole/zero
pairs that cancel where they lie in the right half-plane: such a pole is hidden from the
response but still grows inside the circuit. (A cancelled pair at s = 0 or on the jω axis is a
mode the drive cannot reach and the output does not see, e.g. the charge of a node behind a
series capacitor: it neither grows nor shows, and does not count.)

The verdict is taken from the closed-loop poles rather than from loop-gain margins because the
margins answer the question only for loops that are stable open-loop and cross 0 dB once (the
Bode-Nyquist shortcut); a loop that is unstable open-loop, or a positive-feedback loop, can
show a comfortable "phase margin" while its closed loop has a right-half-plane pole. Margins
are therefore reported only where the closed loop is stable (:mod:`stagewise.engine.loops`).

A pole counts as on the jω axis, or right of it, when its real part exceeds
``timeresp.STABILITY_RTOL`` times its magnitude (rounding of the pencil leaves about 1e-12);
a pole at s = 0 (an integrator, snapped to 0 by :mod:`stagewise.engine.poles`) is on the axis.

References
----------
E. J. Routh, *A Treatise on the Stability of a Given State of Motion*, 1877, and any control
text (e.g. K. Ogata, *Modern Control Engineering*, ch. 5): a linear time-invariant system is
asymptotically stable if and only if all its poles have negative real parts.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from stagewise.engine.timeresp import STABILITY_RTOL

__all__ = ["Stability", "stability_of_poles", "stability_to_json"]

TWO_PI = 2.0 * math.pi


@dataclass(frozen=True, slots=True)
class Stability:
    """The stability verdict of one system.

    Attributes
    ----------
    stable : bool
        True when every pole lies strictly in the left half-plane.
    offending_rad_s : tuple of complex
        Poles on the jω axis or right of it (s in rad/s; one of each conjugate pair).
    reason : str
        One sentence: what makes the system unstable, naming the first offending pole and its
        frequency; empty when stable.
    """

    stable: bool
    offending_rad_s: tuple[complex, ...] = ()
    reason: str = ""

    @property
    def verdict(self) -> str:
        """``"stable"`` or ``"unstable"`` (the words shown)."""
        return "stable" if self.stable else "unstable"


def _frequency_text(hertz: float) -> str:
    from stagewise.model.values import format_value  # noqa: PLC0415  (a pure helper of the model)

    return format_value(hertz, "Hz")


def describe_pole(pole: complex) -> str:
    """``a right-half-plane pole at 90.91 kHz (s = +5.711e+05 rad/s)`` and the like."""
    hertz = abs(pole) / TWO_PI
    if pole == 0:
        return "a pole at s = 0 (an integrator: the output drifts without bound)"
    limit = STABILITY_RTOL * abs(pole)
    if pole.real > limit:
        place = "a right-half-plane pole"
        s_text = (f"s = {pole.real:+.4g} rad/s" if pole.imag == 0
                  else f"s = {pole.real:+.4g} ± {abs(pole.imag):.4g}j rad/s")
        return f"{place} at {_frequency_text(hertz)} ({s_text})"
    return f"a pole pair on the jω axis at {_frequency_text(hertz)} (no damping: it oscillates)"


def stability_of_poles(poles_rad_s: NDArray[np.complex128] | list[complex] | None,
                       cancelled: tuple[tuple[complex, complex], ...] = ()) -> Stability:
    """The verdict from a system's poles (and the poles of its cancelled pole/zero pairs).

    Parameters
    ----------
    poles_rad_s : array of complex
        The poles of the minimal model, s in rad/s.
    cancelled : tuple of (pole, zero)
        Pairs removed from the model as cancelling; their poles count where they lie strictly
        in the right half-plane.

    Returns
    -------
    Stability
    """
    poles = [complex(p) for p in (() if poles_rad_s is None else poles_rad_s)]
    offending = [p for p in poles if p == 0 or p.real > -STABILITY_RTOL * abs(p)]
    # A hidden mode counts when it grows: a right-half-plane pole behind a cancelling zero. One
    # on the axis that the drive cannot reach and the output does not see (the charge of a node
    # behind a series capacitor, held at s = 0) neither grows nor shows, so it does not.
    offending += [complex(pole) for pole, _ in cancelled if complex(pole).real > STABILITY_RTOL * abs(pole)]
    # One of each conjugate pair; right-half-plane poles before those on the axis.
    offending = [p for p in offending if p.imag >= 0]
    if not offending:
        return Stability(True)
    offending.sort(key=lambda p: (-p.real, abs(p)))
    first = offending[0]
    more = len(offending) - 1
    tail = f", and {more} more pole{'s' if more > 1 else ''} on or right of the jω axis" if more else ""
    return Stability(False, tuple(offending), f"{describe_pole(first)}{tail}")


def stability_to_json(result: Stability) -> dict[str, Any]:
    """``{"verdict", "why", "poles": [{"re", "im", "f_hz"}]}`` for ``analyze --json``."""
    return {
        "verdict": result.verdict,
        "why": result.reason or None,
        "poles": [{"re": p.real, "im": p.imag, "f_hz": abs(p) / TWO_PI} for p in result.offending_rad_s],
    }
