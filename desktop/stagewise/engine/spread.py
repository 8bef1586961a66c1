"""Spread over part tolerances: Monte Carlo and worst case, vectorized over samples.

The pencil depends on each toleranced part through one fixed pattern: a resistor adds
``(1/R)·P_ab`` to G, a capacitor ``C·P_ab`` to the s-part, an inductor ``−L`` at its branch
row, a voltage-controlled source its gain at the control columns. So with the part multipliers
``m_k = value_k / nominal_k`` of a sample,

    G(m) = G0 + Σ_k (m_k^p_k − 1)·ΔG_k,    C(m) = C0 + Σ_k (m_k^p_k − 1)·ΔC_k

(``p = −1`` for a resistor, whose conductance is stamped, ``+1`` otherwise). Every pattern is
rank one (``coefficient·left·rightᵀ``), built once from the system's
:class:`~stagewise.engine.mna.ElementStamp` records. The sampled pencil is therefore the nominal
one plus a low-rank update ``L·D(m, s)·Rᵀ``, and the response of every sample at every
frequency follows from the nominal solves by the Woodbury identity: per frequency one solve of
the nominal matrix (shared by all samples), per sample and frequency one (terms × terms) solve,
all in batched LAPACK calls chunked over samples to bound memory. Parts on the same node pair
(R ∥ C) share one term. No Python loop runs per sample or per frequency.

Metrics per sample: ``gain_db`` at ``settings.ref_hz`` (else the nominal band maximum, the same
frequency for every sample); ``peak_gain_db`` the largest gain on the grid (not refined between
points); ``peaking_db`` peak minus the sample's pass-band gain; ``f_low_3db_hz`` and
``f_high_3db_hz`` the half-power points (10·log10 2 ≈ 3.0103 dB below the pass-band gain)
nearest the pass band on either side. The pass-band gain is read where the nominal circuit's
pass-band reference is (``metrics.passband_reference``: DC for a low-pass, far above every root
for a high-pass, the mid-band or ``ref_hz`` frequency otherwise), so the spread's corners are
the same figures as the nominal analysis's; ``phase_margin_deg`` of every finite op-amp, on a window
of half a decade either side of its nominal crossover. Corners and crossovers are bracketed on
the grid, then refined per sample in ln f to 1e-10: the first point interpolated from the four
grid values around the bracket (inverse cubic), then a Newton step with that cubic's slope,
then secant steps kept inside the bracket (the Illinois point when a secant would leave it);
every iteration one batched dense solve at each sample's own frequency, for both corners of
every sample, or the crossovers of all op-amps, at once.

Worst case: the sensitivity sign of each metric to each part (central finite differences at
nominal, batched like samples) chooses the extreme vertex (every part at +tol or −tol); the
vertex is then evaluated, and compared with the Monte Carlo extremes. A metric that is monotone
in each part takes its extremes at such vertices; when a Monte Carlo sample goes beyond the
vertex, the result says so (the metric is not monotone there).

Distributions: ``uniform`` — each part uniform within ±tol; ``normal`` — mean nominal,
standard deviation tol/3 (the tolerance read as 3σ).

References
----------
M. Dowell and P. Jarratt, "A modified regula falsi method for computing the root of an
equation", BIT 11, 168-174 (1971) (the Illinois method).
T. J. Dekker, "Finding a zero by means of successive linear interpolation", in Constructive
Aspects of the Fundamental Theorem of Algebra, Wiley, 1969 (secant steps kept in a bracket).
"""

from __future__ import annotations

import math
import os
from collections.abc import Callable, Mapping, Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field, replace
from typing import TYPE_CHECKING, Any

import numpy as np
from numpy.typing import NDArray

from stagewise.engine.mna import CircuitError, OpampStates, StageSystem
from stagewise.engine.sweep import drive
from stagewise.model.project import Project

if TYPE_CHECKING:
    from stagewise.engine.poles import PoleZeroModel

__all__ = [
    "DEFAULT_PERCENTILES",
    "METRIC_KEYS",
    "Meter",
    "MetricSpread",
    "Readout",
    "SpreadCancelled",
    "SpreadResult",
    "SpreadSamples",
    "ToleranceModel",
    "WorstCase",
    "YieldLimit",
    "bounded_samples",
    "corners_3db",
    "monte_carlo",
    "place_samples",
    "sample_multipliers",
    "sampled_response",
    "spread_to_json",
    "tolerance_model",
]

TWO_PI = 2.0 * math.pi
DEFAULT_PERCENTILES: tuple[float, ...] = (1.0, 50.0, 99.0)
DEFAULT_POINTS = 200
# Each chunk's temporaries stay near the processor's caches (measured on the demo run: 48 MB
# chunks 1.97 s, 4 MB chunks 1.70 s; fewer fresh pages to fault in, too).
CHUNK_BYTES = 4 * 2**20
# LAPACK releases the GIL inside numpy's batched solve, so chunks of samples solve in parallel
# threads (measured here: 1.75x on 2 cores). Each chunk writes its own rows of the result.
WORKERS = max(1, min(4, os.cpu_count() or 1))
# Below this many matrices a thread hand-off costs more than it saves.
PARALLEL_MATRICES = 512
_pool: list[ThreadPoolExecutor] = []  # created on first use, shared by every analysis (stateless)


class SpreadCancelled(Exception):  # noqa: N818 - reads as "the spread was cancelled"
    """The progress callback asked the Monte Carlo to stop; no result is made of the samples done.

    ``done`` and ``total`` are the last figures the callback was given (units of work, see
    :class:`Meter`).
    """

    def __init__(self, done: int, total: int) -> None:
        super().__init__(f"cancelled after {done} of {total} units of work")
        self.done = done
        self.total = total


Progress = Callable[[int, int], bool | None]


class Meter:
    """Counts the Monte Carlo's work for a progress callback ``progress(done, total) -> bool``.

    The callback is called in the thread that runs the analysis (never from the pool's threads),
    between chunks of samples, with ``done`` never decreasing and at most ``total``; returning
    True cancels: the running call raises :class:`SpreadCancelled` at the next chunk boundary.
    A unit is one sample carried through one pass (the sweep, the corners, the loop gains, the
    stability); :meth:`plan` adds passes, so ``total`` grows only before the work is counted.
    """

    def __init__(self, progress: Progress | None) -> None:
        self.progress = progress
        self.done = 0
        self.total = 0

    def plan(self, units: int) -> None:
        """Announce ``units`` more units of work (before they are done)."""
        self.total += max(0, int(units))

    def advance(self, units: int) -> None:
        """Count ``units`` as done and ask the callback whether to go on."""
        self.done = min(self.total, self.done + max(0, int(units)))
        self.check()

    def finish_pass(self, upto: int) -> None:
        """Count the work up to ``upto`` units as done (the end of a pass counted as a whole)."""
        self.advance(max(0, upto - self.done))

    def check(self) -> None:
        """Ask the callback; raise :class:`SpreadCancelled` when it says stop."""
        if self.progress is not None and self.progress(self.done, self.total):
            raise SpreadCancelled(self.done, self.total)


def _in_chunks(count: int, chunk: int, solve_rows: Callable[[int, int], None], matrices_per_row: int = 1,
               meter: Meter | None = None) -> None:
    """Call ``solve_rows(start, stop)`` over ``range(count)`` in chunks, on up to WORKERS threads.

    With a ``meter``, each chunk's rows are counted as done once it has finished (in this
    thread); a cancel stops the chunks not yet started and waits for the running ones.
    """
    parallel = WORKERS > 1 and count * matrices_per_row >= PARALLEL_MATRICES
    if parallel:
        chunk = min(chunk, -(-count // WORKERS))
        if meter is not None:
            # Small enough for a prompt progress and cancel, large enough to keep the threads fed.
            chunk = min(chunk, max(1, -(-count // (4 * WORKERS))))
    chunk = max(1, chunk)
    bounds = [(start, min(start + chunk, count)) for start in range(0, count, chunk)]
    if not parallel or len(bounds) == 1:
        for start, stop in bounds:
            solve_rows(start, stop)
            if meter is not None:
                meter.advance(stop - start)
        return
    if not _pool:
        _pool.append(ThreadPoolExecutor(WORKERS, thread_name_prefix="stagewise-spread"))
    futures = [_pool[0].submit(solve_rows, start, stop) for start, stop in bounds]
    try:
        for future, (start, stop) in zip(futures, bounds, strict=True):
            future.result()  # re-raises a chunk's CircuitError here
            if meter is not None:
                meter.advance(stop - start)
    except BaseException:
        for future in futures:
            future.cancel()
        for future in futures:  # no chunk still writes when the caller goes on
            if not future.cancelled():
                future.exception()
        raise


REFINE_STEPS = 12
# The Monte Carlo's cost bound. Each sample costs about one (terms × terms) solve per frequency
# (and per loop, for the phase margins): work ≈ samples · frequencies · max(terms, 12)³ · (1 +
# loops). WORK_BOUND is ten times that of the larger demo (500 samples, 200 frequencies, 16
# terms, 5 loops: 0.8 s of one core here), so a spread never runs for minutes; past it the
# samples are reduced, and below MIN_BOUNDED_SAMPLES the spread is refused, saying why.
WORK_BOUND = 2.5e10
MIN_BOUNDED_SAMPLES = 100


def bounded_samples(model: ToleranceModel, asked: int, frequencies: int, phase_margins: bool,
                     notes: list[str]) -> int:
    """The number of samples within :data:`WORK_BOUND` (``asked`` when it fits; a note when not).

    Raises
    ------
    ValueError
        Fewer than MIN_BOUNDED_SAMPLES samples fit: the circuit is too large for a Monte Carlo.
    """
    terms = max(_merged_terms(model)[0].shape[1], 12)
    loops = len(model.opamps) if phase_margins else 0
    per_sample = float(frequencies) * float(terms) ** 3 * (1 + loops)
    fitting = int(WORK_BOUND // per_sample)
    if fitting >= asked:
        return asked
    seconds = asked * per_sample / WORK_BOUND * 8.0
    if fitting < MIN_BOUNDED_SAMPLES:
        raise ValueError(f"{asked} Monte Carlo samples of this circuit ({terms} toleranced terms, {frequencies} "
                         f"frequencies{f', {loops} loops' if loops else ''}) would take about {seconds:.0f} s, and "
                         f"fewer than {MIN_BOUNDED_SAMPLES} samples fit in the bound of about 8 s; the spread is not "
                         "computed (the cost grows with the cube of the number of toleranced parts)")
    notes.append(f"{fitting} of the {asked} samples asked (settings.mc_samples) were drawn: all {asked} would take "
                 f"about {seconds:.0f} s, past the bound of about 8 s; percentiles and yield are from {fitting} "
                 "samples")
    return fitting
SENSITIVITY_STEP = 1e-4
METRIC_KEYS = ("gain_db", "peak_gain_db", "peaking_db", "f_low_3db_hz", "f_high_3db_hz", "phase_margin_deg")
WORST_CASE_KEYS = ("gain_db", "f_low_3db_hz", "f_high_3db_hz")
# The metrics read from the whole sweep (the others are point gains or loop figures).
BAND_METRICS = ("peak_gain_db", "peaking_db", "f_low_3db_hz", "f_high_3db_hz")
HALF_POWER_DB = 10.0 * math.log10(2.0)  # the "−3 dB" corner is the half-power point, 3.0103 dB down


@dataclass(frozen=True, slots=True)
class ToleranceModel:
    """The drive-attached pencil and the pattern of every toleranced part, built once.

    Part k adds ``(m_k^powers_k − 1)·coefficients_k·left[:, k]·right[:, k]ᵀ`` to G, or to C where
    ``capacitive[k]`` (:meth:`matrices` sums them without storing a (parts, n, n) array).
    ``powers`` is −1 for resistors (their conductance is stamped).
    """

    g0: NDArray[np.float64]
    c0: NDArray[np.float64]
    b: NDArray[np.float64]
    output: int
    refs: tuple[str, ...]
    tol: NDArray[np.float64]
    powers: NDArray[np.float64]
    left: NDArray[np.float64]
    right: NDArray[np.float64]
    coefficients: NDArray[np.float64]
    capacitive: NDArray[np.bool_]
    opamps: tuple[OpampStates, ...]
    notes: tuple[str, ...]

    @property
    def size(self) -> int:
        return int(self.g0.shape[0])

    def matrices(self, multipliers: NDArray[np.float64]) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        """G and C of every sample: multipliers (samples, parts) -> two (samples, n, n) arrays."""
        scale = (multipliers ** self.powers[None, :] - 1.0) * self.coefficients[None, :]
        # Σ_k scale_k·left_k·right_kᵀ as (samples, n, parts) @ (parts, n): the rank-one patterns
        # are never stored as (parts, n, n), which for 800 parts of a 400-section ladder was 2 GB.
        g = self.g0[None] + (self.left[None, :, :] * np.where(self.capacitive, 0.0, scale)[:, None, :]) @ self.right.T
        c = self.c0[None] + (self.left[None, :, :] * np.where(self.capacitive, scale, 0.0)[:, None, :]) @ self.right.T
        return g, c


def tolerance_model(system: StageSystem, *, current_drive: bool) -> ToleranceModel:
    """Collect the patterns of the system's toleranced parts (R, C, L, vcvs, vccs).

    Current-controlled sources are held at their nominal gain: their coefficient also depends on
    the controlling part, which the element records do not name; the notes say so.
    """
    driven = drive(system, current_drive)
    n = driven.g.shape[0]
    refs: list[str] = []
    tols: list[float] = []
    powers: list[float] = []
    lefts: list[NDArray[np.float64]] = []
    rights: list[NDArray[np.float64]] = []
    coefficients: list[float] = []
    capacitive: list[bool] = []
    notes: list[str] = []

    def difference(plus: int, minus: int) -> NDArray[np.float64]:
        vector = np.zeros(n)
        if plus >= 0:
            vector[plus] += 1.0
        if minus >= 0:
            vector[minus] -= 1.0
        return vector

    for element in system.elements:
        if element.tol is None or element.tol == 0:
            continue
        nodes = element.nodes
        # Every stamp is rank one: coefficient · left · rightᵀ in G or in C (see mna).
        if element.type in ("R", "C"):
            left = right = difference(nodes[0], nodes[1])
            coefficient = 1.0 / element.value if element.type == "R" else element.value
            in_c = element.type == "C"
        elif element.type == "L":
            left = right = difference(element.row, -1)
            coefficient, in_c = -element.value, True
        elif element.type == "vcvs":
            left, right = difference(element.row, -1), difference(nodes[2], nodes[3])
            coefficient, in_c = -element.value, False
        elif element.type == "vccs":
            left, right = difference(nodes[0], nodes[1]), difference(nodes[2], nodes[3])
            coefficient, in_c = element.value, False
        elif element.type in ("ccvs", "cccs"):
            notes.append(f"{element.ref}: a current-controlled source is held at its nominal gain "
                         "(its coefficient also depends on the controlling part)")
            continue
        else:
            notes.append(f"{element.ref}: tolerance on a {element.type!r} part is not applied")
            continue
        refs.append(element.ref)
        tols.append(float(element.tol))
        powers.append(-1.0 if element.type == "R" else 1.0)
        lefts.append(left)
        rights.append(right)
        coefficients.append(coefficient)
        capacitive.append(in_c)
    count = len(refs)
    left_matrix = np.array(lefts).reshape(count, n).T
    right_matrix = np.array(rights).reshape(count, n).T
    weights = np.array(coefficients, dtype=float)
    mask = np.array(capacitive, dtype=bool)
    return ToleranceModel(
        g0=driven.g, c0=driven.c, b=driven.b, output=driven.output,
        refs=tuple(refs), tol=np.array(tols, dtype=float), powers=np.array(powers, dtype=float),
        left=left_matrix, right=right_matrix, coefficients=weights, capacitive=mask,
        opamps=system.opamps, notes=tuple(notes),
    )


def sample_multipliers(tol: NDArray[np.float64], samples: int, seed: int, distribution: str) -> NDArray[np.float64]:
    """Part multipliers (samples, parts): uniform within ±tol, or normal with σ = tol/3."""
    generator = np.random.default_rng(seed)
    if distribution == "uniform":
        return 1.0 + tol[None, :] * generator.uniform(-1.0, 1.0, size=(samples, tol.size))
    if distribution == "normal":
        return 1.0 + (tol[None, :] / 3.0) * generator.standard_normal(size=(samples, tol.size))
    raise ValueError(f'settings.mc_distribution: "{distribution}" is not "uniform" or "normal"')


def _solve_output(
    g: NDArray[np.float64], c: NDArray[np.float64], rhs_row: NDArray[np.float64] | int, read: Callable[[NDArray[np.complex128]], NDArray[np.complex128]],
    f_hz: NDArray[np.float64],
) -> NDArray[np.complex128]:
    """Solve every sample at every frequency, chunked over samples; returns read(x) per (sample, f).

    ``f_hz`` is (frequencies,) shared by all samples, or (samples, k) per sample. ``rhs_row``
    is a full right-hand side vector, or the index of a unit injection.
    """
    count, n = g.shape[0], g.shape[1]
    per_sample = f_hz.ndim == 2
    width = f_hz.shape[-1]
    chunk = max(1, int(CHUNK_BYTES // (width * n * n * 16)))
    out = np.empty((count, width), dtype=complex)

    def solve_rows(start: int, stop: int) -> None:  # a chunk of many samples, bounded memory
        frequencies = f_hz[start:stop] if per_sample else f_hz[None, :]
        s = 1j * TWO_PI * frequencies
        matrices = g[start:stop, None, :, :] + s[:, :, None, None] * c[start:stop, None, :, :]
        rhs = np.zeros((stop - start, width, n, 1), dtype=complex)
        if isinstance(rhs_row, int):
            rhs[:, :, rhs_row, 0] = 1.0
        else:
            rhs[:, :, :, 0] = rhs_row
        try:
            x = np.linalg.solve(matrices, rhs)[..., 0]
        except np.linalg.LinAlgError as error:
            raise CircuitError("a sampled circuit cannot be solved (singular matrix): "
                               "a tolerance drives a part to zero or the circuit floats") from error
        out[start:stop] = read(np.asarray(x, dtype=complex))

    _in_chunks(count, chunk, solve_rows, width)
    return out


def _merged_terms(model: ToleranceModel) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """Parts with the same rank-one direction (R ∥ C on one node pair) share one term.

    Returns the distinct ``left``, ``right`` columns (n, Q) and the (P, Q) 0/1 matrix that sums
    each part's coefficient into its term: the update stays exact with fewer terms.
    """
    if not model.refs:
        return model.left, model.right, np.zeros((0, 0))
    stacked = np.vstack([model.left, model.right])  # (2n, P)
    # The outer product is unchanged by negating both vectors: make the first nonzero positive.
    first = np.argmax(stacked != 0, axis=0)
    signs = np.sign(stacked[first, np.arange(stacked.shape[1])])
    signs[signs == 0] = 1.0
    _, representative, inverse = np.unique((stacked * signs).T, axis=0, return_index=True, return_inverse=True)
    inverse = np.asarray(inverse).ravel()
    groups = np.zeros((len(model.refs), representative.size))
    groups[np.arange(len(model.refs)), inverse] = signs * signs  # 1: the sign appears twice
    left = model.left[:, representative] * signs[representative]
    right = model.right[:, representative] * signs[representative]
    return left, right, groups


def _woodbury_output(
    model: ToleranceModel, g0: NDArray[np.float64], c0: NDArray[np.float64], rhs: NDArray[np.float64],
    out_vectors: NDArray[np.float64], multipliers: NDArray[np.float64], f_hz: NDArray[np.float64],
    meter: Meter | None = None,
) -> NDArray[np.complex128]:
    """``out_vectorᵀ·M(m, s)⁻¹·rhs`` for every sample and frequency, by a low-rank update.

    ``M(m, s) = M0(s) + L·D(m, s)·Rᵀ`` with one rank-one term per toleranced part (Woodbury):
    ``M⁻¹ = M0⁻¹ − M0⁻¹·L·(I + D·Rᵀ·M0⁻¹·L)⁻¹·D·Rᵀ·M0⁻¹``. The nominal solves are done once per
    frequency; each sample then costs a (parts × parts) solve instead of an (n × n) one.
    ``out_vectors`` is one readout (n,), giving (samples, frequencies), or several (k, n),
    giving (k, samples, frequencies): the solves are shared, only the readouts differ.

    References
    ----------
    M. A. Woodbury, "Inverting modified matrices", Memorandum Report 42, Statistical Research
    Group, Princeton University, 1950.
    """
    single = out_vectors.ndim == 1
    readers = np.atleast_2d(out_vectors)
    left, right, groups = _merged_terms(model)
    parts = left.shape[1]
    s = 1j * TWO_PI * f_hz
    nominal = g0[None, :, :] + s[:, None, None] * c0[None, :, :]
    right_hand = np.concatenate([rhs[:, None], left], axis=1).astype(complex)
    try:
        solved = np.linalg.solve(nominal, np.broadcast_to(right_hand, (f_hz.size,) + right_hand.shape))
    except np.linalg.LinAlgError as error:
        raise CircuitError("the nominal circuit cannot be solved (singular matrix): a floating node "
                           "or a loop of voltage sources") from error
    x0, z = solved[:, :, 0], solved[:, :, 1:]
    y0 = [x0 @ reader for reader in readers]  # (F,) each
    count = multipliers.shape[0]
    out = np.empty((len(readers), count, f_hz.size), dtype=complex)
    if parts == 0:
        out[...] = np.array(y0)[:, None, :]
        if meter is not None:
            meter.advance(count)
        return out[0] if single else out
    h = [np.einsum("n,fnp->fp", reader, z) for reader in readers]
    kernel = np.einsum("nq,fnp->fqp", right, z)  # Rᵀ·M0⁻¹·L, (F, Q, Q)
    w = x0 @ right  # Rᵀ·M0⁻¹·rhs, (F, Q)
    # d_q(sample, s) = a_q + s·b_q: the G-parts and the C-parts of each term, per sample.
    weighted = (multipliers ** model.powers[None, :] - 1.0) * model.coefficients[None, :]  # (S, P)
    constant = (weighted * ~model.capacitive[None, :]) @ groups  # (S, Q)
    slope = (weighted * model.capacitive[None, :]) @ groups  # (S, Q)
    chunk = max(1, int(CHUNK_BYTES // (f_hz.size * parts * parts * 16)))
    def solve_rows(start: int, stop: int) -> None:  # a chunk of many samples, bounded memory
        d = constant[start:stop, None, :] + s[None, :, None] * slope[start:stop, None, :]  # (S, F, Q)
        system = d[..., :, None] * kernel[None, :, :, :]
        np.einsum("...ii->...i", system)[...] += 1.0  # I + D·K, in place on the diagonal
        try:
            v = np.linalg.solve(system, (d * w[None, :, :])[..., None])[..., 0]
        except np.linalg.LinAlgError as error:
            raise CircuitError("a sampled circuit cannot be solved (singular matrix): "
                               "a tolerance drives a part to zero or the circuit floats") from error
        for number in range(len(readers)):  # one readout each: the solve above is shared
            out[number, start:stop] = y0[number][None, :] - np.einsum("fp,sfp->sf", h[number], v)

    _in_chunks(count, chunk, solve_rows, f_hz.size, meter)
    return out[0] if single else out


def sampled_response(model: ToleranceModel, multipliers: NDArray[np.float64],
                     f_hz: NDArray[np.float64], outputs: Sequence[int] | None = None,
                     meter: Meter | None = None) -> NDArray[np.complex128]:
    """Drive -> output transfer of every sample: shape (samples, frequencies).

    ``f_hz`` is shared (frequencies,): low-rank updates of the nominal solves; or per sample
    (samples, k): dense solves of each sample's matrices. ``outputs`` (shared frequencies
    only): read these unknowns instead of the model's output, from the same solves; the shape
    is then (outputs, samples, frequencies).
    """
    f_hz = np.asarray(f_hz, dtype=float)
    if outputs is not None:
        readers = np.array([_unit(model.size, index) for index in outputs]).reshape(len(outputs), model.size)
        return _woodbury_output(model, model.g0, model.c0, model.b, readers, multipliers, f_hz, meter)
    if f_hz.ndim == 1:
        return _woodbury_output(model, model.g0, model.c0, model.b, _unit(model.size, model.output),
                                multipliers, f_hz, meter)
    g, c = model.matrices(multipliers)
    output = model.output
    return _solve_output(g, c, model.b, lambda x: x[..., output], f_hz)


def _unit(size: int, index: int) -> NDArray[np.float64]:
    vector = np.zeros(size)
    vector[index] = 1.0
    return vector


def _returned_vector(size: int, opamp: OpampStates) -> NDArray[np.float64]:
    """The functional −(v+ − v−) that reads the returned signal of a broken loop."""
    vector = np.zeros(size)
    if opamp.in_plus >= 0:
        vector[opamp.in_plus] -= 1.0
    if opamp.in_minus >= 0:
        vector[opamp.in_minus] += 1.0
    return vector


def _broken_g(g: NDArray[np.float64], opamp: OpampStates) -> NDArray[np.float64]:
    """G (one matrix or a stack) with the op-amp's ``−(v+ − v−)`` state-row entries removed."""
    opened = g.copy()
    if opamp.in_plus >= 0:
        opened[..., opamp.state_row, opamp.in_plus] += 1.0
    if opamp.in_minus >= 0:
        opened[..., opamp.state_row, opamp.in_minus] -= 1.0
    return opened


def _loop_values(model: ToleranceModel, multipliers: NDArray[np.float64], opamp: OpampStates,
                 f_hz: NDArray[np.float64]) -> NDArray[np.complex128]:
    """Loop gain T = −(v+ − v−)/u with the loop broken at the op-amp's state row (see loops),
    for every sample: shared frequencies (low-rank updates) or per-sample ones (dense)."""
    f_hz = np.asarray(f_hz, dtype=float)
    reader = _returned_vector(model.size, opamp)
    if f_hz.ndim == 1:
        return _woodbury_output(model, _broken_g(model.g0, opamp), model.c0, _unit(model.size, opamp.state_row),
                                reader, multipliers, f_hz)
    g, c = model.matrices(multipliers)
    return _solve_output(_broken_g(g, opamp), c, opamp.state_row, lambda x: x @ reader, f_hz)


def _refine(
    evaluate: Callable[[NDArray[np.intp], NDArray[np.float64]], NDArray[np.float64]],
    low_hz: NDArray[np.float64], high_hz: NDArray[np.float64],
    value_low: NDArray[np.float64], value_high: NDArray[np.float64],
    estimate: tuple[NDArray[np.float64], NDArray[np.float64]] | None = None,
) -> NDArray[np.float64]:
    """Root of every row inside its bracket, in ln f: safeguarded secant, else Illinois regula falsi.

    ``evaluate(rows, f)`` gives the function at frequencies ``f`` for those rows (indices into
    the brackets). ``estimate``, when given, is ``(ln f, d ln f / d value)`` at the root of each
    row as interpolated from the grid (:func:`_inverse_cubic`; NaN where there is none): the
    first point is that estimate and the second a Newton step from it with that slope. After
    that each point is the secant through the last two points when it falls strictly inside
    the bracket, else the Illinois point of the bracket; the bracket (a sign change) is kept
    throughout, so the root never leaves it. Rows stop once their step is below 1e-10 in ln f;
    unfinished NaN brackets stay NaN. A row whose next point lies within 1e-10 of its last one
    ends at that point without a solve there: the solve would only confirm the stop (a caller
    needing the value at the root evaluates it once, for all rows together).

    References
    ----------
    T. J. Dekker, "Finding a zero by means of successive linear interpolation", in
    Constructive Aspects of the Fundamental Theorem of Algebra, Wiley, 1969 (secant steps kept
    inside a bracket).
    """
    valid = np.isfinite(low_hz) & np.isfinite(high_hz)
    a = np.where(valid, np.log(np.where(valid, low_hz, 1.0)), 0.0)
    b = np.where(valid, np.log(np.where(valid, high_hz, 1.0)), 0.0)
    fa = np.where(valid, value_low, -1.0)
    fb = np.where(valid, value_high, 1.0)
    previous = np.full(a.shape, np.nan)  # the point before b and its value (for the secant)
    f_previous = np.full(a.shape, np.nan)
    guess = slope = np.full(a.shape, np.nan)
    if estimate is not None:
        guess, slope = estimate
    active = np.flatnonzero(valid & (fb != 0))
    for step in range(REFINE_STEPS):  # iterations of the root finder, each one batched solve
        if active.size == 0:
            break
        a_, b_, fa_, fb_ = a[active], b[active], fa[active], fb[active]
        p_, fp_ = previous[active], f_previous[active]
        denominator = fb_ - fa_
        safe = np.abs(denominator) > 0
        x = np.where(safe, b_ - fb_ * (b_ - a_) / np.where(safe, denominator, 1.0), b_)
        with np.errstate(invalid="ignore", divide="ignore"):
            if step == 0:
                candidate = guess[active]
            elif step == 1:
                candidate = np.where(np.isfinite(guess[active]), b_ - fb_ * slope[active], np.nan)
            else:
                candidate = b_ - fb_ * (b_ - p_) / (fb_ - fp_)
        inside = np.isfinite(candidate) & (candidate > np.minimum(a_, b_)) & (candidate < np.maximum(a_, b_))
        x = np.where(inside, candidate, x)
        converged = np.abs(x - b_) <= 1e-10
        b[active[converged]] = x[converged]
        stepping = ~converged
        active, x, a_, b_, fa_, fb_ = (v[stepping] for v in (active, x, a_, b_, fa_, fb_))
        if active.size == 0:
            break
        fx = evaluate(active, np.exp(x))
        crossed = np.sign(fx) != np.sign(fb_)
        # The old b becomes the other end when the root lies between; else halve the retained
        # end's value (Illinois), so the bracket keeps shrinking from both sides.
        a[active] = np.where(crossed, b_, a_)
        fa[active] = np.where(crossed, fb_, fa_ / 2.0)
        previous[active], f_previous[active] = b_, fb_
        b[active], fb[active] = x, fx
        active = active[(fx != 0) & np.isfinite(fx)]
    return np.where(valid, np.exp(b), np.nan)


def _inverse_cubic(ln_f: NDArray[np.float64], values: NDArray[np.float64],
                   left: NDArray[np.intp]) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Estimate of each row's root from the four grid values around its bracket, for ``_refine``.

    ``left`` is the grid index of each row's bracket (root between ``left`` and ``left + 1``).
    ln f is interpolated as a cubic in the value through the four nearest grid points (inverse
    Lagrange interpolation) and read at value 0: returns ``(ln f, d ln f / d value)`` there,
    NaN where those four values are not strictly monotone (the inverse does not exist).
    """
    start = np.clip(left - 1, 0, ln_f.size - 4)
    index = start[:, None] + np.arange(4)[None, :]
    x = ln_f[index]
    v = values[np.arange(values.shape[0])[:, None], index]
    steps = np.diff(v, axis=1)
    monotone = np.all(steps > 0, axis=1) | np.all(steps < 0, axis=1)
    root = np.zeros(v.shape[0])
    slope = np.zeros(v.shape[0])
    with np.errstate(invalid="ignore", divide="ignore"):
        for i in range(4):
            # Lagrange basis at 0, L_i(0) = Π_{j≠i} v_j / (v_j − v_i), and its derivative
            # L_i'(0) = L_i(0)·Σ_{j≠i} −1/v_j.
            basis = np.ones(v.shape[0])
            log_derivative = np.zeros(v.shape[0])
            for j in range(4):
                if j != i:
                    basis *= v[:, j] / (v[:, j] - v[:, i])
                    log_derivative -= 1.0 / v[:, j]
            root += x[:, i] * basis
            slope += x[:, i] * basis * log_derivative
    usable = monotone & np.isfinite(root) & np.isfinite(slope)
    return np.where(usable, root, np.nan), np.where(usable, slope, np.nan)


def corners_3db(
    f_hz: NDArray[np.float64], mag_db: NDArray[np.float64], ref_index: int, ref_db: NDArray[np.float64]
) -> tuple[tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]],
           tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]]:
    """Brackets of the −3 dB corners below and above ``f_hz[ref_index]`` for every row.

    Returns ``(low bracket, high bracket)``, each ``(f_a, f_b, v_a, v_b)`` with
    ``v = mag_db − (ref_db − 10·log10 2)`` at the bracket ends (half power); NaN where the
    response does not fall that far below the reference on that side within the grid.
    """
    below = mag_db < (ref_db[:, None] - HALF_POWER_DB)
    rows = np.arange(mag_db.shape[0])
    excess = mag_db - (ref_db[:, None] - HALF_POWER_DB)
    # High corner: first grid point above ref that is 3 dB down.
    upper = below[:, ref_index:]
    has_high = upper.any(axis=1)
    first = ref_index + np.argmax(upper, axis=1)
    hi_b = np.where(has_high, f_hz[first], np.nan)
    hi_a = np.where(has_high, f_hz[np.maximum(first - 1, 0)], np.nan)
    hv_b = excess[rows, first]
    hv_a = excess[rows, np.maximum(first - 1, 0)]
    # Low corner: last grid point below ref that is 3 dB down.
    lower = below[:, : ref_index + 1][:, ::-1]
    has_low = lower.any(axis=1)
    last = ref_index - np.argmax(lower, axis=1)
    lo_a = np.where(has_low, f_hz[last], np.nan)
    lo_b = np.where(has_low, f_hz[np.minimum(last + 1, f_hz.size - 1)], np.nan)
    lv_a = excess[rows, last]
    lv_b = excess[rows, np.minimum(last + 1, f_hz.size - 1)]
    return (lo_a, lo_b, lv_a, lv_b), (hi_a, hi_b, hv_a, hv_b)


@dataclass(frozen=True, slots=True)
class SpreadSamples:
    """Per-sample values (one row per sample) for yield functions and plots.

    NaN marks a metric that does not exist for that sample (no corner within the grid, no
    crossover). ``phase_margin_deg`` maps op-amp ref -> (samples,) array.
    """

    multipliers: NDArray[np.float64]
    f_hz: NDArray[np.float64]
    response: NDArray[np.complex128]
    ref_hz: float
    gain_db: NDArray[np.float64]
    peak_gain_db: NDArray[np.float64]
    peaking_db: NDArray[np.float64]
    f_low_3db_hz: NDArray[np.float64]
    f_high_3db_hz: NDArray[np.float64]
    phase_margin_deg: dict[str, NDArray[np.float64]]
    extra_f_hz: NDArray[np.float64]
    extra_response: NDArray[np.complex128]
    pass_gain_db: NDArray[np.float64] | None = None  # each sample's pass-band gain (corners' reference)
    # False for a sample with a pole right of the jω axis: it meets no limit (None: not decided).
    stable: NDArray[np.bool_] | None = None
    # False when only point gains were evaluated (the checks of this place read no band figure):
    # then ``response`` is empty and the band metrics are not available (``metric`` says so).
    band: bool = True

    def metric(self, key: str, at_hz: float | None = None, opamp: str | None = None) -> NDArray[np.float64]:
        """The samples of a metric named by a DESIGN section 6 key (see ``METRIC_KEYS``).

        ``gain_db`` with ``at_hz`` reads the gain at that frequency (it must have been asked for
        through a :class:`YieldLimit`); ``phase_margin_deg`` without ``opamp`` is the smallest
        margin of all op-amps in each sample.
        """
        if key == "gain_db" and at_hz is not None and at_hz != self.ref_hz:
            where = np.flatnonzero(np.isclose(self.extra_f_hz, at_hz, rtol=1e-12))
            if where.size == 0:
                raise KeyError(f"gain_db at {at_hz:g} Hz was not evaluated")
            values: NDArray[np.float64] = 20.0 * np.log10(np.abs(self.extra_response[:, int(where[0])]))
            return values
        if key == "phase_margin_deg":
            if opamp is not None:
                if opamp not in self.phase_margin_deg:
                    raise KeyError(f"op-amp {opamp} has no loop crossover at nominal, so its phase margin is "
                                   "not sampled")
                return self.phase_margin_deg[opamp]
            if not self.phase_margin_deg:
                return np.full(self.gain_db.shape, np.nan)
            return np.asarray(np.min(np.vstack(list(self.phase_margin_deg.values())), axis=0), dtype=float)
        if key in BAND_METRICS and not self.band:
            raise KeyError(f"{key} was not evaluated at this place (only point gains were asked for)")
        if key in ("gain_db", "peak_gain_db", "peaking_db", "f_low_3db_hz", "f_high_3db_hz"):
            return np.asarray(getattr(self, key), dtype=float)
        raise KeyError(f'"{key}" is not a metric of the spread analysis')


@dataclass(frozen=True, slots=True)
class YieldLimit:
    """One limit for the yield: a named metric (or a function of the samples) within [min, max].

    ``metric`` is one of ``METRIC_KEYS``; ``at_hz`` (for ``gain_db``) and ``opamp`` (for
    ``phase_margin_deg``) say where. ``function``, when given, replaces the named metric: it maps
    the :class:`SpreadSamples` to one value per sample. A sample whose metric does not exist
    (NaN) fails the limit.
    """

    metric: str
    min: float | None = None
    max: float | None = None
    at_hz: float | None = None
    opamp: str | None = None
    label: str = ""
    function: Callable[[SpreadSamples], NDArray[np.float64]] | None = None

    def values(self, samples: SpreadSamples) -> NDArray[np.float64]:
        if self.function is not None:
            return np.asarray(self.function(samples), dtype=float)
        return samples.metric(self.metric, self.at_hz, self.opamp)

    def met(self, samples: SpreadSamples) -> NDArray[np.bool_]:
        values = self.values(samples)
        ok = np.isfinite(values)
        if samples.stable is not None:
            ok &= samples.stable  # a sample that cannot settle meets nothing
        if self.min is not None:
            ok &= values >= self.min
        if self.max is not None:
            ok &= values <= self.max
        return ok


@dataclass(frozen=True, slots=True)
class MetricSpread:
    """Distribution of one scalar metric over the samples (NaN samples left out, counted)."""

    key: str
    unit: str
    nominal: float | None
    mean: float | None
    std: float | None
    minimum: float | None
    maximum: float | None
    percentiles: dict[float, float]
    defined_count: int
    why: str | None


@dataclass(frozen=True, slots=True)
class WorstCase:
    """Extreme vertices of one metric chosen from sensitivity signs, and their evaluation.

    ``low_vertex``/``high_vertex`` map each part ref to −1, 0 or +1 (its tolerance sign);
    ``confirmed`` is True when no Monte Carlo sample went beyond the evaluated vertices.
    """

    key: str
    nominal: float | None
    low: float | None
    high: float | None
    sensitivity: dict[str, float]
    low_vertex: dict[str, int]
    high_vertex: dict[str, int]
    confirmed: bool | None
    why: str | None


@dataclass(frozen=True, slots=True)
class SpreadResult:
    """Monte Carlo spread, envelopes, worst case and yield of one system."""

    seed: int
    samples: int
    distribution: str
    parts: tuple[str, ...]
    tolerances: tuple[float, ...]
    f_hz: NDArray[np.float64]
    percentile_levels: tuple[float, ...]
    nominal_mag_db: NDArray[np.float64]
    nominal_phase_deg: NDArray[np.float64]
    mag_db_min: NDArray[np.float64]
    mag_db_max: NDArray[np.float64]
    mag_db_percentiles: NDArray[np.float64]  # (levels, frequencies)
    phase_deg_min: NDArray[np.float64]
    phase_deg_max: NDArray[np.float64]
    phase_deg_percentiles: NDArray[np.float64]
    metrics: dict[str, MetricSpread]
    worst_case: dict[str, WorstCase]
    yield_pct: float | None
    yield_why: str | None
    limit_pass_pct: tuple[tuple[str, float], ...]
    sample_values: SpreadSamples
    limit_pass_count: tuple[tuple[str, int], ...] = ()
    not_evaluated: tuple[tuple[str, str], ...] = ()
    notes: tuple[str, ...] = field(default_factory=tuple)
    # The per-sample values at the other outputs asked for (``monte_carlo(readouts=...)``).
    readouts: dict[str, SpreadSamples] = field(default_factory=dict)


@dataclass(frozen=True, slots=True)
class Passband:
    """Where each sample's pass-band gain is read (the nominal's pass-band reference kind).

    ``kind`` is ``"dc"`` (read at ``f_hz``, far below every root: the DC gain; no lower corner),
    ``"hf"`` (far above every root: the high-frequency gain; no upper corner) or ``"at"`` (the
    mid-band or ``ref_hz`` frequency ``f_hz``), as :func:`stagewise.engine.metrics.passband_reference`
    decides for the nominal circuit.
    """

    kind: str
    f_hz: float


def _nominal_passband(system: StageSystem, project: Project, current_drive: bool, f_hz: NDArray[np.float64],
                      poles: NDArray[np.complex128] | None) -> tuple[Passband | None, NDArray[np.complex128] | None]:
    """The nominal circuit's pass-band reference as a :class:`Passband` (None when it has none),
    and the pencil's poles for another output of the same system.

    ``poles``: the pencil's poles when already known (another output's), so they are not
    computed again; the second value gives them back (None when they are not known).
    """
    from stagewise.engine.metrics import passband_reference  # noqa: PLC0415
    from stagewise.engine.stage import analyze_system  # noqa: PLC0415

    analysis = analyze_system(drive(system, current_drive), f_hz, poles=poles)
    reference = passband_reference(analysis, project.settings)
    model = analysis.roots_model  # above the size limit: the poles alone
    known = None if model is None else model.all_poles_rad_s
    if reference.kind is None or model is None:
        return None, known
    return _passband_of(reference.kind, reference.f_hz, model, f_hz), known


def _passband_of(kind: str, reference_hz: float | None, model: PoleZeroModel, f_hz: NDArray[np.float64]) -> Passband:
    """Where each sample's pass-band gain is read, for a nominal reference of ``kind``."""
    roots = np.abs(np.concatenate([model.poles_rad_s, model.zeros_rad_s])) / (2.0 * math.pi)
    roots = roots[roots > 0]
    if kind == "dc":
        low = min(float(np.min(roots)) if roots.size else float(f_hz[0]), float(f_hz[0]))
        return Passband("dc", low * 1e-6)
    if kind == "hf":
        high = max(float(np.max(roots)) if roots.size else float(f_hz[-1]), float(f_hz[-1]))
        return Passband("hf", high * 1e6)
    return Passband("at", float(reference_hz or f_hz[0]))


@dataclass(frozen=True, slots=True)
class _Readout:
    """One output of a sampled system and where its metrics are read (see ``_evaluate_readouts``).

    ``band``: the whole sweep and the band metrics (peak, peaking, corners) are wanted; when
    False only the gains at ``ref_hz``, ``extra_f_hz`` and the pass band are solved.
    """

    output: int
    ref_hz: float
    extra_f_hz: NDArray[np.float64]
    passband: Passband | None
    band: bool = True


def _evaluate_samples(
    model: ToleranceModel, multipliers: NDArray[np.float64], f_hz: NDArray[np.float64], ref_hz: float,
    extra_f_hz: NDArray[np.float64], loop_grids: dict[str, tuple[NDArray[np.float64], float]],
    passband: Passband | None = None, meter: Meter | None = None,
) -> SpreadSamples:
    """All metrics of all samples at the model's output (see :func:`_evaluate_readouts`)."""
    readout = _Readout(model.output, ref_hz, extra_f_hz, passband)
    return _evaluate_readouts(model, multipliers, f_hz, [readout], loop_grids, meter)[0]


def _evaluate_readouts(
    model: ToleranceModel, multipliers: NDArray[np.float64], f_hz: NDArray[np.float64],
    readouts: Sequence[_Readout], loop_grids: dict[str, tuple[NDArray[np.float64], float]],
    meter: Meter | None = None,
) -> list[SpreadSamples]:
    """The metrics of all samples at several outputs of one system: one batched sweep shared by
    every output, then batched corner refinement per output; the phase margins (a property of
    the system, not of the output) once.

    Corners and peaking are taken against each sample's pass-band gain where the readout's
    ``passband`` is given (read where the nominal's reference is), else against the gain at
    ``ref_hz``. A meter counts :func:`_readout_units` (planned by the caller): one pass for the
    sweep, one for the corners, one for the loops.
    """
    count = multipliers.shape[0]
    band = any(readout.band for readout in readouts)
    pieces: list[NDArray[np.float64]] = [f_hz] if band else []
    offsets: list[int] = []
    for readout in readouts:  # each readout's point frequencies after the shared sweep
        offsets.append(sum(piece.size for piece in pieces))
        pass_f = [] if readout.passband is None else [readout.passband.f_hz]
        pieces.append(np.concatenate([[readout.ref_hz], readout.extra_f_hz, pass_f]))
    grid = np.concatenate(pieces)
    base = 0 if meter is None else meter.done
    swept = sampled_response(model, multipliers, grid, [readout.output for readout in readouts], meter)
    dense = _DenseCache(model, multipliers)
    results: list[SpreadSamples] = []
    for readout, offset, response_all in zip(readouts, offsets, swept, strict=True):
        extra_end = offset + 1 + readout.extra_f_hz.size
        ref_response = response_all[:, offset]
        extra = response_all[:, offset + 1: extra_end]
        with np.errstate(divide="ignore"):
            gain_db = 20.0 * np.log10(np.abs(ref_response))
            pass_db = gain_db if readout.passband is None else 20.0 * np.log10(np.abs(response_all[:, extra_end]))
        if readout.band:
            response = response_all[:, : f_hz.size]
            peak, corners = _band_metrics(replace(model, output=readout.output), dense, f_hz, response, pass_db,
                                          readout, meter)
        else:
            response = np.zeros((count, 0), dtype=complex)
            peak = np.full(count, np.nan)
            corners = [np.full(count, np.nan), np.full(count, np.nan)]
        results.append(SpreadSamples(
            multipliers=multipliers, f_hz=f_hz if readout.band else np.zeros(0), response=response,
            ref_hz=readout.ref_hz, gain_db=gain_db, peak_gain_db=peak, peaking_db=np.maximum(peak - pass_db, 0.0),
            f_low_3db_hz=corners[0], f_high_3db_hz=corners[1], phase_margin_deg={},
            extra_f_hz=readout.extra_f_hz, extra_response=extra, pass_gain_db=pass_db, band=readout.band,
        ))
    if meter is not None:  # the caller planned _readout_units of work for this call
        meter.finish_pass(base + count * (1 + band))
    margins = _sampled_phase_margins(model, multipliers, dense, loop_grids, meter)
    if meter is not None:
        meter.finish_pass(base + _readout_units(count, readouts, bool(loop_grids)))
    return [replace(result, phase_margin_deg=margins) for result in results]


def _band_metrics(
    model: ToleranceModel, dense: _DenseCache, f_hz: NDArray[np.float64], response: NDArray[np.complex128],
    pass_db: NDArray[np.float64], readout: _Readout, meter: Meter | None,
) -> tuple[NDArray[np.float64], list[NDArray[np.float64]]]:
    """Each sample's peak gain on the grid and its −3 dB corners, refined (both corners of every
    sample together, one batched solve per step)."""
    count = response.shape[0]
    passband = readout.passband
    with np.errstate(divide="ignore"):
        mag_db = 20.0 * np.log10(np.abs(response))
    peak = np.max(mag_db, axis=1)
    if passband is None or passband.kind == "at":
        anchor = readout.ref_hz if passband is None else passband.f_hz
        ref_index = int(np.argmin(np.abs(np.log(f_hz / anchor))))
    else:
        ref_index = 0 if passband.kind == "dc" else f_hz.size - 1
    (lo_a, lo_b, lv_a, lv_b), (hi_a, hi_b, hv_a, hv_b) = corners_3db(f_hz, mag_db, ref_index, pass_db)
    if passband is not None and passband.kind == "dc":
        lo_a = np.full_like(lo_a, np.nan)  # the pass band reaches DC: no lower corner
    if passband is not None and passband.kind == "hf":
        hi_a = np.full_like(hi_a, np.nan)  # the pass band reaches infinity: no upper corner

    ln_f = np.log(f_hz)
    with np.errstate(invalid="ignore"):
        excess_grid = mag_db - (pass_db[:, None] - HALF_POWER_DB)
    low_rows, high_rows = np.flatnonzero(np.isfinite(lo_a)), np.flatnonzero(np.isfinite(hi_a))
    rows = np.concatenate([low_rows, high_rows])
    f_a, f_b = np.concatenate([lo_a[low_rows], hi_a[high_rows]]), np.concatenate([lo_b[low_rows], hi_b[high_rows]])
    v_a, v_b = np.concatenate([lv_a[low_rows], hv_a[high_rows]]), np.concatenate([lv_b[low_rows], hv_b[high_rows]])
    found = np.zeros(0)
    if rows.size:
        g, c = dense.matrices()
        target = pass_db[rows] - HALF_POWER_DB
        output = _unit(model.size, model.output)

        def excess(subset: NDArray[np.intp], frequencies: NDArray[np.float64]) -> NDArray[np.float64]:
            if meter is not None:
                meter.check()
            values = _dense_readout(g, c, rows[subset], rows[subset], model.b, output, frequencies)
            with np.errstate(divide="ignore"):
                result: NDArray[np.float64] = 20.0 * np.log10(np.abs(values)) - target[subset]
            return result

        left = np.minimum(np.searchsorted(f_hz, f_a), np.searchsorted(f_hz, f_b))
        found = _refine(excess, f_a, f_b, v_a, v_b, _inverse_cubic(ln_f, excess_grid[rows], left))
    corners = [np.full(count, np.nan), np.full(count, np.nan)]
    corners[0][low_rows] = found[: low_rows.size]
    corners[1][high_rows] = found[low_rows.size:]
    return peak, corners


class _DenseCache:
    """The sampled dense matrices, built on first use (only root refinement needs them)."""

    def __init__(self, model: ToleranceModel, multipliers: NDArray[np.float64]) -> None:
        self.model = model
        self.multipliers = multipliers
        self.built: tuple[NDArray[np.float64], NDArray[np.float64]] | None = None

    def matrices(self) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        if self.built is None:
            self.built = self.model.matrices(self.multipliers)
        return self.built


def _dense_readout(
    g: NDArray[np.float64], c: NDArray[np.float64], g_index: NDArray[np.intp], c_index: NDArray[np.intp],
    rhs: NDArray[np.float64], reader: NDArray[np.float64], f_hz: NDArray[np.float64],
    unsolvable: str = "a sampled circuit cannot be solved (singular matrix): a tolerance drives a part to "
                      "zero or the circuit floats",
) -> NDArray[np.complex128]:
    """``reader_rᵀ·(G_r + j2πf_r·C_r)⁻¹·rhs_r`` for every row r, each at its own frequency.

    ``g`` and ``c`` are stacks (k, n, n) of real matrices; row r uses ``g[g_index[r]]`` and
    ``c[c_index[r]]``. ``rhs`` and ``reader`` are (n,) for every row or (rows, n) per row.
    Chunked over rows on the worker threads; a chunk's complex matrices are assembled for that
    chunk only. ``unsolvable`` is the sentence of the CircuitError for a singular matrix.
    """
    count, n = f_hz.size, g.shape[1]
    rhs_rows = np.broadcast_to(rhs, (count, n))
    reader_rows = np.broadcast_to(reader, (count, n))
    out = np.empty(count, dtype=complex)

    def solve_rows(start: int, stop: int) -> None:
        matrices = np.empty((stop - start, n, n), dtype=complex)
        matrices.real = g[g_index[start:stop]]
        matrices.imag = c[c_index[start:stop]] * (TWO_PI * f_hz[start:stop])[:, None, None]
        try:
            x = np.linalg.solve(matrices, rhs_rows[start:stop, :, None].astype(complex))[..., 0]
        except np.linalg.LinAlgError as error:
            raise CircuitError(unsolvable) from error
        out[start:stop] = np.einsum("rn,rn->r", x, reader_rows[start:stop])

    _in_chunks(count, max(1, int(CHUNK_BYTES // (n * n * 16))), solve_rows)
    return out


def _sampled_phase_margins(model: ToleranceModel, multipliers: NDArray[np.float64], dense: _DenseCache,
                           loop_grids: dict[str, tuple[NDArray[np.float64], float]],
                           meter: Meter | None = None) -> dict[str, NDArray[np.float64]]:
    """Phase margin of every op-amp in every sample: bracket |T| = 1 on the grid, refine, read ∠T.

    ``loop_grids`` maps op-amp ref -> (grid around its nominal crossover, nominal margin); the
    op-amps without one get no entry. The phase branch is the one nearest the nominal margin
    (tolerances move it by far less than 360°). A sample whose crossover leaves the grid (half a
    decade either side of nominal) gets NaN. The crossovers of all op-amps are refined together,
    one batched solve per step.
    """
    count, n = multipliers.shape[0], model.size
    opamps = [opamp for opamp in model.opamps if opamp.ref in loop_grids]
    margins = {opamp.ref: np.full(count, np.nan) for opamp in opamps}
    samples, slots, f_a, f_b, v_a, v_b, guesses, slopes = ([] for _ in range(8))
    for slot, opamp in enumerate(opamps):
        if meter is not None:
            meter.check()
        loop_grid = loop_grids[opamp.ref][0]
        magnitude = np.abs(_loop_values(model, multipliers, opamp, loop_grid))
        above = magnitude >= 1.0
        downward = above[:, :-1] & ~above[:, 1:]
        # The highest downward crossing of each sample.
        last = downward.shape[1] - 1 - np.argmax(downward[:, ::-1], axis=1)
        rows = np.flatnonzero(downward.any(axis=1))
        index = last[rows]
        with np.errstate(divide="ignore"):
            log_magnitude = np.log(magnitude[rows])
        guess, slope = _inverse_cubic(np.log(loop_grid), log_magnitude, index)
        samples.append(rows)
        slots.append(np.full(rows.size, slot))
        f_a.append(loop_grid[index])
        f_b.append(loop_grid[index + 1])
        v_a.append(log_magnitude[np.arange(rows.size), index])
        v_b.append(log_magnitude[np.arange(rows.size), index + 1])
        guesses.append(guess)
        slopes.append(slope)
    if not opamps:
        return margins
    sample, slot_of = np.concatenate(samples), np.concatenate(slots)
    if sample.size == 0:
        return margins
    g, c = dense.matrices()
    per_opamp = np.empty((len(opamps), count, n, n))
    for slot, opamp in enumerate(opamps):
        per_opamp[slot] = _broken_g(g, opamp)
    broken = per_opamp.reshape(-1, n, n)  # row slot·count + sample
    g_index = slot_of * count + sample
    injections = np.array([_unit(n, opamp.state_row) for opamp in opamps])[slot_of]
    readers = np.array([_returned_vector(n, opamp) for opamp in opamps])[slot_of]

    # T at each row's last solved point: the refinement stops within 1e-10 (in ln f) of it, the
    # tolerance of the crossover itself, so the phase is read there without a further solve.
    last_loop = np.full(sample.size, np.nan, dtype=complex)

    def loop_at(subset: NDArray[np.intp], frequencies: NDArray[np.float64]) -> NDArray[np.complex128]:
        return _dense_readout(broken, c, g_index[subset], sample[subset], injections[subset], readers[subset],
                              frequencies)

    def log_magnitude_at(subset: NDArray[np.intp], frequencies: NDArray[np.float64]) -> NDArray[np.float64]:
        if meter is not None:
            meter.check()
        loop = loop_at(subset, frequencies)
        last_loop[subset] = loop
        result: NDArray[np.float64] = np.log(np.abs(loop))
        return result

    crossover = _refine(log_magnitude_at, np.concatenate(f_a), np.concatenate(f_b), np.concatenate(v_a),
                        np.concatenate(v_b), (np.concatenate(guesses), np.concatenate(slopes)))
    unsolved = np.flatnonzero(np.isnan(last_loop))  # a root on a grid point: no solve was needed
    if unsolved.size:
        last_loop[unsolved] = loop_at(unsolved, crossover[unsolved])
    margin = 180.0 + np.degrees(np.angle(last_loop))
    nominal = np.array([loop_grids[opamp.ref][1] for opamp in opamps])[slot_of]
    margin -= 360.0 * np.round((margin - nominal) / 360.0)
    for slot, opamp in enumerate(opamps):
        mine = slot_of == slot
        margins[opamp.ref][sample[mine]] = margin[mine]
    return margins


def _metric_spread(key: str, unit: str, nominal: float, values: NDArray[np.float64],
                   levels: Sequence[float]) -> MetricSpread:
    defined = values[np.isfinite(values)]
    nominal_value = nominal if math.isfinite(nominal) else None
    if defined.size == 0:
        return MetricSpread(key, unit, nominal_value, None, None, None, None, {}, 0,
                            "no sample has it (no such corner or crossover on the grid)")
    why = None
    if defined.size < values.size:
        # The reason stands beside the metric's own name (its row), so it needs no key.
        why = f"{values.size - defined.size} of {values.size} samples have none; left out"
    return MetricSpread(
        key=key, unit=unit, nominal=nominal_value,
        mean=float(np.mean(defined)), std=float(np.std(defined, ddof=1)) if defined.size > 1 else 0.0,
        minimum=float(np.min(defined)), maximum=float(np.max(defined)),
        percentiles={float(level): float(np.percentile(defined, level)) for level in levels},
        defined_count=int(defined.size), why=why,
    )


def _default_loop_grids(model: ToleranceModel) -> dict[str, tuple[NDArray[np.float64], float]]:
    """Around each op-amp's nominal crossover: half a decade either side, 10 points per decade; with
    the nominal phase margin, which fixes the phase branch of every sample.

    The nominal crossover is found as the nominal loop analysis defines it (the loop broken at
    the op-amp's state row, the highest downward crossing of |T| = 1 on a log grid from 1/100 of
    the dominant pole to 1000 × the gain-bandwidth; none when |T| never falls through 1 there),
    for all op-amps at once: one batched solve of every search grid, then batched refinement.
    """
    opamps = model.opamps
    if not opamps:
        return {}
    n = model.size
    searches = []
    for opamp in opamps:
        gbw_hz = 1.0 / (TWO_PI * model.c0[opamp.state_row, opamp.state_row])
        searches.append(np.logspace(math.log10(gbw_hz / opamp.a0 / 100.0), math.log10(gbw_hz * 1000.0),
                                    int(math.log10(1e5 * opamp.a0)) * 40 + 1))
    broken = np.array([_broken_g(model.g0, opamp) for opamp in opamps])
    c0 = model.c0[None, :, :]
    injections = np.array([_unit(n, opamp.state_row) for opamp in opamps])
    readers = np.array([_returned_vector(n, opamp) for opamp in opamps])

    def loops_at(slots: NDArray[np.intp], f_hz: NDArray[np.float64]) -> NDArray[np.complex128]:
        return _dense_readout(broken, c0, slots, np.zeros(slots.size, dtype=np.intp), injections[slots],
                              readers[slots], f_hz)

    slot_of = np.concatenate([np.full(search.size, slot) for slot, search in enumerate(searches)])
    try:
        values = loops_at(slot_of, np.concatenate(searches))
    except CircuitError:
        for slot, opamp in enumerate(opamps):  # name the op-amp whose broken loop is singular
            try:
                loops_at(np.full(searches[slot].size, slot), searches[slot])
            except CircuitError as error:
                raise CircuitError(f"{opamp.ref}: the circuit with its loop broken cannot be solved "
                                   "(a floating node once the op-amp's input dependence is removed)") from error
        raise
    found: list[int] = []
    ends: list[tuple[float, float, float, float]] = []
    estimates: list[tuple[float, float]] = []
    branches: list[float] = []
    offset = 0
    for slot, search in enumerate(searches):
        loop = values[offset: offset + search.size]
        offset += search.size
        magnitude = np.abs(loop)
        above = magnitude >= 1.0
        downward = np.flatnonzero(above[:-1] & ~above[1:])
        if above[-1] or downward.size == 0:
            continue  # no crossover on the search grid: no margin to spread
        top = int(downward[-1])
        log_magnitude = np.log(magnitude)
        guess, slope = _inverse_cubic(np.log(search), log_magnitude[None, :], np.array([top]))
        found.append(slot)
        ends.append((float(search[top]), float(search[top + 1]), float(log_magnitude[top]),
                     float(log_magnitude[top + 1])))
        estimates.append((float(guess[0]), float(slope[0])))
        branches.append(float(np.unwrap(np.angle(loop))[top]))
    if not found:
        return {}
    slots = np.array(found, dtype=np.intp)
    low_hz, high_hz, value_low, value_high = (np.array(column) for column in zip(*ends, strict=True))
    last_loop = np.full(slots.size, np.nan, dtype=complex)

    def log_magnitude_at(subset: NDArray[np.intp], f_hz: NDArray[np.float64]) -> NDArray[np.float64]:
        loop = loops_at(slots[subset], f_hz)
        last_loop[subset] = loop
        result: NDArray[np.float64] = np.log(np.abs(loop))
        return result

    crossover = _refine(log_magnitude_at, low_hz, high_hz, value_low, value_high,
                        (np.array([e[0] for e in estimates]), np.array([e[1] for e in estimates])))
    unsolved = np.flatnonzero(np.isnan(last_loop))
    if unsolved.size:
        last_loop[unsolved] = loops_at(slots[unsolved], crossover[unsolved])
    grids: dict[str, tuple[NDArray[np.float64], float]] = {}
    for number, slot in enumerate(found):
        angle = float(np.angle(last_loop[number]))
        phase = angle + TWO_PI * round((branches[number] - angle) / TWO_PI)  # the grid's unwrapped branch
        centre = float(crossover[number])
        grid = np.logspace(math.log10(centre) - 0.5, math.log10(centre) + 0.5, 11)
        grids[opamps[slot].ref] = (grid, 180.0 + math.degrees(phase))
    return grids


@dataclass(frozen=True, slots=True)
class Readout:
    """Another output of the sampled system, read from the same solves and the same draws.

    ``output`` is the index of the unknown read (a stage's output interface in the merged
    chain); ``limits`` are the checks read there. Only what they need is evaluated there: point
    gains alone need no sweep; the band metrics (peak, peaking, corners) need the whole sweep.
    """

    output: int
    limits: tuple[YieldLimit, ...] = ()


# Limits that read no more than gains at points (and the pass-band gain): no sweep needed.
_POINT_METRICS = ("gain_db", "attenuation_db", "phase_margin_deg")


def _readout_plans(
    system: StageSystem, project: Project, model: ToleranceModel, current_drive: bool, f_hz: NDArray[np.float64],
    readouts: Sequence[Readout], always_band: int | None = None,
) -> list[_Readout]:
    """Where each readout's metrics are read: its reference frequency (``settings.ref_hz``, else
    its own nominal band maximum), the frequencies its limits name, and its pass band where a
    limit reads it. ``always_band``: the position of a readout whose band is wanted anyway."""
    settings = project.settings
    if settings.ref_hz is not None:
        references = [float(settings.ref_hz.si)] * len(readouts)
    else:  # the nominal band maximum of each output, one nominal sweep for all of them
        nominal = sampled_response(model, np.ones((1, len(model.refs))), f_hz,
                                   [readout.output for readout in readouts])[:, 0, :]
        references = [float(f_hz[int(np.argmax(np.abs(row)))]) for row in nominal]
    plans = []
    poles: NDArray[np.complex128] | None = None  # every readout's pencil is the system's: its poles once
    for number, (readout, ref_hz) in enumerate(zip(readouts, references, strict=True)):
        limits = readout.limits
        extra = np.array(sorted({float(limit.at_hz) for limit in limits if limit.at_hz is not None}), dtype=float)
        band = number == always_band or any(limit.metric not in _POINT_METRICS for limit in limits)
        needs_pass = band or any(limit.metric not in ("gain_db", "phase_margin_deg") for limit in limits)
        passband = None
        if needs_pass:
            passband, known = _nominal_passband(replace(system, output_index=readout.output), project,
                                                current_drive, f_hz, poles)
            poles = poles if poles is not None else known  # an output without a model keeps them
        plans.append(_Readout(readout.output, ref_hz, extra, passband, band))
    return plans


def _given_multipliers(model: ToleranceModel, multipliers_by_ref: Mapping[str, NDArray[np.float64]],
                       count: int) -> NDArray[np.float64]:
    missing = [ref for ref in model.refs if ref not in multipliers_by_ref]
    if missing:
        raise ValueError(f"no sampled values for {', '.join(missing)}")
    return np.column_stack([np.asarray(multipliers_by_ref[ref], dtype=float) for ref in model.refs]) \
        if model.refs else np.ones((count, 0))


def _readout_units(count: int, plans: Sequence[_Readout], loops: bool) -> int:
    """The meter's units of one ``_evaluate_readouts`` call: the sweep, the corners, the loops."""
    return count * (1 + any(plan.band for plan in plans) + loops)


def _stability_work(model: ToleranceModel, count: int) -> float:
    """The per-sample stability's work for ``count`` samples, in the units of ``WORK_BOUND``."""
    return float(count) * STABILITY_WORK * float(model.size) ** 3


def _stability_bounded(model: ToleranceModel, count: int) -> bool:
    """Whether the per-sample stability of ``count`` samples fits its share of the bound."""
    return _stability_work(model, count) <= WORK_BOUND / 4


def monte_carlo(
    system: StageSystem,
    project: Project,
    *,
    current_drive: bool,
    f_hz: NDArray[np.float64] | None = None,
    samples: int | None = None,
    seed: int | None = None,
    distribution: str | None = None,
    percentiles: Sequence[float] = DEFAULT_PERCENTILES,
    limits: Sequence[YieldLimit] = (),
    phase_margins: bool = True,
    worst_case: bool = True,
    multipliers_by_ref: Mapping[str, NDArray[np.float64]] | None = None,
    readouts: Mapping[str, Readout] | None = None,
    progress: Progress | None = None,
) -> SpreadResult:
    """Monte Carlo spread over part tolerances, worst case and yield.

    Parameters
    ----------
    system : StageSystem
        A stage or the merged chain (``chain.merged_system(project).system``).
    project : Project
        ``settings.seed``, ``mc_samples``, ``mc_distribution``, ``ref_hz`` and the sweep range
        are the defaults of the options below.
    current_drive : bool
        The drive at the system's input (voltage or current).
    f_hz : ndarray, optional
        Frequencies of the envelopes in hertz, ascending; by default 200 log-spaced points over
        ``f_min_hz..f_max_hz``.
    samples, seed, distribution : optional
        Override the project's settings.
    percentiles : sequence of float
        Percentile levels (0–100) of the envelopes and metric distributions.
    limits : sequence of YieldLimit
        The yield is the share of samples meeting every limit; ``None`` with a why when empty.
    phase_margins : bool
        Also the phase margin of every finite op-amp in every sample.
    worst_case : bool
        Also the extreme-vertex worst case of gain at ref and the −3 dB corners.
    multipliers_by_ref : mapping of str to ndarray, optional
        The samples' part multipliers by part ref (each of shape (samples,)), instead of drawing
        them: so a stage alone and the chain it sits in are sampled with the same part values.
        Every toleranced part of the system must be in it.
    readouts : mapping of str to Readout, optional
        Other outputs of the same system (a stage's output in the chain) with their limits:
        read from the same solves, samples and stability; ``SpreadResult.readouts`` holds their
        per-sample values under the same keys (the phase margins are the system's).
    progress : callable, optional
        ``progress(done, total) -> bool``, called between chunks of samples in the calling
        thread (see :class:`Meter`); returning True stops the run with :class:`SpreadCancelled`.

    Returns
    -------
    SpreadResult
        Magnitudes in dB, phases in degrees (unwrapped per sample), frequencies in hertz.

    Raises
    ------
    SpreadCancelled
        The progress callback asked to stop; nothing of the samples done is returned.
    """
    settings = project.settings
    count = settings.mc_samples if samples is None else samples
    seed_value = settings.seed if seed is None else seed
    law = settings.mc_distribution if distribution is None else distribution
    if count < 2:
        raise ValueError(f"samples: {count} is too few for a spread (at least 2)")
    if f_hz is None:
        f_hz = np.logspace(math.log10(settings.f_min_hz.si), math.log10(settings.f_max_hz.si), DEFAULT_POINTS)
    f_hz = np.asarray(f_hz, dtype=float)
    meter = Meter(progress)
    model = tolerance_model(system, current_drive=current_drive)
    notes = list(model.notes)
    count = bounded_samples(model, count, f_hz.size, phase_margins, notes)
    notes.append("op-amp model parameters are held at nominal")
    if not model.refs:
        notes.append("no part has a tolerance: every sample equals the nominal circuit")
    others = dict(readouts or {})
    wanted = [Readout(model.output, tuple(limits)), *others.values()]
    loop_grids = (_default_loop_grids(model) if phase_margins or any(
        limit.metric == "phase_margin_deg" for readout in others.values() for limit in readout.limits) else {})
    plans = _readout_plans(system, project, model, current_drive, f_hz, wanted, always_band=0)
    if multipliers_by_ref is None:
        multipliers = sample_multipliers(model.tol, count, seed_value, law)
    else:
        multipliers = _given_multipliers(model, multipliers_by_ref, count)
        count = multipliers.shape[0]
    everything = np.vstack([np.ones((1, len(model.refs))), multipliers])
    judged = bool(limits) or any(readout.limits for readout in others.values())
    stability = judged and _stability_bounded(model, count)
    meter.plan(_readout_units(everything.shape[0], plans, bool(loop_grids)) + (count if stability else 0)
               + (1 if worst_case and model.refs else 0))
    evaluated = [_split(values, 1) for values in
                 _evaluate_readouts(model, everything, f_hz, plans, loop_grids, meter)]
    nominal, sampled = evaluated[0]
    placed = {key: values[1] for key, values in zip(others, evaluated[1:], strict=True)}
    if judged and not stability:
        notes.append(f"the stability of each sample was not checked: {count} eigenproblems of size {model.size} "
                     f"would take about {_stability_work(model, count) / WORK_BOUND * 8.0:.0f} s; "
                     "a sample that goes unstable is judged by its response alone")
    elif judged:
        # The yield: a sample that cannot settle meets no check (its H(jω) is no steady state).
        centre_hz = math.sqrt(float(f_hz[0]) * float(f_hz[-1]))
        stable = sample_stability(model, multipliers, centre_hz, meter)
        sampled = replace(sampled, stable=stable)
        placed = {key: replace(values, stable=stable) for key, values in placed.items()}
        unstable = int(np.count_nonzero(~stable))
        if unstable:
            notes.append(f"{unstable} of {count} samples are unstable (a pole right of the jω axis): "
                         "they meet no check")
    ref_hz, passband = plans[0].ref_hz, plans[0].passband
    mag_db = 20.0 * np.log10(np.abs(sampled.response))
    phase_deg = np.degrees(np.unwrap(np.angle(sampled.response), axis=1))
    nominal_phase = np.degrees(np.unwrap(np.angle(nominal.response[0])))
    # Keep every sample's unwrapped phase on the nominal's branch at the lowest frequency.
    phase_deg -= 360.0 * np.round((phase_deg[:, :1] - nominal_phase[0]) / 360.0)
    levels = tuple(float(level) for level in percentiles)
    units = {"gain_db": "dB", "peak_gain_db": "dB", "peaking_db": "dB", "f_low_3db_hz": "Hz",
             "f_high_3db_hz": "Hz"}
    metrics = {
        key: _metric_spread(key, unit, float(nominal.metric(key)[0]), sampled.metric(key), levels)
        for key, unit in units.items()
    }
    for ref, values in sampled.phase_margin_deg.items():
        metrics[f"phase_margin_deg:{ref}"] = _metric_spread(
            "phase_margin_deg", "deg", float(nominal.phase_margin_deg[ref][0]), values, levels)
    worst: dict[str, WorstCase] = {}
    if worst_case and model.refs:
        meter.check()
        worst = _worst_cases(model, f_hz, ref_hz, nominal, sampled, passband)
        meter.advance(1)
    yield_pct: float | None = None
    yield_why: str | None = "no check applies to the spread"
    passes: list[tuple[str, float]] = []
    counts: list[tuple[str, int]] = []
    skipped: list[tuple[str, str]] = []
    all_met = np.ones(count, dtype=bool)
    for limit in limits:
        label = limit.label or limit.metric
        try:
            met = limit.met(sampled)
        except KeyError as error:
            skipped.append((label, str(error.args[0]) if error.args else "not sampled"))
            continue
        passes.append((label, 100.0 * float(np.mean(met))))
        counts.append((label, int(np.count_nonzero(met))))
        all_met &= met
    if passes:
        yield_pct, yield_why = 100.0 * float(np.mean(all_met)), None
    elif skipped:
        yield_why = "no check could be evaluated per sample: " + "; ".join(f"{label}: {why}" for label, why in skipped)
    return SpreadResult(
        seed=seed_value, samples=count, distribution=law, parts=model.refs,
        tolerances=tuple(float(t) for t in model.tol), f_hz=f_hz, percentile_levels=levels,
        nominal_mag_db=20.0 * np.log10(np.abs(nominal.response[0])), nominal_phase_deg=nominal_phase,
        mag_db_min=mag_db.min(axis=0), mag_db_max=mag_db.max(axis=0),
        mag_db_percentiles=np.percentile(mag_db, levels, axis=0),
        phase_deg_min=phase_deg.min(axis=0), phase_deg_max=phase_deg.max(axis=0),
        phase_deg_percentiles=np.percentile(phase_deg, levels, axis=0),
        metrics=metrics, worst_case=worst, yield_pct=yield_pct, yield_why=yield_why,
        limit_pass_pct=tuple(passes), sample_values=sampled, limit_pass_count=tuple(counts),
        not_evaluated=tuple(skipped), notes=tuple(notes), readouts=placed,
    )


def place_samples(
    system: StageSystem,
    project: Project,
    *,
    current_drive: bool,
    readouts: Mapping[str, Readout],
    multipliers_by_ref: Mapping[str, NDArray[np.float64]],
    samples: int,
    f_hz: NDArray[np.float64] | None = None,
    progress: Progress | None = None,
) -> dict[str, SpreadSamples]:
    """The per-sample values at some outputs of a system, for the limits read there, with given draws.

    What :func:`monte_carlo` gives in ``SpreadResult.readouts``, without the envelopes, metric
    distributions and worst case of a main output: for a system of its own (a stage isolated or
    in chain) sampled with the chain's part values. Every output shares one set of solves; only
    the figures its limits read are evaluated (a gain check needs no sweep); the stability of
    every sample is judged once for the system. ``samples`` is the number of samples (each
    array of ``multipliers_by_ref`` has that length; a system without toleranced parts still
    gives that many, all nominal). ``progress`` as in :func:`monte_carlo`.
    """
    settings = project.settings
    if f_hz is None:
        f_hz = np.logspace(math.log10(settings.f_min_hz.si), math.log10(settings.f_max_hz.si), DEFAULT_POINTS)
    f_hz = np.asarray(f_hz, dtype=float)
    model = tolerance_model(system, current_drive=current_drive)
    multipliers = _given_multipliers(model, multipliers_by_ref, samples)
    count = multipliers.shape[0]
    wanted = list(readouts.values())
    loop_grids = (_default_loop_grids(model) if any(limit.metric == "phase_margin_deg" for readout in wanted
                                                      for limit in readout.limits) else {})
    plans = _readout_plans(system, project, model, current_drive, f_hz, wanted)
    stability = any(readout.limits for readout in wanted) and _stability_bounded(model, multipliers.shape[0])
    meter = Meter(progress)
    meter.plan(_readout_units(multipliers.shape[0], plans, bool(loop_grids)) + (count if stability else 0))
    evaluated = _evaluate_readouts(model, multipliers, f_hz, plans, loop_grids, meter)
    if stability:
        stable = sample_stability(model, multipliers, math.sqrt(float(f_hz[0]) * float(f_hz[-1])), meter)
        evaluated = [replace(values, stable=stable) for values in evaluated]
    return dict(zip(readouts, evaluated, strict=True))


STABILITY_CHUNK = 256
# Work of one sample's stability (a shifted solve and a complex eigenproblem of size n) in the
# units of WORK_BOUND, per n³: measured on the hydrophone chain (n = 29, 500 samples, 0.4 s).
# Past a quarter of the bound the per-sample stability is skipped, with a note.
STABILITY_WORK = 100.0


def sample_stability(model: ToleranceModel, multipliers: NDArray[np.float64], centre_hz: float,
                     meter: Meter | None = None) -> NDArray[np.bool_]:
    """Whether each sample's closed-loop poles all lie left of the jω axis (right-half-plane test).

    The poles of ``G(m) + s·C(m)`` are found for all samples at once from the batched standard
    eigenproblem of ``M = (G + s0·C)⁻¹·C`` with the shift ``s0 = j·2π·centre_hz``: an eigenvalue
    μ of M is a pole ``s = s0 − 1/μ`` (μ ≈ 0 are the infinite eigenvalues of a singular C and are
    left out). A sample is unstable when a pole has ``Re s > STABILITY_RTOL·|s|``; poles at s = 0
    (structural, as the charge behind a series capacitor) and on the axis are left to the
    nominal verdict. No Python loop per sample: one batched solve and eigvals per chunk, the
    chunks on the worker threads (LAPACK releases the interpreter lock).
    """
    from stagewise.engine.timeresp import STABILITY_RTOL  # noqa: PLC0415

    count = multipliers.shape[0]
    stable = np.ones(count, dtype=bool)
    if model.size == 0 or not np.any(model.c0) and not np.any(model.capacitive):
        if meter is not None:
            meter.advance(count)
        return stable
    centre = 1j * 2.0 * math.pi * centre_hz

    def solve_rows(start: int, stop: int) -> None:
        s0 = centre
        g, c = model.matrices(multipliers[start:stop])
        try:
            shifted = np.linalg.solve(g + s0 * c, c.astype(complex))
        except np.linalg.LinAlgError:
            # s0 is exactly a pole of some sample (on the axis): shift into the left half-plane
            # instead (an exact pole there too has probability zero).
            s0 = s0 * (1.0 + 0.37j)
            shifted = np.linalg.solve(g + s0 * c, c.astype(complex))
        mu = np.linalg.eigvals(shifted)
        size = np.abs(mu)
        finite = size > 1e-10 * np.max(size, axis=1, keepdims=True)
        poles = s0 - 1.0 / np.where(finite, mu, 1.0)
        magnitude = np.abs(poles)
        right = finite & (magnitude > 1e-9 * abs(s0)) & (poles.real > STABILITY_RTOL * magnitude)
        stable[start:stop] = ~np.any(right, axis=1)

    # An eigenproblem costs far more than a small solve: a sample counts as n matrices.
    _in_chunks(count, STABILITY_CHUNK, solve_rows, model.size, meter)
    return stable


def _split(evaluated: SpreadSamples, head: int) -> tuple[SpreadSamples, SpreadSamples]:
    """The first ``head`` rows and the rest, as two SpreadSamples."""
    def part(rows: slice) -> SpreadSamples:
        return SpreadSamples(
            multipliers=evaluated.multipliers[rows], f_hz=evaluated.f_hz, response=evaluated.response[rows],
            ref_hz=evaluated.ref_hz, gain_db=evaluated.gain_db[rows], peak_gain_db=evaluated.peak_gain_db[rows],
            peaking_db=evaluated.peaking_db[rows], f_low_3db_hz=evaluated.f_low_3db_hz[rows],
            f_high_3db_hz=evaluated.f_high_3db_hz[rows],
            phase_margin_deg={ref: values[rows] for ref, values in evaluated.phase_margin_deg.items()},
            extra_f_hz=evaluated.extra_f_hz, extra_response=evaluated.extra_response[rows],
            pass_gain_db=None if evaluated.pass_gain_db is None else evaluated.pass_gain_db[rows],
            stable=None if evaluated.stable is None else evaluated.stable[rows], band=evaluated.band,
        )
    return part(slice(0, head)), part(slice(head, None))


def _worst_cases(model: ToleranceModel, f_hz: NDArray[np.float64], ref_hz: float,
                 nominal: SpreadSamples, sampled: SpreadSamples, passband: Passband | None = None
                 ) -> dict[str, WorstCase]:
    """Sensitivity signs by central differences (batched), then the two vertices per metric."""
    parts = len(model.refs)
    steps = np.ones((2 * parts, parts))
    steps[np.arange(parts), np.arange(parts)] += SENSITIVITY_STEP
    steps[parts + np.arange(parts), np.arange(parts)] -= SENSITIVITY_STEP
    none: NDArray[np.float64] = np.zeros(0)
    probed = _evaluate_samples(model, steps, f_hz, ref_hz, none, {}, passband)
    signs: dict[str, NDArray[np.float64]] = {}
    sensitivities: dict[str, NDArray[np.float64]] = {}
    vertices: list[NDArray[np.float64]] = []
    keys = [key for key in WORST_CASE_KEYS if math.isfinite(float(nominal.metric(key)[0]))]
    for key in keys:
        values = probed.metric(key)
        # d metric / d(relative change of the part), per part.
        slope = (values[:parts] - values[parts:]) / (2.0 * SENSITIVITY_STEP)
        sensitivities[key] = slope
        signs[key] = np.where(np.isfinite(slope), np.sign(slope), 0.0)
        vertices.append(1.0 - model.tol * signs[key])  # the low vertex
        vertices.append(1.0 + model.tol * signs[key])  # the high vertex
    results: dict[str, WorstCase] = {}
    evaluated = (_evaluate_samples(model, np.array(vertices).reshape(-1, parts), f_hz, ref_hz, none, {}, passband)
                 if keys else None)
    for number, key in enumerate(keys):
        assert evaluated is not None
        values = evaluated.metric(key)
        low, high = float(values[2 * number]), float(values[2 * number + 1])
        mc = sampled.metric(key)
        mc = mc[np.isfinite(mc)]
        slack = 1e-9 * max(abs(low), abs(high), 1e-30)
        confirmed = None
        why = None
        if mc.size and math.isfinite(low) and math.isfinite(high):
            confirmed = bool(mc.min() >= low - slack and mc.max() <= high + slack)
            if not confirmed:
                why = (f"a Monte Carlo sample lies beyond the vertices of {key} "
                       f"({mc.min():.6g}..{mc.max():.6g} vs {low:.6g}..{high:.6g}): not monotone in every part")
        elif not (math.isfinite(low) and math.isfinite(high)):
            why = f"{key} does not exist at a vertex (the corner leaves the grid)"
        sign = signs[key]
        results[key] = WorstCase(
            key=key, nominal=float(nominal.metric(key)[0]),
            low=low if math.isfinite(low) else None, high=high if math.isfinite(high) else None,
            sensitivity={ref: float(value) for ref, value in zip(model.refs, sensitivities[key], strict=True)},
            low_vertex={ref: -int(s) for ref, s in zip(model.refs, sign, strict=True)},
            high_vertex={ref: int(s) for ref, s in zip(model.refs, sign, strict=True)},
            confirmed=confirmed, why=why,
        )
    return results


def _number(value: float | None) -> float | None:
    return None if value is None or not math.isfinite(value) else value


def spread_to_json(result: SpreadResult) -> dict[str, Any]:
    """The DESIGN section 6 ``spread`` object.

    Keys: ``seed``, ``samples``, ``distribution``, ``parts`` (ref and tolerance), ``metrics``
    (per key: ``nominal``, ``mean``, ``std``, ``min``, ``max``, ``p1``/``p50``/``p99`` ...,
    ``defined``, ``why``), ``worst_case`` (per key: ``nominal``, ``low``, ``high``,
    ``confirmed``, ``why``), ``yield_pct`` (null with ``yield_pct_why`` when no check applies),
    ``limits`` (label, pass percentage and number of samples that met it, each),
    ``not_evaluated`` (label and why, for each check that could not be evaluated per sample),
    ``notes``.
    """
    metrics: dict[str, Any] = {}
    for name, spread in result.metrics.items():
        entry: dict[str, Any] = {"unit": spread.unit, "nominal": _number(spread.nominal),
                                 "mean": spread.mean, "std": spread.std, "min": spread.minimum,
                                 "max": spread.maximum, "defined": spread.defined_count}
        for level, value in spread.percentiles.items():
            entry[f"p{level:g}"] = value
        if spread.why is not None:
            entry["why"] = spread.why
        metrics[name] = entry
    worst = {
        key: {"nominal": _number(case.nominal), "low": case.low, "high": case.high,
              "confirmed": case.confirmed, **({"why": case.why} if case.why else {})}
        for key, case in result.worst_case.items()
    }
    document: dict[str, Any] = {
        "seed": result.seed,
        "samples": result.samples,
        "distribution": result.distribution,
        "parts": [{"ref": ref, "tol": tol} for ref, tol in zip(result.parts, result.tolerances, strict=True)],
        "metrics": metrics,
        "worst_case": worst,
        "yield_pct": result.yield_pct,
        "limits": [{"label": label, "pass_pct": value, "pass_count": passed}
                   for (label, value), (_, passed) in zip(result.limit_pass_pct, result.limit_pass_count,
                                                          strict=True)],
        "not_evaluated": [{"label": label, "why": why} for label, why in result.not_evaluated],
        "notes": list(result.notes),
    }
    if result.yield_pct is None:
        document["yield_pct_why"] = result.yield_why
    return document
