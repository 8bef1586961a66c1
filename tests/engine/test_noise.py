"""Noise by the adjoint method, against published laws (thermal noise, equipartition, op-amp noise)."""

from __future__ import annotations

import math
from typing import Any

import pytest

from stagewise.engine.mna import assemble
from stagewise.engine.noise import (
    BOLTZMANN_J_PER_K,
    analyze_noise,
    ideal_converter_snr_db,
    noise_to_json,
    snr_db,
)
from stagewise.files.codec import decode
from stagewise.model.project import Project


def make_project(parts: list[dict[str, Any]], *, drive: str = "voltage", settings: dict[str, Any] | None = None,
                 models: dict[str, Any] | None = None, converter: dict[str, Any] | None = None,
                 out: str = "out") -> Project:
    document = {
        "format": "stagewise-project", "version": 1, "title": "noise test",
        "settings": {"f_min_hz": 1, "f_max_hz": 1e6, "temperature_c": 26.85, **(settings or {})},
        "input": {"drive": drive},
        "converter": converter or {},
        "opamp_models": models or {},
        "stages": [{"id": "s", "name": "stage", "drive": drive, "ports": {"in": "in", "out": out},
                    "parts": parts}],
    }
    return decode(document)


def noise_of(project: Project, **options: Any):  # type: ignore[no-untyped-def]
    stage = project.stages[0]
    return analyze_noise(assemble(stage, project), project, current_drive=stage.drive == "current", **options)


@pytest.mark.parametrize(("r_ohm", "c_f"), [(33e3, 2.2e-9), (1.5e6, 6.8e-12)])
def test_total_noise_of_r_into_c_is_kt_over_c(r_ohm: float, c_f: float) -> None:
    fc = 1.0 / (2 * math.pi * r_ohm * c_f)
    low, high = 1e-3 * fc, 1e4 * fc
    project = make_project(
        [{"ref": "R1", "type": "R", "nodes": ["in", "out"], "value": r_ohm},
         {"ref": "C1", "type": "C", "nodes": ["out", "0"], "value": c_f}],
        settings={"noise_band_hz": [low, high]},
    )
    result = noise_of(project)
    kelvin = 26.85 + 273.15
    # Source: equipartition, total thermal noise of R with C to ground is sqrt(kT/C), independent of R.
    full = math.sqrt(BOLTZMANN_J_PER_K * kelvin / c_f)
    # Band-limited exactly: ∫ 4kTR / (1 + (f/fc)²) df = (kT/C)·(2/π)·(atan(f2/fc) − atan(f1/fc)).
    fraction = (2 / math.pi) * (math.atan(high / fc) - math.atan(low / fc))
    assert result.out_rms_v == pytest.approx(full * math.sqrt(fraction), rel=1e-7)
    # The band misses (2/π)(1e-3 + 1e-4) of the power: within 1e-3 of the unbounded sqrt(kT/C).
    assert result.out_rms_v == pytest.approx(full, rel=1e-3)
    assert [source.ref for source in result.sources] == ["R1"]
    assert result.sources[0].share_pct == pytest.approx(100.0)


def test_resistor_density_is_sqrt_4ktr() -> None:
    project = make_project([{"ref": "R1", "type": "R", "nodes": ["in", "0"], "value": "1k"}],
                           drive="current", settings={"noise_band_hz": [10, 20000], "ref_hz": 1000}, out="in")
    result = noise_of(project)
    kelvin = 300.0
    # Source: Johnson (1928), Nyquist (1928): open-circuit density sqrt(4kTR).
    expected = math.sqrt(4 * BOLTZMANN_J_PER_K * kelvin * 1e3)
    assert result.out_density_v_rthz_at_ref == pytest.approx(expected, rel=1e-12)
    # Source: REFERENCES.md table, 1 kΩ at 300 K ≈ 4.07 nV/√Hz (value from memory).
    assert result.out_density_v_rthz_at_ref == pytest.approx(4.07e-9, abs=0.01e-9)
    # White density over the band: rms = density·sqrt(f2 − f1).
    assert result.out_rms_v == pytest.approx(expected * math.sqrt(20000 - 10), rel=1e-9)
    # Current drive: input-referred in A/√Hz is the output density over the transimpedance R.
    assert result.in_unit == "A"
    assert result.in_density_at_ref == pytest.approx(expected / 1e3, rel=1e-9)


NOISY_MODEL = {"a0_db": 160, "gbw_hz": "10M", "en_v_rthz": "7n", "en_corner_hz": 100,
               "in_a_rthz": "2p", "in_corner_hz": 50}


def non_inverting(model: dict[str, Any], rf: float, rg: float, **settings: Any) -> Project:
    return make_project(
        [{"ref": "U1", "type": "opamp", "nodes": ["in", "n", "out"], "model": "m"},
         {"ref": "RF", "type": "R", "nodes": ["out", "n"], "value": rf},
         {"ref": "RG", "type": "R", "nodes": ["n", "0"], "value": rg}],
        models={"m": model}, settings=settings,
    )


def test_non_inverting_en_and_in_at_low_frequency() -> None:
    rf, rg = 39e3, 4.3e3
    project = non_inverting(NOISY_MODEL, rf, rg, noise_band_hz=[1, 100], ref_hz=10)
    result = noise_of(project)
    by_name = {source.name: source for source in result.sources}
    noise_gain = 1 + rf / rg
    # Common practice, no source: en appears at the output times the noise gain (1 + Rf/Rg), with
    # the 1/f law en²·(1 + f_corner/f); A0 = 1e8 leaves a relative error below 1e-7.
    en_at_10 = 7e-9 * math.sqrt(1 + 100 / 10)
    assert by_name["U1 en"].out_density_v_rthz_at_ref == pytest.approx(en_at_10 * noise_gain, rel=1e-6)
    # Common practice, no source: current noise at the inverting input flows through Rf.
    in_at_10 = 2e-12 * math.sqrt(1 + 50 / 10)
    assert by_name["U1 in-"].out_density_v_rthz_at_ref == pytest.approx(in_at_10 * rf, rel=1e-6)
    # The non-inverting input is the shorted drive: its current noise does not reach the output.
    assert by_name["U1 in+"].out_density_v_rthz_at_ref == pytest.approx(0.0, abs=1e-15)
    # Source: Johnson/Nyquist: Rg's thermal noise reaches the output times Rf/Rg.
    four_kt = 4 * BOLTZMANN_J_PER_K * 300.0
    assert by_name["RG thermal"].out_density_v_rthz_at_ref == pytest.approx(
        math.sqrt(four_kt * rg) * rf / rg, rel=1e-6)
    assert by_name["RF thermal"].out_density_v_rthz_at_ref == pytest.approx(math.sqrt(four_kt * rf), rel=1e-6)
    # en dominates here, so it ranks first; shares add to 100 %.
    assert result.sources[0].name == "U1 en"
    assert sum(source.share_pct for source in result.sources) == pytest.approx(100.0)
    # Input-referred: divide by the gain (1 + Rf/Rg) at ref.
    assert result.in_density_at_ref == pytest.approx(result.out_density_v_rthz_at_ref / noise_gain, rel=1e-6)
    # The en 1/f law integrated exactly over 1..100 Hz: en²·(Δf + fc·ln(f2/f1)).
    expected_en_rms = 7e-9 * noise_gain * math.sqrt(99 + 100 * math.log(100))
    assert by_name["U1 en"].out_rms_v == pytest.approx(expected_en_rms, rel=1e-5)


def test_ideal_opamp_is_noiseless_and_says_so() -> None:
    project = make_project(
        [{"ref": "U1", "type": "opamp", "nodes": ["in", "out", "out"], "model": "ideal"},
         {"ref": "R1", "type": "R", "nodes": ["in", "0"], "value": "10k"}],
        settings={"noise_band_hz": [10, 1000]},
    )
    result = noise_of(project)
    assert result.out_rms_v == 0.0  # R1 is shorted by the zeroed voltage drive; the buffer is noiseless
    assert any("U1: ideal op-amp" in note for note in result.notes)
    document = noise_to_json(result, project.converter)
    assert document["snr_noise_only_db"] is None and "snr_noise_only_db_why" in document


def test_snr_against_full_scale_and_ideal_converter() -> None:
    # Source: IEEE Std 1241: ideal N-bit SNR for a full-scale sine is 6.02·N + 1.76 dB.
    assert ideal_converter_snr_db(16) == pytest.approx(98.08)
    project = make_project([{"ref": "R1", "type": "R", "nodes": ["in", "out"], "value": "1k"}],
                           converter={"fs_hz": 48000, "bits": 12, "full_scale_vpp": 4})
    # Common practice, no source: a full-scale sine of Vpp has rms Vpp/(2√2).
    value, why = snr_db(1e-4, project.converter)
    assert why is None and value == pytest.approx(20 * math.log10((4 / (2 * math.sqrt(2))) / 1e-4))


def test_a_temperature_below_absolute_zero_is_refused() -> None:
    project = make_project([{"ref": "R1", "type": "R", "nodes": ["in", "out"], "value": "1k"}],
                           settings={"temperature_c": -300})
    # Source: SI Brochure, 9th ed.: 0 K = −273.15 °C; no temperature lies below it.
    with pytest.raises(ValueError, match="absolute zero"):
        noise_of(project)
