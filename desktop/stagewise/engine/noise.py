"""Noise of a stage or of the merged chain by the adjoint method.

Every noise source of a linear circuit is an injection vector ``b_k`` (a current into a pair of
nodes, or a voltage in an op-amp's gain-state row). The output noise voltage it causes is
``e_out^T (G + sC)^-1 b_k = z^T b_k`` with ``(G + sC)^T z = e_out``: one transposed solve per
frequency gives the transfer from every source to the output at once (and, with the drive
vector as ``b``, the signal gain too). Sources are uncorrelated, so their powers add.

Sources
-------
- Resistors: thermal noise, a current source of density sqrt(4kT/R) in parallel with each
  resistor (Johnson 1928; Nyquist 1928), at the project temperature.
- Finite op-amps: input voltage noise ``en`` in series with the non-inverting input (it enters
  the gain-state row ``x/A0 + s·x/ω_gbw − (v+ − v−) = 0`` as ``v+ + en``) with the 1/f law
  ``en²·(1 + f_corner/f)``; input current noise ``in`` into each input, its own corner.
- Ideal op-amps (nullors), capacitors, inductors, controlled sources and behavioural blocks are
  noiseless in this model; the result says so in its notes.

Integration: the output power density is integrated over the band on a log-spaced grid with the
composite Simpson rule in ``u = ln f`` on the integrand ``S(f)·f`` (``df = f·du``), which is
smooth in ``u`` for rational responses and the 1/f law.

References
----------
J. B. Johnson, "Thermal agitation of electricity in conductors", Phys. Rev. 32, 97 (1928).
H. Nyquist, "Thermal agitation of electric charge in conductors", Phys. Rev. 32, 110 (1928).
BIPM, The International System of Units (SI Brochure), 9th ed., 2019: k = 1.380649e-23 J/K.
IEEE Std 1241, Terminology and Test Methods for Analog-to-Digital Converters: ideal SNR
6.02·N + 1.76 dB for a full-scale sine.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from stagewise.engine.mna import CircuitError, StageSystem
from stagewise.engine.sweep import DrivenSystem, drive, solve_batched
from stagewise.model.project import Converter, Project

__all__ = [
    "BOLTZMANN_J_PER_K",
    "NoiseResult",
    "NoiseSource",
    "analyze_noise",
    "ideal_converter_snr_db",
    "integrate_power_log",
    "noise_to_json",
    "snr_db",
]

BOLTZMANN_J_PER_K = 1.380649e-23  # exact, SI Brochure 9th ed. (2019)
ZERO_CELSIUS_K = 273.15
TWO_PI = 2.0 * math.pi
DEFAULT_POINTS_PER_DECADE = 100
TOP_SOURCES = 8


@dataclass(frozen=True, slots=True)
class NoiseSource:
    """One uncorrelated noise source and what it puts at the output.

    ``kind`` is ``"thermal"`` (resistor), ``"en"`` (op-amp input voltage noise), ``"in+"`` or
    ``"in-"`` (op-amp input current noise into that input).
    """

    name: str
    ref: str
    kind: str
    out_density_v_rthz: NDArray[np.float64]
    out_density_v_rthz_at_ref: float
    out_rms_v: float
    share_pct: float


@dataclass(frozen=True, slots=True)
class NoiseResult:
    """Output and input-referred noise of a driven system.

    Attributes
    ----------
    f_hz : ndarray
        The integration grid (log-spaced over ``band_hz``).
    out_density_v_rthz : ndarray
        Total output noise density at each frequency, V/√Hz.
    out_rms_v : float
        Output noise integrated over ``band_hz``, V rms.
    sources : tuple of NoiseSource
        Every source, ranked by its output RMS (largest first).
    ref_hz : float
        Where the densities "at ref" and the reference gain are taken.
    gain_at_ref_abs : float
        |signal gain| at ``ref_hz``: V/V for a voltage drive, V/A (Ω) for a current drive.
    in_density_at_ref, in_rms : float or None
        Input-referred density (V/√Hz or A/√Hz) and RMS (V or A): the output values divided by
        ``gain_at_ref_abs``. ``None`` when the gain at ref is zero (see ``in_why``).
    in_unit : str
        ``"V"`` or ``"A"``.
    notes : tuple of str
        What is not counted and why (ideal op-amps, models without noise data, band choice).
    """

    f_hz: NDArray[np.float64]
    band_hz: tuple[float, float]
    band_from_settings: bool
    temperature_k: float
    out_density_v_rthz: NDArray[np.float64]
    out_rms_v: float
    sources: tuple[NoiseSource, ...]
    ref_hz: float
    out_density_v_rthz_at_ref: float
    gain_at_ref_abs: float
    current_drive: bool
    in_density_at_ref: float | None
    in_rms: float | None
    in_unit: str
    in_why: str | None
    notes: tuple[str, ...]
    method: str


def integrate_power_log(f_hz: NDArray[np.float64], power: NDArray[np.float64]) -> NDArray[np.float64]:
    """∫ power(f) df over the log-spaced grid ``f_hz`` (last axis), composite Simpson in ln f.

    The grid must be uniformly spaced in ln f with an odd number of points (three at least);
    the integrand in ``u = ln f`` is ``power·f``.
    """
    count = f_hz.shape[-1]
    if count < 3 or count % 2 == 0:
        raise ValueError("Simpson integration needs an odd number (>= 3) of grid points")
    step = math.log(f_hz[-1] / f_hz[0]) / (count - 1)
    weights = np.ones(count)
    weights[1:-1:2] = 4.0
    weights[2:-1:2] = 2.0
    weights *= step / 3.0
    result: NDArray[np.float64] = np.sum(power * f_hz * weights, axis=-1)
    return result


def _band_grid(low_hz: float, high_hz: float, points_per_decade: int) -> NDArray[np.float64]:
    decades = math.log10(high_hz / low_hz)
    count = max(int(math.ceil(decades * points_per_decade)), 2)
    if count % 2 == 1:
        count += 1
    return np.logspace(math.log10(low_hz), math.log10(high_hz), count + 1)


def _source_vectors(
    system: StageSystem, size: int, project: Project, temperature_k: float, f_hz: NDArray[np.float64]
) -> tuple[list[tuple[str, str, str]], NDArray[np.float64], NDArray[np.float64], list[str]]:
    """Injection vectors (size × sources) and power densities (sources × frequencies)."""
    labels: list[tuple[str, str, str]] = []
    vectors: list[NDArray[np.float64]] = []
    densities: list[NDArray[np.float64]] = []
    notes: list[str] = []
    four_kt = 4.0 * BOLTZMANN_J_PER_K * temperature_k
    for element in system.elements:
        if element.type != "R":
            continue
        a, b = element.nodes[0], element.nodes[1]
        if a < 0 and b < 0:
            continue
        vector = np.zeros(size)
        if a >= 0:
            vector[a] += 1.0
        if b >= 0:
            vector[b] -= 1.0
        labels.append((f"{element.ref} thermal", element.ref, "thermal"))
        vectors.append(vector)
        # Current-source form: 4kT/R in A²/Hz (Johnson 1928, Nyquist 1928).
        densities.append(np.full(f_hz.shape, four_kt / element.value))
    for opamp in system.opamps:
        model = project.opamp_models.get(opamp.model)
        if model is None:
            notes.append(f"{opamp.ref}: model {opamp.model!r} not found; its noise is not counted")
            continue
        if model.en_v_rthz is None:
            notes.append(f"{opamp.ref}: model {opamp.model!r} gives no en_v_rthz; its voltage noise is not counted")
        else:
            vector = np.zeros(size)
            # Series source at v+: the state row reads x/A0 + s·x/ω_gbw − (v+ + en − v−) = 0.
            vector[opamp.state_row] = 1.0
            corner = 0.0 if model.en_corner_hz is None else model.en_corner_hz.si
            labels.append((f"{opamp.ref} en", opamp.ref, "en"))
            vectors.append(vector)
            densities.append(model.en_v_rthz.si**2 * (1.0 + corner / f_hz))
        if model.in_a_rthz is None:
            notes.append(f"{opamp.ref}: model {opamp.model!r} gives no in_a_rthz; its current noise is not counted")
        else:
            corner = 0.0 if model.in_corner_hz is None else model.in_corner_hz.si
            for kind, node in (("in+", opamp.in_plus), ("in-", opamp.in_minus)):
                if node < 0:
                    continue  # a current into node 0 goes nowhere
                vector = np.zeros(size)
                vector[node] = 1.0
                labels.append((f"{opamp.ref} {kind}", opamp.ref, kind))
                vectors.append(vector)
                densities.append(model.in_a_rthz.si**2 * (1.0 + corner / f_hz))
    for ref in system.ideal_opamps:
        notes.append(f"{ref}: ideal op-amp, noiseless in this model")
    if any(element.type not in ("R", "C", "L") for element in system.elements):
        notes.append("controlled sources are noiseless in this model")
    matrix = np.array(vectors).T if vectors else np.zeros((size, 0))
    power = np.array(densities) if densities else np.zeros((0, f_hz.size))
    return labels, matrix, power, notes


def _reference_frequency(project: Project, f_hz: NDArray[np.float64], gain_abs: NDArray[np.float64]) -> float:
    if project.settings.ref_hz is not None:
        return float(project.settings.ref_hz.si)
    return float(f_hz[int(np.argmax(gain_abs))])


def analyze_noise(
    system: StageSystem,
    project: Project,
    *,
    current_drive: bool,
    points_per_decade: int = DEFAULT_POINTS_PER_DECADE,
) -> NoiseResult:
    """Output noise, each source's contribution and input-referred noise of a system.

    Parameters
    ----------
    system : StageSystem
        A stage (``mna.assemble``) or the merged chain (``chain.merged_system(...).system``).
    project : Project
        Supplies the temperature (``settings.temperature_c``), the noise band
        (``settings.noise_band_hz``; the sweep range ``f_min_hz..f_max_hz`` when absent, noted),
        ``settings.ref_hz`` and the op-amp models.
    current_drive : bool
        How the input is driven. The drive is zeroed for noise: a voltage drive is a short at
        the input, a current drive an open input.
    points_per_decade : int
        Density of the integration grid (Simpson in ln f).

    Returns
    -------
    NoiseResult
        Densities in V/√Hz, RMS in V over the band.

    Raises
    ------
    ValueError
        A temperature at or below absolute zero.
    CircuitError
        A circuit whose matrix is singular.
    """
    settings = project.settings
    if settings.noise_band_hz is not None:
        band = (float(settings.noise_band_hz[0].si), float(settings.noise_band_hz[1].si))
        from_settings = True
    else:
        band = (float(settings.f_min_hz.si), float(settings.f_max_hz.si))
        from_settings = False
    temperature_k = float(settings.temperature_c.si) + ZERO_CELSIUS_K
    if not temperature_k > 0:
        raise ValueError(f"settings.temperature_c: {settings.temperature_c.si:g} °C is at or below absolute zero")
    f_grid = _band_grid(band[0], band[1], points_per_decade)
    driven: DrivenSystem = drive(system, current_drive)
    size = driven.g.shape[0]
    grid_adjoint = _adjoint_solutions(driven, f_grid)  # (frequencies, size)
    ref_hz = _reference_frequency(project, f_grid, np.abs(grid_adjoint @ driven.b))
    f_all = np.append(f_grid, ref_hz)  # the last column is the reference point
    adjoint = np.vstack([grid_adjoint, _adjoint_solutions(driven, f_all[-1:])])
    gain = adjoint @ driven.b  # signal transfer drive -> output
    labels, vectors, power_all, notes = _source_vectors(system, size, project, temperature_k, f_all)
    transfer = adjoint @ vectors  # (frequencies, sources)
    out_power = (np.abs(transfer) ** 2).T * power_all  # (sources, frequencies)
    grid_power = out_power[:, : f_grid.size]
    source_ms = integrate_power_log(f_grid, grid_power) if labels else np.zeros(0)
    total_density = np.sqrt(np.sum(grid_power, axis=0))
    total_ms = float(np.sum(source_ms))
    out_rms = math.sqrt(total_ms)
    out_at_ref = float(math.sqrt(float(np.sum(out_power[:, -1])))) if labels else 0.0
    ranked = sorted(range(len(labels)), key=lambda index: -float(source_ms[index]))
    sources = tuple(
        NoiseSource(
            name=labels[index][0],
            ref=labels[index][1],
            kind=labels[index][2],
            out_density_v_rthz=np.sqrt(grid_power[index]),
            out_density_v_rthz_at_ref=float(math.sqrt(out_power[index, -1])),
            out_rms_v=float(math.sqrt(source_ms[index])),
            share_pct=100.0 * float(source_ms[index]) / total_ms if total_ms > 0 else 0.0,
        )
        for index in ranked
    )
    gain_ref = float(abs(gain[-1]))
    in_unit = "A" if current_drive else "V"
    if gain_ref > 0 and math.isfinite(gain_ref):
        in_density: float | None = out_at_ref / gain_ref
        in_rms: float | None = out_rms / gain_ref
        in_why = None
    else:
        in_density = in_rms = None
        in_why = f"the signal gain at {ref_hz:g} Hz is zero, so noise cannot be referred to the input"
    if not from_settings:
        notes.append("no noise band is set in the project settings, so the noise is integrated over the whole "
                     "analysed frequency range")
    if not labels:
        notes.append("no noise source in this circuit model")
    return NoiseResult(
        f_hz=f_grid,
        band_hz=band,
        band_from_settings=from_settings,
        temperature_k=temperature_k,
        out_density_v_rthz=total_density,
        out_rms_v=out_rms,
        sources=sources,
        ref_hz=ref_hz,
        out_density_v_rthz_at_ref=out_at_ref,
        gain_at_ref_abs=gain_ref,
        current_drive=current_drive,
        in_density_at_ref=in_density,
        in_rms=in_rms,
        in_unit=in_unit,
        in_why=in_why,
        notes=tuple(notes),
        method=(f"adjoint solve per frequency; Simpson in ln f, {points_per_decade} points/decade over "
                f"{band[0]:g}..{band[1]:g} Hz; input-referred = output / |gain at {ref_hz:g} Hz|"),
    )


def _adjoint_solutions(driven: DrivenSystem, f_hz: NDArray[np.float64]) -> NDArray[np.complex128]:
    """z_k with (G + s_k C)^T z_k = e_out for every frequency; shape (frequencies, size)."""
    size = driven.g.shape[0]
    s = 1j * TWO_PI * f_hz
    unit = np.zeros(size, dtype=complex)
    unit[driven.output] = 1.0
    try:
        # Chunked over frequencies: memory O(size²) per chunk, not O(frequencies·size²).
        solved: NDArray[np.complex128] = solve_batched(driven.g.T, driven.c.T, unit, s.astype(np.complex128))
    except np.linalg.LinAlgError as error:
        raise CircuitError("the circuit cannot be solved for noise: its matrix is singular "
                           "(a floating node or a loop of voltage sources)") from error
    return solved


def ideal_converter_snr_db(bits: int) -> float:
    """Ideal N-bit converter SNR for a full-scale sine: 6.02·N + 1.76 dB (IEEE Std 1241)."""
    return 6.02 * bits + 1.76


def snr_db(out_rms_v: float, converter: Converter) -> tuple[float | None, str | None]:
    """SNR of a full-scale sine (rms = full_scale_vpp / (2√2)) against the output noise.

    Returns ``(value, None)`` or ``(None, why)``.
    """
    if converter.full_scale_vpp is None:
        return None, "the converter's full scale is not given"
    if out_rms_v <= 0:
        return None, "the output noise is zero (no noise source in the model)"
    full_scale_rms = converter.full_scale_vpp.si / (2.0 * math.sqrt(2.0))
    return 20.0 * math.log10(full_scale_rms / out_rms_v), None


def noise_to_json(result: NoiseResult, converter: Converter, top: int = TOP_SOURCES) -> dict[str, Any]:
    """The DESIGN section 6 ``noise`` object (plus ``snr_noise_only_db`` and the ideal converter SNR).

    Keys: ``out_rms_v``, ``out_density_v_rthz_at_ref``, ``ref_hz``, ``in_rms``, ``in_unit``,
    ``in_density_at_ref``, ``band_hz``, ``temperature_k``, ``top_sources`` (each ``source``,
    ``ref``, ``kind``, ``rms_v``, ``share_pct``), ``snr_noise_only_db`` (the chain's noise alone
    against a full-scale sine; the chain-level ``snr_db`` adds quantization noise, see
    ``engine.converter``), ``ideal_converter_snr_db``,
    ``notes``, ``method``; a ``*_why`` key beside every null.
    """
    document: dict[str, Any] = {
        "out_rms_v": result.out_rms_v,
        "out_density_v_rthz_at_ref": result.out_density_v_rthz_at_ref,
        "ref_hz": result.ref_hz,
        "in_rms": result.in_rms,
        "in_unit": result.in_unit,
        "in_density_at_ref": result.in_density_at_ref,
        "band_hz": list(result.band_hz),
        "temperature_k": result.temperature_k,
        "top_sources": [
            {"source": source.name, "ref": source.ref, "kind": source.kind,
             "rms_v": source.out_rms_v, "share_pct": source.share_pct}
            for source in result.sources[:top]
        ],
        "notes": list(result.notes),
        "method": result.method,
    }
    if result.in_rms is None:
        document["in_rms_why"] = result.in_why
        document["in_density_at_ref_why"] = result.in_why
    value, why = snr_db(result.out_rms_v, converter)
    document["snr_noise_only_db"] = value
    if why is not None:
        document["snr_noise_only_db_why"] = why
    if converter.bits is None:
        document["ideal_converter_snr_db"] = None
        document["ideal_converter_snr_db_why"] = "the converter's bits are not given"
    else:
        document["ideal_converter_snr_db"] = ideal_converter_snr_db(converter.bits)
    return document
