"""Converter figures: alias attenuation, LSB, quantization noise and SNR against published formulas."""

from __future__ import annotations

import math
from typing import Any

import pytest

from stagewise.engine.converter import converter_review, converter_to_json
from stagewise.engine.mna import assemble
from stagewise.engine.noise import BOLTZMANN_J_PER_K, analyze_noise
from stagewise.files.codec import decode
from stagewise.model.project import Project

TWO_PI = 2 * math.pi


def rc_project(r: float, c: float, converter: dict[str, Any], **settings: Any) -> Project:
    return decode({
        "format": "stagewise-project", "version": 1, "title": "converter test",
        "settings": {"f_min_hz": 1, "f_max_hz": "1M", "temperature_c": 26.85, **settings},
        "converter": converter,
        "stages": [{"id": "s", "name": "rc", "ports": {"in": "in", "out": "out"}, "parts": [
            {"ref": "R1", "type": "R", "nodes": ["in", "out"], "value": r},
            {"ref": "C1", "type": "C", "nodes": ["out", "0"], "value": c}]}],
    })


def test_alias_attenuation_of_a_single_pole_at_fs_minus_corner() -> None:
    r, c = 4.7e3, 3.3e-9
    fc = 1 / (TWO_PI * r * c)  # Source: first-order RC corner 1/(2πRC), any circuits text
    project = rc_project(r, c, {"fs_hz": 96000, "bits": 14, "full_scale_vpp": 3.3},
                         ref_hz=100, noise_band_hz=[20, 20000])
    system = assemble(project.stages[0], project)
    noise = analyze_noise(system, project, current_drive=False)
    result = converter_review(system, project, current_drive=False, noise=noise)
    # Relative to ref, the half-power point of 1/(1 + j f/fc) is at fc·sqrt(1 + 2(ref/fc)²).
    corner = fc * math.sqrt(1 + 2 * (100 / fc) ** 2)
    assert result.f_pass_hz == pytest.approx(corner, rel=1e-9)
    assert result.alias_hz == pytest.approx(96000 - corner, rel=1e-9)

    def gain(f: float) -> float:
        return 1 / abs(1 + 1j * f / fc)

    # Source: sampling folds fs − f onto f (Shannon 1949); attenuation relative to the reference.
    assert result.alias_attenuation_db == pytest.approx(20 * math.log10(gain(100) / gain(96000 - corner)), abs=1e-9)
    # Source: IEEE Std 1241: LSB = FSR / 2^N; ideal SNR 6.02·N + 1.76 dB.
    assert result.lsb_v == pytest.approx(3.3 / 2**14)
    assert result.ideal_snr_db == pytest.approx(6.02 * 14 + 1.76)
    # Source: Bennett (1948): uniform quantization noise has rms LSB/√12.
    assert result.quantization_noise_v_rms == pytest.approx(3.3 / 2**14 / math.sqrt(12))
    # Source: equipartition + Johnson/Nyquist: R into C over 20 Hz..20 kHz, band-limited exactly.
    kelvin = 300.0
    band = (2 / math.pi) * (math.atan(20000 / fc) - math.atan(20 / fc))
    rms = math.sqrt(BOLTZMANN_J_PER_K * kelvin / c * band)
    assert result.noise_rms_v == pytest.approx(rms, rel=1e-6)
    assert result.noise_rms_lsb == pytest.approx(rms / (3.3 / 2**14), rel=1e-6)
    full_scale_rms = 3.3 / (2 * math.sqrt(2))  # Common practice, no source: sine rms = Vpp/(2√2)
    assert result.snr_noise_only_db == pytest.approx(20 * math.log10(full_scale_rms / rms), rel=1e-9)
    quantization = 3.3 / 2**14 / math.sqrt(12)
    # Common practice, no source: uncorrelated noises add as powers; snr_db counts both.
    assert result.snr_db == pytest.approx(
        20 * math.log10(full_scale_rms / math.hypot(rms, quantization)), rel=1e-9)


def test_pass_band_edge_falls_back_to_the_noise_band_and_missing_converter_is_explained() -> None:
    # The corner (about 4.8 MHz) is above fs/2: the noise band's top is the pass band edge.
    r, c = 330.0, 100e-12
    project = rc_project(r, c, {"fs_hz": 48000, "bits": 16, "full_scale_vpp": 2},
                         ref_hz=100, noise_band_hz=[20, 15000])
    system = assemble(project.stages[0], project)
    result = converter_review(system, project, current_drive=False)
    assert result.f_pass_hz == 15000 and result.f_pass_source == "top of settings.noise_band_hz"
    fc = 1 / (TWO_PI * r * c)

    def gain(f: float) -> float:
        return 1 / abs(1 + 1j * f / fc)

    # Source: first-order RC response 1/(1 + j f/fc), any circuits text.
    assert result.alias_attenuation_db == pytest.approx(20 * math.log10(gain(100) / gain(33000)), abs=1e-9)
    document = converter_to_json(result)
    assert document["snr_db"] is None and document["snr_db_why"] == "the chain's noise was not computed"
    bare = rc_project(r, c, {}, ref_hz=100)
    empty = converter_to_json(converter_review(assemble(bare.stages[0], bare), bare, current_drive=False))
    assert empty["alias_attenuation_db"] is None
    assert empty["alias_attenuation_db_why"] == "the converter's sample rate is not given"
    assert empty["lsb_v"] is None and "bits and full_scale_vpp" in empty["lsb_v_why"]


def test_alias_attenuation_is_taken_against_the_pass_band_gain_whatever_ref_hz_says() -> None:
    # A 1 kΩ/1 µF low-pass (corner 159.2 Hz) in a project whose ref_hz (1 kHz) lies past its corner.
    # Source: first-order RC, |H(f)|² = 1/(1 + (f/fc)²), fc = 1/(2πRC) (any circuits text); the
    # pass-band gain of a low-pass is its DC gain, and sampling folds fs − f_pass onto the pass-band
    # edge (Shannon 1949), so the attenuation there is 10·log10(1 + ((fs − fc)/fc)²) below DC.
    from stagewise.engine.analysis import analyze_project  # noqa: PLC0415

    r, c, fs = 1e3, 1e-6, 48000.0
    fc = 1 / (TWO_PI * r * c)
    project = rc_project(r, c, {"fs_hz": fs, "bits": 16, "full_scale_vpp": 2}, ref_hz=1000, noise_band_hz=[1, 100])
    chain = analyze_project(project, spread=False)["chain"]
    figures = chain["converter"]
    assert figures["f_pass_hz"] == pytest.approx(fc, rel=1e-6)
    expected = 10 * math.log10(1 + ((fs - fc) / fc) ** 2)
    assert chain["alias_attenuation_db"] == pytest.approx(expected, abs=1e-6)
    assert figures["ref"]["kind"] == "dc" and figures["ref"]["gain_db"] == pytest.approx(0.0, abs=1e-9)
    # Against the gain at 1 kHz it would read about 16 dB less: the figure a reviewer must not see.
    assert expected - 10 * math.log10(1 + (1000 / fc) ** 2) < chain["alias_attenuation_db"] - 15
