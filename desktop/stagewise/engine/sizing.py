"""Sizing: part values for a stage template from what the designer asks for.

The designer names a template and its targets (gain, f0 and Q, a corner, a transimpedance), or a
whole filter (Butterworth, Bessel or Chebyshev type I, its order and cutoff). Capacitors are
*chosen* from a preferred-value series (IEC 60063; capacitors come in coarse series, E12 by
default), resistors are *computed* from the exact design equations and then snapped to a finer
series (E96 by default). Every result shows the value the formula asked for, the preferred
value chosen, and for every target: what was asked, what the exact formula gives with the
unsnapped values, with the snapped values, and what the engine's own response of the sized stage
gives (:func:`confirm_with_engine`).

Rounding bound
--------------
Snapping one value to a series moves it by at most η = half the largest step between adjacent
values of the series, on a log scale (:func:`snap_error_bound`). The published series are
rounded, so their steps are uneven: the widest E96 step is 1.33 → 1.37, so η ≈ 1.48 % (not the
1.2 % of an even 10^(1/96) grid); E24 (1.3 → 1.5) gives 7.4 %, E12 (1.2 → 1.5) 11.8 %. Capacitors are series values already and are not moved. From the design equations:
a corner 1/(2πRC) or a gain ratio moves by at most one η; ω0 = 1/√(R_a·R_b·C_a·C_b) by at most
η; Q of a Sallen-Key or band-pass section by at most η, Q of a multiple-feedback low-pass by at
most 2η (three resistors enter its damping term); the multiple-feedback band-pass centre gain
by at most 2η. A computed inductor (series RLC) or capacitor (transimpedance Cf) is snapped to
the capacitor series and adds its own η (half of it where a square root takes it).
:meth:`SizedStage.bound` gives these bounds (as relative errors e^kη − 1).

Filter prototypes come from ``scipy.signal`` (``buttap``, ``besselap``, ``cheb1ap``), imported
lazily; poles are paired into second-order sections (conjugate pairs) and a first-order section
(the real pole of an odd order), each sized as its own stage.

References
----------
R. P. Sallen and E. L. Key, "A practical method of designing RC active filters", IRE Trans.
Circuit Theory, vol. 2, no. 1, pp. 74-85, 1955 (unity-gain low-pass and high-pass sections).
A. B. Williams and F. J. Taylor, *Electronic Filter Design Handbook*, 4th ed., McGraw-Hill, 2006,
ch. 2-3 (normalized prototypes, section Q values) and ch. 3 (multiple-feedback sections).
IEC 60063:2015, preferred number series for resistors and capacitors.
"""

from __future__ import annotations

import cmath
import copy
import math
from collections.abc import Mapping
from dataclasses import dataclass, replace
from typing import Final

import numpy as np

from stagewise.engine.mna import CircuitError, assemble
from stagewise.engine.sweep import drive, transfer
from stagewise.model.project import IDEAL_OPAMP, Project, Stage
from stagewise.model.values import Quantity, e_series, snap_to_series

__all__ = [
    "FILTER_KINDS",
    "FILTER_RESPONSES",
    "SIZING_TARGETS",
    "FilterDesign",
    "FilterSection",
    "SizedPart",
    "SizedStage",
    "SizingError",
    "TargetResult",
    "confirm_with_engine",
    "design_filter",
    "filter_sections",
    "size_template",
    "snap_error_bound",
]

TWO_PI: Final = 2.0 * math.pi

FILTER_RESPONSES: Final = ("butterworth", "bessel", "chebyshev")
FILTER_KINDS: Final = ("lowpass", "highpass")
FILTER_TOPOLOGIES: Final = ("sallen_key", "mfb")

# Template id -> the targets its sizing takes (see size_template). "gain" is V/V (the centre
# gain for the band-pass, the DC gain for the integrator); inverting stages give its magnitude.
SIZING_TARGETS: Final[dict[str, tuple[str, ...]]] = {
    "rc_lowpass": ("corner_hz",),
    "rc_highpass": ("corner_hz",),
    "inverting": ("gain",),
    "noninverting": ("gain",),
    "sallen_key_lowpass": ("f0_hz", "q"),
    "sallen_key_highpass": ("f0_hz", "q"),
    "mfb_lowpass": ("gain", "f0_hz", "q"),
    "mfb_bandpass": ("gain", "f0_hz", "q"),
    "transimpedance": ("transimpedance_ohm", "corner_hz"),
    "integrator": ("gain", "unity_gain_hz"),
    "series_rlc": ("f0_hz", "q"),
    "difference_amplifier": ("gain",),
    "instrumentation_amplifier": ("gain",),
}

# How far each target may move when values are snapped, as (steps of the resistor series' η,
# steps of the capacitor series' η); see the module text. Capacitors chosen from their series
# do not move; a computed capacitor (the transimpedance stage's Cf) does.
_BOUND_STEPS: Final[dict[str, dict[str, tuple[float, float]]]] = {
    "rc_lowpass": {"corner_hz": (1, 0)},
    "rc_highpass": {"corner_hz": (1, 0)},
    "inverting": {"gain": (1, 0)},
    "noninverting": {"gain": (1, 0)},
    "sallen_key_lowpass": {"f0_hz": (1, 0), "q": (1, 0)},
    "sallen_key_highpass": {"f0_hz": (1, 0), "q": (1, 0)},
    "mfb_lowpass": {"gain": (2, 0), "f0_hz": (1, 0), "q": (2, 0)},
    "mfb_bandpass": {"gain": (2, 0), "f0_hz": (1, 0), "q": (1, 0)},
    "transimpedance": {"transimpedance_ohm": (1, 0), "corner_hz": (1, 1)},
    "integrator": {"gain": (2, 0), "unity_gain_hz": (1, 0)},
    # The inductor is computed and snapped (to the capacitor series): ω0 ∝ 1/√L, Q ∝ √L/R.
    "series_rlc": {"f0_hz": (0, 0.5), "q": (1, 0.5)},
    "difference_amplifier": {"gain": (1, 0)},
    "instrumentation_amplifier": {"gain": (1, 0)},
}


class SizingError(ValueError):
    """Targets that cannot be met by the chosen template; the message says which and why."""


@dataclass(frozen=True, slots=True)
class SizedPart:
    """One part value: what the design equation asked for and the preferred value chosen.

    ``unit`` is ``"Ω"``, ``"F"`` or ``"H"``; ``exact_si`` and ``snapped_si`` are in that unit.
    For a value chosen from the series (most capacitors, reference resistors) both are the same.
    Inductors are snapped to the capacitor series (both come in coarse series).
    """

    ref: str
    unit: str
    exact_si: float
    snapped_si: float
    series: str

    @property
    def snap_error_pct(self) -> float:
        """(snapped − exact)/exact in percent."""
        return (self.snapped_si / self.exact_si - 1.0) * 100.0


@dataclass(frozen=True, slots=True)
class TargetResult:
    """One target: asked, and achieved by the formula and by the engine.

    ``quantity`` names the target with its unit: ``gain`` (V/V), ``f0_hz``, ``q``,
    ``corner_hz``, ``unity_gain_hz``, ``transimpedance_ohm``. ``engine`` is ``None`` until
    :func:`confirm_with_engine` runs, or when it could not be computed (``engine_why`` says why).
    """

    quantity: str
    asked: float
    exact_formula: float
    snapped_formula: float
    engine: float | None = None
    engine_why: str = "not yet checked against the engine"

    @property
    def error_pct(self) -> float:
        """Achieved with the snapped values (exact formula) against asked, in percent."""
        return (self.snapped_formula / self.asked - 1.0) * 100.0

    @property
    def engine_error_pct(self) -> float | None:
        """The engine's value against asked, in percent (``None`` without an engine value)."""
        return None if self.engine is None else (self.engine / self.asked - 1.0) * 100.0


@dataclass(frozen=True, slots=True)
class SizedStage:
    """Part values for one template, with the targets they achieve.

    ``engine_opamps`` says how op-amps were modelled when the engine confirmed the targets:
    ``""`` (not confirmed), ``"as modelled"`` or ``"ideal"``.
    """

    template_id: str
    parts: tuple[SizedPart, ...]
    targets: tuple[TargetResult, ...]
    resistor_series: str
    capacitor_series: str
    notes: tuple[str, ...] = ()
    engine_opamps: str = ""

    def values_si(self, snapped: bool = True) -> dict[str, float]:
        """Part values by ref (SI units): the preferred values, or the exact ones."""
        return {part.ref: part.snapped_si if snapped else part.exact_si for part in self.parts}

    def target(self, quantity: str) -> TargetResult:
        """The target named ``quantity``."""
        for result in self.targets:
            if result.quantity == quantity:
                return result
        raise KeyError(f'"{self.template_id}" has no target "{quantity}"')

    def bound(self, quantity: str) -> float:
        """Largest relative error of ``quantity`` that snapping can cause (see module text)."""
        resistor_steps, capacitor_steps = _BOUND_STEPS[self.template_id][quantity]
        return math.expm1(resistor_steps * snap_error_bound(self.resistor_series)
                          + capacitor_steps * snap_error_bound(self.capacitor_series))

    def poles_rad_s(self, snapped: bool = True) -> tuple[complex, ...]:
        """Poles of the section from its exact formulas (rad/s), with snapped or exact values.

        Second-order sections give the roots of s² + (ω0/Q)·s + ω0²; first-order ones −ω_c.
        """
        names = {result.quantity for result in self.targets}

        def pick(result: TargetResult) -> float:
            return result.snapped_formula if snapped else result.exact_formula

        if "q" in names:
            omega = TWO_PI * pick(self.target("f0_hz"))
            quality = pick(self.target("q"))
            root = cmath.sqrt((omega / quality) ** 2 - 4.0 * omega**2)
            return ((-omega / quality + root) / 2.0, (-omega / quality - root) / 2.0)
        if "corner_hz" in names:
            return (complex(-TWO_PI * pick(self.target("corner_hz"))),)
        raise ValueError(f'"{self.template_id}" is not a filter section; it has no poles to report')


def snap_error_bound(series: str) -> float:
    """η: the largest |ln(snapped/value)| that snapping to ``series`` can give.

    Half the largest step between adjacent preferred values on a log scale (the series' values
    are rounded, so steps differ slightly; the largest counts).

    Examples
    --------
    >>> round(snap_error_bound("E96"), 4)
    0.0148
    """
    values = list(e_series(series)) + [10.0 * e_series(series)[0]]
    return max(math.log(high / low) for low, high in zip(values, values[1:], strict=False)) / 2.0


def _at_least(value: float, series: str) -> float:
    """The smallest preferred value not below ``value`` (to a relative 1e-9)."""
    decade = math.floor(math.log10(value))
    for exponent in (decade - 1, decade, decade + 1):
        for mantissa in e_series(series):
            candidate = float(f"{mantissa * 10.0**exponent:.3e}")
            if candidate >= value * (1.0 - 1e-9):
                return candidate
    raise AssertionError("unreachable: the next decade always holds a larger value")


def _positive(name: str, value: float | None) -> float:
    if value is None:
        raise SizingError(f"{name} is needed")
    if not math.isfinite(value) or not value > 0:
        raise SizingError(f"{name} must be a positive number, not {value!r}")
    return float(value)


def _check_series(series: str) -> str:
    try:
        e_series(series)
    except ValueError as error:
        raise SizingError(str(error)) from error
    return series.strip().upper()


# -- design equations: each returns the achieved targets from part values -----------------------


def _formulas(template_id: str, v: Mapping[str, float]) -> dict[str, float]:
    """Exact formulas of each sizable template, ideal op-amps (sources in the templates' text)."""
    if template_id in ("rc_lowpass", "rc_highpass"):
        return {"corner_hz": 1.0 / (TWO_PI * v["R1"] * v["C1"])}
    if template_id == "inverting":
        return {"gain": -v["Rf"] / v["Rg"]}
    if template_id == "noninverting":
        return {"gain": 1.0 + v["Rf"] / v["Rg"]}
    if template_id == "sallen_key_lowpass":
        # H = 1/(s²R1R2C1C2 + sC2(R1+R2) + 1), C2 to the reference (Sallen & Key, 1955).
        tau = math.sqrt(v["R1"] * v["R2"] * v["C1"] * v["C2"])
        return {"f0_hz": 1.0 / (TWO_PI * tau), "q": tau / (v["C2"] * (v["R1"] + v["R2"]))}
    if template_id == "sallen_key_highpass":
        # H = s²R1R2C1C2/(s²R1R2C1C2 + sR1(C1+C2) + 1), R1 to the output.
        tau = math.sqrt(v["R1"] * v["R2"] * v["C1"] * v["C2"])
        return {"f0_hz": 1.0 / (TWO_PI * tau), "q": tau / (v["R1"] * (v["C1"] + v["C2"]))}
    if template_id == "mfb_lowpass":
        # H = −(R2/R1)/(s²R2R3C1C2 + sC2(R2 + R3 + R2R3/R1) + 1) (Williams & Taylor, ch. 3).
        tau = math.sqrt(v["R2"] * v["R3"] * v["C1"] * v["C2"])
        damping = v["C2"] * (v["R2"] + v["R3"] + v["R2"] * v["R3"] / v["R1"])
        return {"gain": -v["R2"] / v["R1"], "f0_hz": 1.0 / (TWO_PI * tau), "q": tau / damping}
    if template_id == "mfb_bandpass":
        # H = −(sC2R3Rp/R1)/(s²C1C2R3Rp + s(C1+C2)Rp + 1), Rp = R1∥R2; centre gain −C2R3/(R1(C1+C2)).
        parallel = v["R1"] * v["R2"] / (v["R1"] + v["R2"])
        tau = math.sqrt(v["C1"] * v["C2"] * v["R3"] * parallel)
        return {
            "gain": -v["C2"] * v["R3"] / (v["R1"] * (v["C1"] + v["C2"])),
            "f0_hz": 1.0 / (TWO_PI * tau),
            "q": tau / ((v["C1"] + v["C2"]) * parallel),
        }
    if template_id == "transimpedance":
        # Z = −Rf/(1 + sRfCf) with an ideal op-amp (the diode capacitance sees a virtual ground).
        return {"transimpedance_ohm": -v["Rf"], "corner_hz": 1.0 / (TWO_PI * v["Rf"] * v["Cf"])}
    if template_id == "integrator":
        # H = −(Rr/Rin)/(1 + sRrCf): unity gain where 1/(ωRinCf) = 1.
        return {"gain": -v["Rr"] / v["Rin"], "unity_gain_hz": 1.0 / (TWO_PI * v["Rin"] * v["Cf"])}
    if template_id == "series_rlc":
        # H = sRC/(s²LC + sRC + 1): ω0 = 1/√(LC), Q = √(L/C)/R.
        return {"f0_hz": 1.0 / (TWO_PI * math.sqrt(v["L1"] * v["C1"])), "q": math.sqrt(v["L1"] / v["C1"]) / v["R1"]}
    if template_id == "difference_amplifier":
        # + leg driven, − leg at the reference: v_out/v_in = R4/(R3 + R4)·(1 + R2/R1).
        return {"gain": v["R4"] / (v["R3"] + v["R4"]) * (1.0 + v["R2"] / v["R1"])}
    if template_id == "instrumentation_amplifier":
        # (1 + (R1a + R1b)/Rg)·(R3/R2), with the difference stage's ratios matched (a and b sides).
        return {"gain": (1.0 + (v["R1a"] + v["R1b"]) / v["Rg"]) * v["R3a"] / v["R2a"]}
    raise SizingError(f'template "{template_id}" has no sizing; sizable templates: {", ".join(SIZING_TARGETS)}')


# -- sizing ------------------------------------------------------------------------------------


def _target(targets: Mapping[str, float], key: str, default: float | None = None) -> float:
    value = targets.get(key, default)
    if value is not None and key in ("gain", "transimpedance_ohm"):
        # Inverting stages: the sign is the topology's, the designer gives the magnitude.
        value = abs(float(value))
    return _positive(key, value)


def size_template(
    template_id: str,
    targets: Mapping[str, float],
    resistor_series: str = "E96",
    capacitor_series: str = "E12",
    impedance_ohm: float = 10e3,
) -> SizedStage:
    """Size a template for the designer's targets.

    Parameters
    ----------
    template_id : str
        A key of :data:`SIZING_TARGETS` (the template file's stem).
    targets : mapping
        The targets the template takes (:data:`SIZING_TARGETS`): ``gain`` (V/V; for inverting
        stages the magnitude, the sign is the topology's), ``f0_hz`` (Hz), ``q``, ``corner_hz``
        (Hz), ``unity_gain_hz`` (Hz), ``transimpedance_ohm`` (Ω, magnitude). ``mfb_lowpass``
        takes ``gain`` 1 when it is not given.
    resistor_series, capacitor_series : str
        Preferred-value series (``E6`` ... ``E192``).
    impedance_ohm : float
        The resistance level to aim for (Ω); the reference capacitor is chosen so that the
        resistors come out near it.

    Returns
    -------
    SizedStage
        Values and targets by the exact formulas; the engine fields are filled by
        :func:`confirm_with_engine`.

    Raises
    ------
    SizingError
        A missing or non-positive target, an unknown template or series, or targets the
        topology cannot reach (for instance a band-pass centre gain of 2·Q² or more).
    """
    if template_id not in SIZING_TARGETS:
        raise SizingError(f'template "{template_id}" has no sizing; sizable templates: {", ".join(SIZING_TARGETS)}')
    unknown = sorted(set(targets) - set(SIZING_TARGETS[template_id]))
    if unknown:
        raise SizingError(f'"{template_id}" does not take {", ".join(unknown)}; it takes '
                          f'{", ".join(SIZING_TARGETS[template_id])}')
    r_series = _check_series(resistor_series)
    c_series = _check_series(capacitor_series)
    level = _positive("impedance_ohm", impedance_ohm)
    exact: dict[str, float] = {}
    chosen: set[str] = set()
    notes: list[str] = []

    def capacitor(ref: str, target_f: float) -> float:
        value = snap_to_series(target_f, c_series)
        exact[ref] = value
        chosen.add(ref)
        return value

    asked: dict[str, float]
    if template_id in ("rc_lowpass", "rc_highpass"):
        corner = _target(targets, "corner_hz")
        c1 = capacitor("C1", 1.0 / (TWO_PI * corner * level))
        exact["R1"] = 1.0 / (TWO_PI * corner * c1)
        asked = {"corner_hz": corner}
    elif template_id == "inverting":
        gain = _target(targets, "gain")
        exact["Rg"] = snap_to_series(level, r_series)
        exact["Rf"] = gain * exact["Rg"]
        asked = {"gain": -gain}
    elif template_id == "noninverting":
        gain = _target(targets, "gain")
        if not gain > 1.0:
            raise SizingError(f"a non-inverting gain must be above 1 (asked {gain:g}); for 1 use a voltage follower")
        exact["Rg"] = snap_to_series(level, r_series)
        exact["Rf"] = (gain - 1.0) * exact["Rg"]
        asked = {"gain": gain}
    elif template_id == "sallen_key_lowpass":
        f0, quality = _target(targets, "f0_hz"), _target(targets, "q")
        omega = TWO_PI * f0
        c2 = capacitor("C2", 1.0 / (omega * level))
        # R1 + R2 = 1/(ω0·Q·C2) and R1·R2 = 1/(ω0²·C1·C2): real roots need C1/C2 ≥ 4Q².
        c1 = exact["C1"] = _at_least(4.0 * quality**2 * c2, c_series)
        chosen.add("C1")
        total, product = 1.0 / (omega * quality * c2), 1.0 / (omega**2 * c1 * c2)
        spread = math.sqrt(max(total**2 - 4.0 * product, 0.0))
        exact["R1"], exact["R2"] = (total + spread) / 2.0, (total - spread) / 2.0
        asked = {"f0_hz": f0, "q": quality}
    elif template_id == "sallen_key_highpass":
        f0, quality = _target(targets, "f0_hz"), _target(targets, "q")
        omega = TWO_PI * f0
        c = capacitor("C1", 1.0 / (omega * level))
        exact["C2"] = c
        chosen.add("C2")
        # Equal capacitors: Q = ½·√(R2/R1) and ω0 = 1/(C·√(R1·R2)).
        exact["R1"] = 1.0 / (2.0 * quality * omega * c)
        exact["R2"] = 2.0 * quality / (omega * c)
        asked = {"f0_hz": f0, "q": quality}
    elif template_id == "mfb_lowpass":
        gain, f0, quality = _target(targets, "gain", 1.0), _target(targets, "f0_hz"), _target(targets, "q")
        omega = TWO_PI * f0
        c2 = capacitor("C2", 1.0 / (omega * level))
        # With a = R2 and b = R3·(1 + K): a + b = 1/(ω0·Q·C2), a·b = (1 + K)/(ω0²·C1·C2);
        # real roots need C1/C2 ≥ 4Q²(1 + K).
        c1 = exact["C1"] = _at_least(4.0 * quality**2 * (1.0 + gain) * c2, c_series)
        chosen.add("C1")
        total, product = 1.0 / (omega * quality * c2), (1.0 + gain) / (omega**2 * c1 * c2)
        spread = math.sqrt(max(total**2 - 4.0 * product, 0.0))
        exact["R2"] = (total + spread) / 2.0
        exact["R3"] = (total - spread) / 2.0 / (1.0 + gain)
        exact["R1"] = exact["R2"] / gain
        asked = {"gain": -gain, "f0_hz": f0, "q": quality}
    elif template_id == "mfb_bandpass":
        gain, f0, quality = _target(targets, "gain"), _target(targets, "f0_hz"), _target(targets, "q")
        if not gain < 2.0 * quality**2:
            raise SizingError(f"a multiple-feedback band-pass with Q {quality:g} reaches a centre gain below "
                              f"2·Q² = {2.0 * quality**2:g}, not {gain:g}")
        omega = TWO_PI * f0
        c = capacitor("C1", 1.0 / (omega * level))
        exact["C2"] = c
        chosen.add("C2")
        # Equal capacitors: R3 = 2Q/(ω0C), R1 = Q/(ω0·C·K), 1/R2 = ω0·C·(2Q − K/Q).
        exact["R3"] = 2.0 * quality / (omega * c)
        exact["R1"] = quality / (omega * c * gain)
        exact["R2"] = 1.0 / (omega * c * (2.0 * quality - gain / quality))
        asked = {"gain": -gain, "f0_hz": f0, "q": quality}
    elif template_id == "transimpedance":
        gain, corner = _target(targets, "transimpedance_ohm"), _target(targets, "corner_hz")
        exact["Rf"] = gain
        exact["Cf"] = 1.0 / (TWO_PI * corner * gain)
        notes.append("Cf sets the corner with an ideal op-amp; whether the loop is stable with the "
                     "sensor capacitance Cd depends on the op-amp model: confirm with the engine.")
        asked = {"transimpedance_ohm": -gain, "corner_hz": corner}
    elif template_id == "series_rlc":
        f0, quality = _target(targets, "f0_hz"), _target(targets, "q")
        omega = TWO_PI * f0
        # C from the series so that √(L/C) = impedance_ohm; L computed (and snapped to the
        # capacitor series, as inductors come in the same coarse series); R = √(L/C)/Q.
        c = capacitor("C1", 1.0 / (omega * level))
        exact["L1"] = 1.0 / (omega**2 * c)
        exact["R1"] = math.sqrt(exact["L1"] / c) / quality
        asked = {"f0_hz": f0, "q": quality}
    elif template_id == "difference_amplifier":
        gain = _target(targets, "gain")
        exact["R1"] = exact["R3"] = snap_to_series(level, r_series)
        chosen.update({"R1", "R3"})
        # R2 = R4 = G·R1: both snap to the same value, so the ratios stay matched.
        exact["R2"] = exact["R4"] = gain * exact["R1"]
        asked = {"gain": gain}
    elif template_id == "instrumentation_amplifier":
        gain = _target(targets, "gain")
        if not gain > 1.0:
            raise SizingError(f"a three-op-amp instrumentation amplifier here has a gain above 1 (asked {gain:g})")
        unit_r = snap_to_series(level, r_series)
        for ref in ("R1a", "R1b", "R2a", "R3a", "R2b", "R3b"):
            exact[ref] = unit_r
            chosen.add(ref)
        # Difference stage at unit gain; the input stage gives 1 + 2·R1/Rg = G.
        exact["Rg"] = 2.0 * unit_r / (gain - 1.0)
        asked = {"gain": gain}
    else:  # integrator
        gain, unity = _target(targets, "gain"), _target(targets, "unity_gain_hz")
        cf = capacitor("Cf", 1.0 / (TWO_PI * unity * level))
        exact["Rin"] = 1.0 / (TWO_PI * unity * cf)
        exact["Rr"] = gain * exact["Rin"]
        asked = {"gain": -gain, "unity_gain_hz": unity}

    parts: list[SizedPart] = []
    for ref, value in exact.items():
        # Template refs name their kind: C… capacitors, L… inductors, R… resistors.
        unit = {"C": "F", "L": "H"}.get(ref[0], "Ω")
        series = r_series if unit == "Ω" else c_series
        snapped = value if ref in chosen else snap_to_series(value, series)
        parts.append(SizedPart(ref=ref, unit=unit, exact_si=value, snapped_si=snapped, series=series))
    exact_values = {part.ref: part.exact_si for part in parts}
    snapped_values = {part.ref: part.snapped_si for part in parts}
    by_exact = _formulas(template_id, exact_values)
    by_snapped = _formulas(template_id, snapped_values)
    results = tuple(TargetResult(quantity=key, asked=value, exact_formula=by_exact[key],
                                 snapped_formula=by_snapped[key]) for key, value in asked.items())
    return SizedStage(template_id=template_id, parts=tuple(sorted(parts, key=lambda p: p.ref)), targets=results,
                      resistor_series=r_series, capacitor_series=c_series, notes=tuple(notes))


# -- confirmation by the engine ------------------------------------------------------------------

# Template id -> (standard form of its response, numerator power n): N(s) = s**n, and
# s**n / H(s) is a polynomial c0 + c1·s (+ c2·s²) fitted to the engine's response.
_FORMS: Final[dict[str, tuple[int, int]]] = {
    "rc_lowpass": (1, 0),
    "rc_highpass": (1, 1),
    "inverting": (0, 0),
    "noninverting": (0, 0),
    "sallen_key_lowpass": (2, 0),
    "sallen_key_highpass": (2, 2),
    "mfb_lowpass": (2, 0),
    "mfb_bandpass": (2, 1),
    "transimpedance": (1, 0),
    "integrator": (1, 0),
    "series_rlc": (2, 1),
    "difference_amplifier": (0, 0),
    "instrumentation_amplifier": (0, 0),
}


def _fit(response: np.ndarray, s: np.ndarray, degree: int, numerator_power: int) -> np.ndarray:
    """Real coefficients c of s**n/H(s) = Σ c_k s^k, least squares over the given points."""
    y = s**numerator_power / response
    basis = np.stack([s**k for k in range(degree + 1)], axis=1)
    a = np.concatenate([basis.real, basis.imag])
    b = np.concatenate([y.real, y.imag])
    scale = np.abs(a).max(axis=0)
    solution, *_ = np.linalg.lstsq(a / scale, b, rcond=None)
    return np.asarray(solution / scale, dtype=float)


def _measure(template_id: str, c: np.ndarray) -> dict[str, float]:
    """Targets read from the fitted coefficients of s**n/H(s) = c0 + c1·s + c2·s²."""
    degree, power = _FORMS[template_id]
    if degree == 0:
        return {"gain": 1.0 / c[0]}
    if degree == 1:
        corner = abs(c[0] / c[1]) / TWO_PI
        if template_id == "transimpedance":
            return {"transimpedance_ohm": 1.0 / c[0], "corner_hz": corner}
        if template_id == "integrator":
            return {"gain": 1.0 / c[0], "unity_gain_hz": 1.0 / (TWO_PI * abs(c[1]))}
        return {"corner_hz": corner}
    omega = math.sqrt(c[0] / c[2])
    measured = {"f0_hz": omega / TWO_PI, "q": math.sqrt(c[0] * c[2]) / abs(c[1])}
    # Low-pass: gain at DC = 1/c0; band-pass: gain at ω0 = 1/c1; high-pass: gain at ∞ = 1/c2.
    measured["gain"] = 1.0 / c[0] if power == 0 else 1.0 / c[1] if power == 1 else 1.0 / c[2]
    return measured


def confirm_with_engine(sized: SizedStage, stage: Stage, project: Project, ideal_opamps: bool = False) -> SizedStage:
    """Fill each target's ``engine`` value from the engine's response of the sized stage.

    The template's stage gets the snapped values, is assembled and driven as in its isolated
    response (``stagewise.engine.sweep``), and s**n/H(s) is fitted to its standard form at
    frequencies around the asked f0 or corner (× 1/4, 1/2, 1, 2, 4): exact for ideal op-amps;
    with finite op-amp models the fitted values include their effect, which is the point.

    Parameters
    ----------
    sized : SizedStage
        From :func:`size_template`.
    stage : Stage
        The template's stage (not changed).
    project : Project
        Supplies the op-amp models the stage uses.
    ideal_opamps : bool
        Replace every op-amp by the ideal nullor before solving (checks the formulas alone).
    """
    trial = copy.deepcopy(stage)
    for ref, value in sized.values_si().items():
        part = trial.part(ref)
        if part is None:
            raise SizingError(f'stage "{stage.id}" has no part "{ref}" to size')
        part.value = Quantity(value, value)
    if ideal_opamps:
        for part in trial.parts:
            if part.type == "opamp":
                part.model = IDEAL_OPAMP
    scale_hz = next((result.asked for result in sized.targets if result.quantity.endswith("_hz")), 1e3)
    f_hz = scale_hz * np.array([0.25, 0.5, 1.0, 2.0, 4.0])
    degree, power = _FORMS[sized.template_id]
    why = ""
    measured: dict[str, float] = {}
    try:
        system = drive(assemble(trial, project), current=trial.drive == "current")
        if degree == 0:
            response = transfer(system, np.array([0.0]))
            measured = {"gain": float(response[0].real)}
        else:
            response = transfer(system, f_hz)
            measured = _measure(sized.template_id, _fit(response, 1j * TWO_PI * f_hz, degree, power))
    except (CircuitError, np.linalg.LinAlgError) as error:
        why = f"the engine could not solve the sized stage: {error}"
    except (ZeroDivisionError, ValueError, FloatingPointError) as error:
        why = f"the response does not have the section's standard form: {error}"
    targets = []
    for result in sized.targets:
        found = measured.get(result.quantity)
        if found is None or not math.isfinite(found):
            targets.append(replace(result, engine=None, engine_why=why or "not measurable from the response"))
        else:
            targets.append(replace(result, engine=float(found), engine_why=""))
    return replace(sized, targets=tuple(targets), engine_opamps="ideal" if ideal_opamps else "as modelled")


# -- filters -------------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class FilterSection:
    """One section of a filter: order 1 (a real pole) or 2 (a conjugate pair, with its Q)."""

    order: int
    f0_hz: float
    q: float | None
    poles_rad_s: tuple[complex, ...]


@dataclass(frozen=True, slots=True)
class FilterDesign:
    """A filter split into sections, each sized as its own stage (``sized``, same order)."""

    response: str
    kind: str
    order: int
    cutoff_hz: float
    ripple_db: float | None
    topology: str
    sections: tuple[FilterSection, ...]
    sized: tuple[SizedStage, ...]
    notes: tuple[str, ...]

    def poles_rad_s(self, snapped: bool = True) -> tuple[complex, ...]:
        """Every pole of the sized sections from their exact formulas (rad/s)."""
        return tuple(pole for section in self.sized for pole in section.poles_rad_s(snapped))


def filter_sections(
    response: str,
    order: int,
    cutoff_hz: float,
    kind: str = "lowpass",
    ripple_db: float | None = None,
    bessel_norm: str = "phase",
) -> tuple[FilterSection, ...]:
    """Split a filter's poles into first- and second-order sections.

    The normalized prototype comes from ``scipy.signal`` (``buttap``, ``besselap`` with
    ``bessel_norm``, ``cheb1ap`` with ``ripple_db``), is scaled to ``cutoff_hz`` (low-pass:
    p·ωc; high-pass: ωc/p, the usual frequency transformation), and its conjugate poles are
    paired: ω0 = |p|, Q = |p|/(−2·Re p). Sections come lowest Q first, the real pole first of all.

    Raises
    ------
    SizingError
        Unknown response or kind, an order outside 1..10, or a Chebyshev filter without a
        positive ripple.
    """
    import scipy.signal  # lazily: 2 s to import, never on the start-up path

    if response not in FILTER_RESPONSES:
        raise SizingError(f'"{response}" is not a filter response; use one of {", ".join(FILTER_RESPONSES)}')
    if kind not in FILTER_KINDS:
        raise SizingError(f'"{kind}" is not a filter kind; use one of {", ".join(FILTER_KINDS)}')
    if isinstance(order, bool) or not isinstance(order, int) or not 1 <= order <= 10:
        raise SizingError(f"the filter order must be a whole number from 1 to 10, not {order!r}")
    cutoff = _positive("cutoff_hz", cutoff_hz)
    if response == "butterworth":
        _, poles, _ = scipy.signal.buttap(order)
    elif response == "bessel":
        if bessel_norm not in ("phase", "delay", "mag"):
            raise SizingError(f'bessel_norm must be "phase", "delay" or "mag", not "{bessel_norm}"')
        _, poles, _ = scipy.signal.besselap(order, norm=bessel_norm)
    else:
        ripple = _positive("ripple_db", ripple_db)
        _, poles, _ = scipy.signal.cheb1ap(order, ripple)
    omega_c = TWO_PI * cutoff
    scaled = [complex(p) * omega_c if kind == "lowpass" else omega_c / complex(p) for p in poles]
    sections: list[FilterSection] = []
    upper = sorted((p for p in scaled if p.imag > 1e-9 * abs(p)), key=lambda p: abs(p) / (-2.0 * p.real))
    real = [p for p in scaled if abs(p.imag) <= 1e-9 * abs(p)]
    for pole in real:
        sections.append(FilterSection(order=1, f0_hz=-pole.real / TWO_PI, q=None, poles_rad_s=(complex(pole.real),)))
    for pole in upper:
        sections.append(FilterSection(order=2, f0_hz=abs(pole) / TWO_PI, q=abs(pole) / (-2.0 * pole.real),
                                      poles_rad_s=(pole, pole.conjugate())))
    if sum(section.order for section in sections) != order:
        raise SizingError(f"the {response} prototype of order {order} did not pair into sections")
    return tuple(sections)


def design_filter(
    response: str,
    order: int,
    cutoff_hz: float,
    kind: str = "lowpass",
    ripple_db: float | None = None,
    topology: str = "sallen_key",
    resistor_series: str = "E96",
    capacitor_series: str = "E12",
    impedance_ohm: float = 10e3,
    bessel_norm: str = "phase",
) -> FilterDesign:
    """Size a whole filter as a cascade of unit-gain sections.

    Second-order sections use the unity-gain Sallen-Key templates (``topology="sallen_key"``)
    or the multiple-feedback low-pass (``"mfb"``, gain −1 per section, low-pass only);
    the real pole of an odd order becomes an RC section (``rc_lowpass`` / ``rc_highpass``).

    Notes
    -----
    The passive RC section is loaded by whatever follows it, which moves its pole; place it
    last in the chain (before a high-impedance converter driver) or buffer it, and read the
    chain view, which includes loading. An even-order Chebyshev cascade of unit-gain sections
    has unit gain at DC, so its ripple lies between 0 and +ripple_db instead of −ripple_db
    and 0.

    Raises
    ------
    SizingError
        As :func:`filter_sections` and :func:`size_template`; also a multiple-feedback
        high-pass, for which there is no template.
    """
    if topology not in FILTER_TOPOLOGIES:
        raise SizingError(f'"{topology}" is not a section topology; use one of {", ".join(FILTER_TOPOLOGIES)}')
    if topology == "mfb" and kind == "highpass":
        raise SizingError("there is no multiple-feedback high-pass template; use topology sallen_key")
    sections = filter_sections(response, order, cutoff_hz, kind, ripple_db, bessel_norm)
    sized: list[SizedStage] = []
    notes: list[str] = []
    for section in sections:
        if section.order == 1:
            template_id = "rc_lowpass" if kind == "lowpass" else "rc_highpass"
            sized.append(size_template(template_id, {"corner_hz": section.f0_hz}, resistor_series,
                                       capacitor_series, impedance_ohm))
            notes.append("The first-order RC section is loaded by the stage after it; place it last or buffer it.")
            continue
        assert section.q is not None
        second: dict[str, float] = {"f0_hz": section.f0_hz, "q": section.q}
        if topology == "mfb":
            template_id = "mfb_lowpass"
            second["gain"] = 1.0
        else:
            template_id = "sallen_key_lowpass" if kind == "lowpass" else "sallen_key_highpass"
        sized.append(size_template(template_id, second, resistor_series, capacitor_series, impedance_ohm))
    if topology == "mfb" and sum(1 for section in sections if section.order == 2) % 2 == 1:
        notes.append("Each multiple-feedback section inverts; with an odd number of them the filter inverts.")
    if response == "chebyshev" and order % 2 == 0:
        notes.append("Even-order Chebyshev from unit-gain sections: the ripple lies above 0 dB, not below.")
    return FilterDesign(response=response, kind=kind, order=order, cutoff_hz=float(cutoff_hz),
                        ripple_db=None if ripple_db is None else float(ripple_db), topology=topology,
                        sections=sections, sized=tuple(sized), notes=tuple(notes))
