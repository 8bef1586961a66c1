"""The converter at the end of the chain: aliasing, LSB, quantization and noise against full scale.

Aliasing: a sampler at ``fs`` folds a tone at ``fs − f`` onto ``f``. What lands on the top of the
pass band ``f_pass`` comes from ``fs − f_pass``, attenuated by the chain relative to its
pass-band reference gain (the DC gain of a low-pass chain, the mid-band gain of a band-pass…, as
for corners): ``alias_attenuation_db = 20·log10(|H_ref| / |H(fs − f_pass)|)``.
``f_pass`` is the chain's half-power (−3 dB) high corner when it lies below fs/2, otherwise the
top of ``settings.noise_band_hz`` (the band the user cares about), as the result states.

Levels: ``LSB = full_scale_vpp / 2^bits``; ideal quantization noise ``LSB/√12`` rms; ideal SNR
of a full-scale sine ``6.02·N + 1.76 dB``; a full-scale sine has rms ``full_scale_vpp/(2√2)``.

SNR: ``snr_db`` is a full-scale sine against the chain's output noise plus the converter's ideal
quantization noise, added as powers (uncorrelated): ``20·log10(FS_rms / √(n_chain² + q²))``;
``snr_noise_only_db`` is the same sine against the chain's noise alone. With no chain noise,
``snr_db`` is the ideal converter's 6.02·N + 1.76 dB.

Over-range: ``converter_headroom_db = 20·log10((full_scale_vpp/2) / peak)``, with ``peak`` the
largest amplitude at the chain's output (the converter input) for the declared input
amplitude at any frequency of the analysis band (``max_f |H(f)|·amplitude``, on the grid).
Negative means the converter is driven past full scale. It takes the signal centred in the
converter's range (a DC offset or bias error is not seen here).

References
----------
IEEE Std 1241, Terminology and Test Methods for Analog-to-Digital Converters (LSB = FSR/2^N,
ideal SNR 6.02·N + 1.76 dB).
W. R. Bennett, "Spectra of quantized signals", Bell System Technical Journal 27, 446-472 (1948)
(uniform quantization noise of power LSB²/12).
C. E. Shannon, "Communication in the presence of noise", Proc. IRE 37, 10-21 (1949) (sampling).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from stagewise.engine.mna import CircuitError, StageSystem
from stagewise.engine.noise import NoiseResult, ideal_converter_snr_db
from stagewise.engine.sweep import drive, frequency_grid, solve_batched
from stagewise.model.project import Project

__all__ = ["ConverterResult", "converter_range", "converter_review", "converter_to_json", "high_corner_hz"]

TWO_PI = 2.0 * math.pi
HALF_POWER_DB = 10.0 * math.log10(2.0)
BISECTION_STEPS = 60


@dataclass(frozen=True, slots=True)
class ConverterResult:
    """Converter figures; every ``None`` has a reason in ``whys`` under the field's name."""

    fs_hz: float | None
    bits: int | None
    full_scale_vpp: float | None
    lsb_v: float | None
    quantization_noise_v_rms: float | None
    ideal_snr_db: float | None
    ref_hz: float | None
    f_pass_hz: float | None
    f_pass_source: str | None
    alias_hz: float | None
    alias_attenuation_db: float | None
    noise_rms_v: float | None
    noise_rms_lsb: float | None
    snr_db: float | None
    snr_noise_only_db: float | None
    converter_peak_v: float | None
    converter_peak_hz: float | None
    converter_headroom_db: float | None
    whys: dict[str, str]
    notes: tuple[str, ...]


def _output_transfer(system: StageSystem, current_drive: bool, f_hz: NDArray[np.float64]) -> NDArray[np.complex128]:
    driven = drive(system, current_drive)
    try:
        x = solve_batched(driven.g, driven.c, driven.b.astype(complex), 1j * TWO_PI * np.asarray(f_hz, dtype=float))
    except np.linalg.LinAlgError as error:
        raise CircuitError("the circuit cannot be solved: its matrix is singular") from error
    result: NDArray[np.complex128] = x[:, driven.output]
    return result


def high_corner_hz(system: StageSystem, project: Project, *, current_drive: bool,
                   f_hz: NDArray[np.float64] | None = None) -> tuple[float | None, float, str | None]:
    """The half-power high corner above the reference, refined by bisection on exact solves.

    Returns ``(corner_hz or None, ref_hz, why)``. The reference is ``settings.ref_hz``, else the
    frequency of the largest gain on the grid.
    """
    grid = frequency_grid(project.settings) if f_hz is None else np.asarray(f_hz, dtype=float)
    magnitude = np.abs(_output_transfer(system, current_drive, grid))
    if project.settings.ref_hz is not None:
        ref_hz = float(project.settings.ref_hz.si)
        ref_gain = float(abs(_output_transfer(system, current_drive, np.array([ref_hz]))[0]))
    else:
        ref_hz = float(grid[int(np.argmax(magnitude))])
        ref_gain = float(magnitude.max())
    if ref_gain == 0:
        return None, ref_hz, f"the gain at {ref_hz:g} Hz is zero"
    threshold = ref_gain / math.sqrt(2.0)
    above_ref = np.flatnonzero((grid > ref_hz) & (magnitude < threshold))
    if above_ref.size == 0:
        return None, ref_hz, f"the gain stays within 3 dB of the reference up to {grid[-1]:.4g} Hz"
    index = int(above_ref[0])
    low = float(grid[index - 1]) if index > 0 and grid[index - 1] >= ref_hz else ref_hz
    high = float(grid[index])
    for _ in range(BISECTION_STEPS):  # bisection in log f; each step one exact solve
        middle = math.sqrt(low * high)
        if abs(_output_transfer(system, current_drive, np.array([middle]))[0]) >= threshold:
            low = middle
        else:
            high = middle
    return math.sqrt(low * high), ref_hz, None


def converter_range(system: StageSystem, project: Project, *,
                    current_drive: bool) -> tuple[float | None, float | None, float | None, str | None]:
    """The largest peak at the converter input for the declared input, and the headroom to full scale.

    Returns ``(peak_v, peak_hz, converter_headroom_db, why)``: the peak ``max_f |H(f)|·amplitude``
    over the analysis grid at the chain's output, the frequency where it occurs, and
    ``20·log10((full_scale_vpp/2)/peak)`` (negative: over-range); ``why`` when they are null.
    """
    full_scale = project.converter.full_scale_vpp
    amplitude = project.input.amplitude
    if full_scale is None:
        return None, None, None, "the converter's full scale is not given"
    if amplitude is None:
        return None, None, None, "the project's input amplitude is not given"
    grid = frequency_grid(project.settings)
    magnitude = np.abs(_output_transfer(system, current_drive, grid)) * float(amplitude.si)
    at = int(np.argmax(magnitude))
    peak, peak_hz = float(magnitude[at]), float(grid[at])
    if not peak > 0:
        return peak, peak_hz, None, "the chain's output does not respond to its input"
    return peak, peak_hz, 20.0 * math.log10(0.5 * float(full_scale.si) / peak), None


def converter_review(system: StageSystem, project: Project, *, current_drive: bool,
                     noise: NoiseResult | None = None, f_high_3db_hz: float | None = None,
                     reference: tuple[float | None, float] | None = None) -> ConverterResult:
    """Alias attenuation, LSB, quantization noise and the chain's noise against the converter.

    Parameters
    ----------
    system : StageSystem
        The merged chain (``chain.merged_system(project).system``).
    project : Project
        ``converter`` (fs_hz, bits, full_scale_vpp), ``settings`` (ref_hz, noise_band_hz, band).
    current_drive : bool
        How the chain input is driven.
    noise : NoiseResult, optional
        The chain's noise (``noise.analyze_noise``); without it the noise figures are null.
    f_high_3db_hz : float, optional
        The chain's high corner when the caller has it; computed here otherwise.
    reference : (f_hz, gain_db), optional
        The chain's pass-band reference (``metrics.passband_reference``: the DC gain of a
        low-pass, the mid-band gain of a band-pass…; ``f_hz`` None for the high-frequency limit)
        that the alias attenuation is taken against, as the trade defines attenuation. Without
        it, the gain at ``settings.ref_hz`` (or at the chain's largest gain) is used.
    """
    converter = project.converter
    whys: dict[str, str] = {}
    notes: list[str] = []
    fs = None if converter.fs_hz is None else float(converter.fs_hz.si)
    bits = converter.bits
    full_scale = None if converter.full_scale_vpp is None else float(converter.full_scale_vpp.si)
    lsb = quantization = ideal = None
    if full_scale is not None and bits is not None:
        lsb = full_scale / 2.0**bits
        quantization = lsb / math.sqrt(12.0)
    else:
        for key in ("lsb_v", "quantization_noise_v_rms", "noise_rms_lsb", "snr_db"):
            whys[key] = "the converter's bits and full_scale_vpp are both needed"
    if bits is not None:
        ideal = ideal_converter_snr_db(bits)
    else:
        whys["ideal_snr_db"] = "the converter's bits are not given"
    ref_hz = f_pass = alias = attenuation = None
    source = None
    if fs is None:
        for key in ("f_pass_hz", "alias_hz", "alias_attenuation_db"):
            whys[key] = "the converter's sample rate is not given"
    else:
        corner = f_high_3db_hz
        corner_why = None
        grid = frequency_grid(project.settings)
        if fs > grid[-1]:
            grid = np.logspace(math.log10(grid[0]), math.log10(fs), max(grid.size, 50))
        if corner is None:
            corner, ref_hz, corner_why = high_corner_hz(system, project, current_drive=current_drive, f_hz=grid)
        band = project.settings.noise_band_hz
        if corner is not None and corner < fs / 2.0:
            f_pass, source = corner, "chain half-power (-3 dB) high corner"
        elif band is not None:
            f_pass, source = float(band[1].si), "top of settings.noise_band_hz"
            notes.append("the chain's high corner " + ("is at or above fs/2" if corner is not None else
                         f"was not found ({corner_why})") + "; the top of the noise band is the pass band edge")
        else:
            why = ("no high corner below fs/2 and no noise band in the project settings: the pass band edge is unknown"
                   if corner_why is None else f"no pass band edge: {corner_why}, and no noise band in the project settings")
            for key in ("f_pass_hz", "alias_hz", "alias_attenuation_db"):
                whys[key] = why
        if f_pass is not None:
            alias = fs - f_pass
            if alias <= 0:
                whys["alias_attenuation_db"] = f"fs ({fs:g} Hz) is not above the pass band edge ({f_pass:g} Hz)"
                alias = None
            else:
                if alias <= f_pass:
                    notes.append(f"fs − f_pass ({alias:g} Hz) lies inside the pass band: fs is below twice "
                                 "the pass band edge")
                if reference is not None:
                    ref_hz, ref_db = reference
                    if ref_hz is None:
                        whys["ref_hz"] = "the reference is the chain's high-frequency gain (s → ∞)"
                    alias_gain = float(np.abs(_output_transfer(system, current_drive, np.array([alias])))[0])
                    if alias_gain == 0:
                        whys["alias_attenuation_db"] = f"the chain's gain at {alias:g} Hz is exactly zero"
                    else:
                        attenuation = ref_db - 20.0 * math.log10(alias_gain)
                else:
                    if ref_hz is None:
                        ref_hz = float(project.settings.ref_hz.si) if project.settings.ref_hz is not None else None
                    if ref_hz is None:
                        _, ref_hz, _ = high_corner_hz(system, project, current_drive=current_drive, f_hz=grid)
                    values = np.abs(_output_transfer(system, current_drive, np.array([ref_hz, alias])))
                    if values[1] == 0:
                        whys["alias_attenuation_db"] = f"the chain's gain at {alias:g} Hz is exactly zero"
                    elif values[0] == 0:
                        whys["alias_attenuation_db"] = f"the chain's gain at the reference {ref_hz:g} Hz is zero"
                    else:
                        attenuation = 20.0 * math.log10(float(values[0] / values[1]))
    noise_rms = noise_lsb = snr_chain = snr_total = None
    if noise is None:
        for key in ("noise_rms_v", "noise_rms_lsb", "snr_db", "snr_noise_only_db"):
            whys.setdefault(key, "the chain's noise was not computed")
    else:
        noise_rms = noise.out_rms_v
        if lsb is not None:
            noise_lsb = noise_rms / lsb
        if full_scale is None:
            whys["snr_noise_only_db"] = whys["snr_db"] = "the converter's full scale is not given"
        else:
            full_scale_rms = full_scale / (2.0 * math.sqrt(2.0))
            if noise_rms > 0:
                snr_chain = 20.0 * math.log10(full_scale_rms / noise_rms)
            else:
                whys["snr_noise_only_db"] = "the output noise is zero (no noise source in the model)"
            if quantization is not None and math.hypot(noise_rms, quantization) > 0:
                snr_total = 20.0 * math.log10(full_scale_rms / math.hypot(noise_rms, quantization))
    peak, peak_hz, headroom_db, range_why = converter_range(system, project, current_drive=current_drive)
    if range_why is not None:
        for key in ("converter_peak_v", "converter_peak_hz", "converter_headroom_db"):
            whys[key] = range_why
    return ConverterResult(
        fs_hz=fs, bits=bits, full_scale_vpp=full_scale, lsb_v=lsb, quantization_noise_v_rms=quantization,
        ideal_snr_db=ideal, ref_hz=ref_hz, f_pass_hz=f_pass, f_pass_source=source, alias_hz=alias,
        alias_attenuation_db=attenuation, noise_rms_v=noise_rms, noise_rms_lsb=noise_lsb, snr_db=snr_total,
        snr_noise_only_db=snr_chain, converter_peak_v=peak, converter_peak_hz=peak_hz,
        converter_headroom_db=headroom_db, whys=whys, notes=tuple(notes),
    )


def converter_to_json(result: ConverterResult) -> dict[str, Any]:
    """The ``converter`` object: ``fs_hz``, ``bits``, ``full_scale_vpp``, ``lsb_v``,
    ``quantization_noise_v_rms``, ``ideal_snr_db``, ``ref_hz``, ``f_pass_hz``, ``f_pass_source``,
    ``alias_hz``, ``alias_attenuation_db``, ``noise_rms_v``, ``noise_rms_lsb``, ``snr_db`` (with
    quantization noise), ``snr_noise_only_db``, ``converter_peak_v``, ``converter_peak_hz``,
    ``converter_headroom_db``, ``notes``; a ``*_why`` beside every null. The chain-level
    ``alias_attenuation_db``, ``snr_db``, ``snr_noise_only_db`` and ``converter_headroom_db``
    (DESIGN section 6) are the same values as in this object."""
    keys = ("fs_hz", "bits", "full_scale_vpp", "lsb_v", "quantization_noise_v_rms", "ideal_snr_db", "ref_hz",
            "f_pass_hz", "f_pass_source", "alias_hz", "alias_attenuation_db", "noise_rms_v", "noise_rms_lsb",
            "snr_db", "snr_noise_only_db", "converter_peak_v", "converter_peak_hz", "converter_headroom_db")
    document: dict[str, Any] = {}
    for key in keys:
        value = getattr(result, key)
        document[key] = value
        if value is None:
            document[f"{key}_why"] = result.whys.get(key, _input_why(key))
    document["notes"] = list(result.notes)
    return document


def _input_why(key: str) -> str:
    names = {"fs_hz": "the converter's sample rate", "bits": "the converter's resolution (bits)",
             "full_scale_vpp": "the converter's full scale"}
    if key in names:
        return f"{names[key]} is not given"
    if key in ("ref_hz", "f_pass_source"):
        return "no pass band edge was found"
    return "not computed"
