"""Sizing: asked-for gain, f0, Q and filter responses become preferred values that meet them.

Achieved values are recomputed here from the part values with the published closed forms (not
with the sizing module's own formulas), and compared with what was asked. The rounding bound:
snapping one value to E96 moves it by at most η = ln(1.37/1.33)/2 ≈ 1.48 % (the widest step of
the published E96 series); a corner, a gain ratio, ω0 and a Sallen-Key Q move by at most η, a
multiple-feedback Q or band-pass centre gain by at most 2η (see stagewise.engine.sizing).
"""

from __future__ import annotations

import copy
import math

import numpy as np
import pytest
import scipy
import scipy.signal

from stagewise.engine.mna import assemble
from stagewise.engine.sizing import (
    SIZING_TARGETS,
    SizedStage,
    SizingError,
    confirm_with_engine,
    design_filter,
    filter_sections,
    size_template,
    snap_error_bound,
)
from stagewise.engine.sweep import drive, transfer
from stagewise.files.templates import load_template
from stagewise.model.project import IDEAL_OPAMP, Project
from stagewise.model.values import Quantity, e_series

TWO_PI = 2 * math.pi
ETA_E96 = math.log(1.37 / 1.33) / 2


def achieved(template_id: str, v: dict[str, float]) -> dict[str, float]:
    """Targets from part values by the published closed forms (ideal op-amps)."""
    if template_id in ("rc_lowpass", "rc_highpass"):
        # Source: first-order RC corner f_c = 1/(2πRC), any circuits text.
        return {"corner_hz": 1 / (TWO_PI * v["R1"] * v["C1"])}
    if template_id == "inverting":
        return {"gain": -v["Rf"] / v["Rg"]}  # Source: ideal op-amp inverting gain −Rf/Rg, any op-amp text
    if template_id == "noninverting":
        return {"gain": 1 + v["Rf"] / v["Rg"]}  # Source: ideal op-amp non-inverting gain 1 + Rf/Rg
    if template_id == "sallen_key_lowpass":
        # Source: Sallen & Key (1955); REFERENCES: ω0 = 1/√(R1R2C1C2), Q = √(R1R2C1C2)/(C2(R1+R2)).
        tau = math.sqrt(v["R1"] * v["R2"] * v["C1"] * v["C2"])
        return {"f0_hz": 1 / (TWO_PI * tau), "q": tau / (v["C2"] * (v["R1"] + v["R2"]))}
    if template_id == "sallen_key_highpass":
        # Source: Sallen & Key (1955), unity-gain high-pass: Q = √(R1R2C1C2)/(R1(C1+C2)).
        tau = math.sqrt(v["R1"] * v["R2"] * v["C1"] * v["C2"])
        return {"f0_hz": 1 / (TWO_PI * tau), "q": tau / (v["R1"] * (v["C1"] + v["C2"]))}
    if template_id == "mfb_lowpass":
        # Source: Williams & Taylor, Electronic Filter Design Handbook, multiple-feedback low-pass.
        tau = math.sqrt(v["R2"] * v["R3"] * v["C1"] * v["C2"])
        damping = v["C2"] * (v["R2"] + v["R3"] + v["R2"] * v["R3"] / v["R1"])
        return {"gain": -v["R2"] / v["R1"], "f0_hz": 1 / (TWO_PI * tau), "q": tau / damping}
    if template_id == "mfb_bandpass":
        # Source: Williams & Taylor, Electronic Filter Design Handbook, multiple-feedback band-pass.
        rp = v["R1"] * v["R2"] / (v["R1"] + v["R2"])
        tau = math.sqrt(v["C1"] * v["C2"] * v["R3"] * rp)
        return {"gain": -v["C2"] * v["R3"] / (v["R1"] * (v["C1"] + v["C2"])), "f0_hz": 1 / (TWO_PI * tau),
                "q": tau / ((v["C1"] + v["C2"]) * rp)}
    if template_id == "transimpedance":
        return {"transimpedance_ohm": -v["Rf"], "corner_hz": 1 / (TWO_PI * v["Rf"] * v["Cf"])}
    if template_id == "integrator":
        return {"gain": -v["Rr"] / v["Rin"], "unity_gain_hz": 1 / (TWO_PI * v["Rin"] * v["Cf"])}
    if template_id == "series_rlc":
        # Source: series resonance ω0 = 1/√(LC), Q = (1/R)·√(L/C), any circuits text.
        return {"f0_hz": 1 / (TWO_PI * math.sqrt(v["L1"] * v["C1"])), "q": math.sqrt(v["L1"] / v["C1"]) / v["R1"]}
    if template_id == "difference_amplifier":
        # Source: superposition with ideal op-amp rules; − leg at the reference: R4/(R3+R4)·(1 + R2/R1).
        return {"gain": v["R4"] / (v["R3"] + v["R4"]) * (1 + v["R2"] / v["R1"])}
    if template_id == "instrumentation_amplifier":
        # Source: three-op-amp instrumentation amplifier, (1 + (R1a + R1b)/Rg)·(R3/R2), any op-amp
        # text; both sides of the difference stage must match for this form.
        assert v["R3a"] / v["R2a"] == v["R3b"] / v["R2b"]
        return {"gain": (1 + (v["R1a"] + v["R1b"]) / v["Rg"]) * v["R3a"] / v["R2a"]}
    raise AssertionError(template_id)


# Targets of our own choosing for each sizable template.
CASES = {
    "rc_lowpass": {"corner_hz": 1234.0},
    "rc_highpass": {"corner_hz": 37.0},
    "inverting": {"gain": 7.3},
    "noninverting": {"gain": 12.5},
    "sallen_key_lowpass": {"f0_hz": 2500.0, "q": 0.9},
    "sallen_key_highpass": {"f0_hz": 300.0, "q": 1.3},
    "mfb_lowpass": {"gain": 2.0, "f0_hz": 4400.0, "q": 0.8},
    "mfb_bandpass": {"gain": 3.0, "f0_hz": 1700.0, "q": 6.0},
    "transimpedance": {"transimpedance_ohm": 330e3, "corner_hz": 25e3},
    "integrator": {"gain": 200.0, "unity_gain_hz": 80.0},
    "series_rlc": {"f0_hz": 7700.0, "q": 3.2},
    "difference_amplifier": {"gain": 2.7},
    "instrumentation_amplifier": {"gain": 48.0},
}
# Steps of η each target may move by (module text of stagewise.engine.sizing), E96 resistors.
STEPS = {("mfb_lowpass", "gain"): 2, ("mfb_lowpass", "q"): 2, ("mfb_bandpass", "gain"): 2, ("integrator", "gain"): 2}
SIGNED = {"inverting", "mfb_lowpass", "mfb_bandpass", "transimpedance", "integrator"}


def test_e96_rounding_bound() -> None:
    # Source: IEC 60063:2015, E96 series; widest step 1.33 -> 1.37 (value from memory).
    values = e_series("E96")
    assert len(values) == 96 and 1.33 in values and 1.37 in values
    assert snap_error_bound("E96") == pytest.approx(ETA_E96, rel=1e-12)
    assert ETA_E96 < 0.015  # "E96 -> within about 1.5 %" for one snapped value


def test_every_sizable_template_has_a_case() -> None:
    assert set(CASES) == set(SIZING_TARGETS)


@pytest.mark.parametrize("template_id", sorted(CASES))
def test_sized_template_meets_its_targets_within_the_rounding_bound(template_id: str) -> None:
    asked = CASES[template_id]
    sized = size_template(template_id, asked, resistor_series="E96", capacitor_series="E12")
    exact = achieved(template_id, sized.values_si(snapped=False))
    snapped = achieved(template_id, sized.values_si(snapped=True))
    eta_c = snap_error_bound("E12")
    for quantity, value in asked.items():
        want = -value if (template_id in SIGNED and quantity in ("gain", "transimpedance_ohm")) else value
        # Unsnapped values meet the target exactly (the design equations are exact).
        assert exact[quantity] == pytest.approx(want, rel=1e-12), quantity
        steps = STEPS.get((template_id, quantity), 1)
        # Computed reactive parts snap to the capacitor series: Cf in full, L under a square root.
        extra = {("transimpedance", "corner_hz"): eta_c, ("series_rlc", "f0_hz"): eta_c / 2,
                 ("series_rlc", "q"): eta_c / 2}.get((template_id, quantity), 0.0)
        if (template_id, quantity) == ("series_rlc", "f0_hz"):
            steps = 0
        bound = math.expm1(steps * ETA_E96 + extra)
        assert abs(snapped[quantity] / want - 1) <= bound * (1 + 1e-9), (quantity, snapped[quantity], want)
        # The result reports the same numbers.
        result = sized.target(quantity)
        assert result.asked == pytest.approx(want, rel=1e-12)
        assert result.snapped_formula == pytest.approx(snapped[quantity], rel=1e-12)
        assert abs(result.error_pct) <= 100 * sized.bound(quantity) * (1 + 1e-9)
        assert sized.bound(quantity) == pytest.approx(bound, rel=1e-12)
    for part in sized.parts:
        series = e_series(part.series)
        mantissa = part.snapped_si / 10 ** math.floor(math.log10(part.snapped_si) + 1e-12)
        assert min(abs(mantissa - m) for m in series) < 1e-9, part  # a preferred value (IEC 60063)


@pytest.mark.parametrize("template_id", sorted(CASES))
def test_engine_response_confirms_the_formulas(template_id: str) -> None:
    template = load_template(template_id)
    project = Project(title="confirm", opamp_models=dict(template.opamp_models))
    sized = size_template(template_id, CASES[template_id])
    confirmed = confirm_with_engine(sized, template.stage, project, ideal_opamps=True)
    assert confirmed.engine_opamps == "ideal"
    snapped = achieved(template_id, sized.values_si())
    for result in confirmed.targets:
        assert result.engine is not None, result.engine_why
        # Source: DESIGN 3.6 (engine vs closed form); the fit of the standard form is exact here.
        assert result.engine == pytest.approx(snapped[result.quantity], rel=1e-8), result.quantity
    # With the template's finite op-amp model the engine still gives a value for every target.
    modelled = confirm_with_engine(sized, template.stage, project)
    assert modelled.engine_opamps == "as modelled"
    assert all(result.engine is not None and math.isfinite(result.engine) for result in modelled.targets)


def test_finite_opamp_moves_a_high_q_band_pass_as_expected() -> None:
    # Common practice, no source: a multiple-feedback band-pass needs GBW well above Q²·f0·gain;
    # with a 10 MHz amplifier, f0 = 1.7 kHz and Q = 6 the engine's Q stays within a few percent.
    template = load_template("mfb_bandpass")
    project = Project(title="finite", opamp_models=dict(template.opamp_models))
    sized = confirm_with_engine(size_template("mfb_bandpass", CASES["mfb_bandpass"]), template.stage, project)
    result = sized.target("q")
    assert result.engine is not None
    assert result.engine == pytest.approx(result.snapped_formula, rel=0.05)


def _poles_from_values(sized: SizedStage, snapped: bool) -> list[complex]:
    """Poles of a section from its part values by the closed forms above."""
    values = achieved(sized.template_id, sized.values_si(snapped=snapped))
    if "q" not in values:
        return [complex(-TWO_PI * values["corner_hz"])]
    omega, q = TWO_PI * values["f0_hz"], values["q"]
    # Roots of s² + (ω0/Q)s + ω0² (standard second-order form, Ogata, Modern Control Engineering, ch. 5).
    return list(np.roots([1.0, omega / q, omega**2]).astype(complex))


def _match(ours: list[complex], theirs: np.ndarray) -> float:
    """Largest relative distance after pairing each pole with its nearest reference pole."""
    remaining = list(theirs)
    worst = 0.0
    for pole in sorted(ours, key=lambda p: (p.real, p.imag)):
        index = int(np.argmin([abs(pole - other) for other in remaining]))
        worst = max(worst, abs(pole - remaining[index]) / abs(remaining[index]))
        remaining.pop(index)
    assert not remaining
    return worst


REFERENCE_FILTERS = [
    ("butterworth", 2, None), ("butterworth", 4, None), ("butterworth", 5, None), ("butterworth", 7, None),
    ("bessel", 3, None), ("bessel", 4, None), ("bessel", 6, None),
    ("chebyshev", 3, 0.5), ("chebyshev", 4, 1.0), ("chebyshev", 5, 0.25),
]  # fmt: skip


def _reference_poles(response: str, order: int, ripple: float | None, omega_c: float, kind: str) -> np.ndarray:
    btype = "low" if kind == "lowpass" else "high"
    if response == "butterworth":
        _, p, _ = scipy.signal.butter(order, omega_c, btype=btype, analog=True, output="zpk")
    elif response == "bessel":
        _, p, _ = scipy.signal.bessel(order, omega_c, btype=btype, analog=True, output="zpk", norm="phase")
    else:
        _, p, _ = scipy.signal.cheby1(order, ripple, omega_c, btype=btype, analog=True, output="zpk")
    return np.asarray(p)


@pytest.mark.parametrize(("response", "order", "ripple"), REFERENCE_FILTERS)
@pytest.mark.parametrize(("kind", "topology"), [("lowpass", "sallen_key"), ("lowpass", "mfb"), ("highpass", "sallen_key")])
def test_filter_sections_match_scipy_poles(response: str, order: int, ripple: float | None, kind: str,
                                           topology: str) -> None:
    cutoff_hz = 3300.0
    design = design_filter(response, order, cutoff_hz, kind=kind, ripple_db=ripple, topology=topology)
    # Reference library: scipy 1.17.1, scipy.signal.butter / bessel(norm="phase") / cheby1 (analog=True).
    reference = _reference_poles(response, order, ripple, TWO_PI * cutoff_hz, kind)
    ideal = [pole for sized in design.sized for pole in _poles_from_values(sized, snapped=False)]
    assert len(ideal) == order
    assert _match(ideal, reference) < 1e-9
    # Snapped: each pole moves with its section's ω0 (≤ η) and Q (≤ 2η). For p = ω0·e^{jθ},
    # cos θ = −1/(2Q): |Δp|/|p| ≤ Δω0/ω0 + |Δθ|, |Δθ| ≤ (ΔQ/Q)/(2Q·sin θ).
    snapped = [pole for sized in design.sized for pole in _poles_from_values(sized, snapped=True)]
    q_min = min((s.q for s in design.sections if s.q is not None), default=1.0)
    sin_theta = math.sqrt(max(1 - 1 / (4 * q_min**2), 1e-12))
    bound = math.expm1(ETA_E96) + math.expm1(2 * ETA_E96) / (2 * q_min * sin_theta) * 1.1
    assert _match(snapped, reference) <= bound
    # The design's own pole list is the same as the closed forms give.
    assert _match(list(design.poles_rad_s(snapped=False)), reference) < 1e-9


def test_butterworth_section_q_values() -> None:
    # Source: Williams & Taylor, Electronic Filter Design Handbook: Butterworth section Q,
    # 4th order 0.5412 and 1.3066; 5th order real pole, 0.6180, 1.6180 (values from memory).
    fourth = filter_sections("butterworth", 4, 1000.0)
    assert [round(s.q or 0, 4) for s in fourth] == [0.5412, 1.3066]
    fifth = filter_sections("butterworth", 5, 1000.0)
    assert [s.order for s in fifth] == [1, 2, 2]
    assert [round(s.q or 0, 4) for s in fifth[1:]] == [0.618, 1.618]
    assert all(s.f0_hz == pytest.approx(1000.0, rel=1e-12) for s in fifth)


def test_sized_sections_cascade_to_the_scipy_response() -> None:
    # Reference library: scipy 1.17.1, scipy.signal.cheby1(analog=True, output="zpk") and freqs_zpk.
    cutoff_hz, ripple = 1800.0, 0.5
    design = design_filter("chebyshev", 5, cutoff_hz, ripple_db=ripple)
    f_hz = np.logspace(1, 5, 50)
    total = np.ones_like(f_hz, dtype=complex)
    for sized in design.sized:
        template = load_template(sized.template_id)
        stage = copy.deepcopy(template.stage)
        for ref, value in sized.values_si(snapped=False).items():
            stage.part(ref).value = Quantity(value, value)  # type: ignore[union-attr]
        for part in stage.parts:
            if part.type == "opamp":
                part.model = IDEAL_OPAMP
        total *= transfer(drive(assemble(stage, Project(title="cascade")), current=False), f_hz)
    z, p, k = scipy.signal.cheby1(5, ripple, TWO_PI * cutoff_hz, analog=True, output="zpk")
    _, expected = scipy.signal.freqs_zpk(z, p, k, worN=TWO_PI * f_hz)
    # Odd order: unit DC gain in both, so the isolated sections multiply to the reference exactly.
    np.testing.assert_allclose(total, expected, rtol=1e-9)


def test_sizing_refuses_what_cannot_be_built() -> None:
    # Source: Williams & Taylor: a multiple-feedback band-pass needs centre gain < 2Q².
    with pytest.raises(SizingError, match="2·Q²"):
        size_template("mfb_bandpass", {"gain": 10.0, "f0_hz": 1e3, "q": 2.0})
    with pytest.raises(SizingError, match="above 1"):
        size_template("noninverting", {"gain": 0.5})
    with pytest.raises(SizingError, match="is needed"):
        size_template("sallen_key_lowpass", {"f0_hz": 1e3})
    with pytest.raises(SizingError, match="does not take"):
        size_template("rc_lowpass", {"corner_hz": 1e3, "q": 0.7})
    with pytest.raises(SizingError, match="no sizing"):
        size_template("lc_ladder_5", {"f0_hz": 1e3})
    with pytest.raises(SizingError, match="ripple_db is needed"):
        design_filter("chebyshev", 4, 1e3)
    with pytest.raises(SizingError, match="no multiple-feedback high-pass"):
        design_filter("butterworth", 4, 1e3, kind="highpass", topology="mfb")
    with pytest.raises(SizingError, match="not a preferred-value series"):
        size_template("rc_lowpass", {"corner_hz": 1e3}, resistor_series="E7")
    with pytest.raises(SizingError, match="positive"):
        size_template("rc_lowpass", {"corner_hz": -5.0})

