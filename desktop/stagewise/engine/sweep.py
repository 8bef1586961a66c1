"""Driven stages and batched frequency sweeps.

A stage's isolated response drives its input port with an ideal source (voltage, or current
where the stage says ``"drive": "current"``) and reads the voltage of its output port, unloaded.
All frequencies are solved in one batched LAPACK call on stacked matrices; a large sparse
system (a long chain merged into one circuit) is solved by a sparse LU per frequency instead,
whose cost grows with the number of unknowns, not with its cube.
"""

from __future__ import annotations

import math
import threading
import weakref
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from stagewise.engine.mna import StageSystem
from stagewise.model.project import Settings

__all__ = ["DrivenSystem", "drive", "frequency_grid", "solve_batched", "transfer"]

TWO_PI = 2.0 * math.pi


@dataclass(frozen=True, slots=True)
class DrivenSystem:
    """(G + sC)·x = b·u with output y = x[output]; ``b`` is the drive's input vector."""

    g: NDArray[np.float64]
    c: NDArray[np.float64]
    b: NDArray[np.float64]
    output: int
    current_drive: bool


def frequency_grid(settings: Settings) -> NDArray[np.float64]:
    """Log-spaced analysis frequencies in hertz, ``points_per_decade`` per decade, ends included."""
    low, high = settings.f_min_hz.si, settings.f_max_hz.si
    decades = math.log10(high / low)
    count = max(int(math.ceil(decades * settings.points_per_decade)) + 1, 2)
    return np.logspace(math.log10(low), math.log10(high), count)


def drive(system: StageSystem, current: bool) -> DrivenSystem:
    """Attach the isolated drive to a stage's input port.

    A voltage drive adds one unknown (the source current) and the row v_in = u; a current drive
    injects u into the input node.
    """
    n = system.size
    if current:
        b = np.zeros(n)
        b[system.input_index] = 1.0
        return DrivenSystem(system.g, system.c, b, system.output_index, True)
    g = np.zeros((n + 1, n + 1))
    c = np.zeros((n + 1, n + 1))
    g[:n, :n] = system.g
    c[:n, :n] = system.c
    # Source current unknown: it leaves the input node into the source (KCL row), and the
    # source row fixes the input voltage.
    g[system.input_index, n] = 1.0
    g[n, system.input_index] = 1.0
    b = np.zeros(n + 1)
    b[n] = 1.0
    return DrivenSystem(g, c, b, system.output_index, False)


SOLVE_CHUNK_BYTES = 32 * 2**20
# From this many unknowns, a pencil whose G + C pattern fills at most SPARSE_MAX_FILL of the
# matrix is solved by a sparse LU per frequency (a merged 200-stage chain, 602 unknowns and
# 601 frequencies: 17 s dense, 0.2 s sparse); below it the stacked dense call is faster.
SPARSE_MIN_UNKNOWNS = 64
SPARSE_MAX_FILL = 0.1


# Sparse patterns of recently solved pencils, and their solutions at single points, keyed by
# the arrays' identity (checked through weak references, so a freed array's id reused by a new
# one is never mistaken for it). Long chains solve the same pencil many times: the loop gain of
# every op-amp bisects one frequency at a time, and every stage seen from the chain's input
# reads the same merged pencil with the same drive at the same extra frequencies (the corner
# search's extension, the end slopes, the DC point). The engine never changes an array in place.
_PATTERNS: dict[tuple[int, int], _Pattern] = {}
_LOCK = threading.Lock()  # the program analyses in a worker thread while the GUI may ask too
PATTERN_ENTRIES = 8
POINT_BYTES = 8 * 2**20  # solutions kept per pencil


@dataclass
class _Pattern:
    g: Any  # weak references to the arrays the entry belongs to
    c: Any
    sparse: bool
    rows: NDArray[np.int32] | None = None
    indptr: NDArray[np.int32] | None = None
    g_values: NDArray[np.complex128] | None = None
    c_values: NDArray[np.complex128] | None = None
    points: dict[tuple[complex, bytes], NDArray[np.complex128]] | None = None


def _pattern(g: NDArray[np.float64], c: NDArray[np.float64]) -> _Pattern:
    """The sparse pattern of a pencil from ``SPARSE_MIN_UNKNOWNS`` on (least recently used first out)."""
    key = (id(g), id(c))
    with _LOCK:
        entry = _PATTERNS.pop(key, None)
        if entry is not None and entry.g() is g and entry.c() is c:
            _PATTERNS[key] = entry  # most recently used last
            return entry
    n = g.shape[0]
    if n < SPARSE_MIN_UNKNOWNS:
        return _Pattern(lambda: None, lambda: None, False)
    sparse = int(np.count_nonzero((g != 0) | (c != 0))) <= SPARSE_MAX_FILL * n * n
    def forget(_: Any) -> None:
        # Runs while G or C is freed, before its id can be reused: the entry (and the solutions
        # it keeps) goes with the pencil. dict.pop is atomic.
        _PATTERNS.pop(key, None)

    try:
        entry = _Pattern(weakref.ref(g, forget), weakref.ref(c, forget), sparse)
    except TypeError:  # an array view that cannot be referenced weakly: not cached
        entry = _Pattern(lambda: None, lambda: None, sparse)
    if sparse:
        import scipy.sparse  # noqa: PLC0415  (lazily: only long chains come here)

        # One pattern (the union of G's and C's) built once; per frequency only its values change.
        pattern = scipy.sparse.csc_matrix((g != 0) | (c != 0))
        pattern.sort_indices()
        columns = np.repeat(np.arange(g.shape[1]), np.diff(pattern.indptr))
        entry.rows, entry.indptr = pattern.indices, pattern.indptr
        entry.g_values = g[entry.rows, columns].astype(complex)
        entry.c_values = c[entry.rows, columns].astype(complex)
        entry.points = {}
    if entry.g() is g:
        with _LOCK:
            while len(_PATTERNS) >= PATTERN_ENTRIES:
                _PATTERNS.pop(next(iter(_PATTERNS)))
            _PATTERNS[key] = entry
    return entry


def _sparse_pattern(g: NDArray[np.float64], c: NDArray[np.float64]) -> bool:
    return _pattern(g, c).sparse


def _solve_sparse(
    g: NDArray[np.float64], c: NDArray[np.float64], right: NDArray[np.complex128], s: NDArray[np.complex128]
) -> NDArray[np.complex128]:
    """(G + s_k·C)·x_k = right for every s_k, one sparse LU (partial pivoting) per frequency.

    The loop over frequencies is in Python on purpose: each factorisation costs O(n) for the
    banded patterns of chains, far below the O(n³) of the stacked dense solve it replaces.
    Solutions with one right-hand side are kept (``POINT_BYTES`` per pencil) for the next caller
    asking for the same point and right-hand side.
    """
    import scipy.sparse  # noqa: PLC0415
    import scipy.sparse.linalg  # noqa: PLC0415

    entry = _pattern(g, c)
    assert entry.rows is not None and entry.indptr is not None and entry.points is not None
    assert entry.g_values is not None and entry.c_values is not None
    right_key = right.tobytes()
    out = np.empty((len(s),) + right.shape, dtype=complex)
    # One matrix object whose values are overwritten per frequency (each factor is used before the
    # next overwrite): building a CSC matrix costs as much as factorising a chain's.
    matrix = scipy.sparse.csc_matrix((entry.g_values.copy(), entry.rows, entry.indptr), shape=g.shape)
    for index, point in enumerate(s):
        key = (complex(point), right_key)
        with _LOCK:
            known = entry.points.get(key)
        if known is not None:
            out[index] = known
            continue
        np.multiply(entry.c_values, point, out=matrix.data)
        matrix.data += entry.g_values
        try:
            factor = scipy.sparse.linalg.splu(matrix)
        except RuntimeError as error:  # SuperLU: "Factor is exactly singular"
            raise np.linalg.LinAlgError(f"Singular matrix ({error})") from error
        out[index] = factor.solve(right)
        if right.shape[1] == 1:
            with _LOCK:
                if 16 * g.shape[0] * (len(entry.points) + 1) > POINT_BYTES:
                    entry.points.clear()
                entry.points[key] = out[index].copy()
    return out


def solve_batched(
    g: NDArray[np.float64], c: NDArray[np.float64], rhs: NDArray[np.complex128], s: NDArray[np.complex128]
) -> NDArray[np.complex128]:
    """Solve (G + s_k·C)·x_k = rhs for every s_k in one stacked call.

    Parameters
    ----------
    g, c : ndarray, shape (n, n)
    rhs : ndarray, shape (n,) or (n, m)
    s : ndarray, shape (k,), complex frequencies in rad/s

    Returns
    -------
    ndarray, shape (k, n) or (k, n, m)

    Raises
    ------
    numpy.linalg.LinAlgError
        When a matrix is exactly singular.
    """
    n = g.shape[0]
    columns = 1 if rhs.ndim == 1 else rhs.shape[1]
    if _sparse_pattern(g, c):
        solved_sparse = _solve_sparse(g, c, rhs.astype(complex).reshape(n, columns), np.asarray(s, dtype=complex))
        return solved_sparse[:, :, 0] if rhs.ndim == 1 else solved_sparse
    # Chunked over frequencies so that the stacked complex matrices stay near SOLVE_CHUNK_BYTES:
    # memory O(n²) per chunk instead of O(k·n²) (600 frequencies of a 400-node ladder were 3 GB).
    chunk = max(1, int(SOLVE_CHUNK_BYTES // (16 * n * (n + columns))))
    out = np.empty((len(s), n) if rhs.ndim == 1 else (len(s), n, columns), dtype=complex)
    right_one = rhs.astype(complex).reshape(n, columns)
    for start in range(0, len(s), chunk):
        part = s[start:start + chunk]
        matrices = np.empty((len(part), n, n), dtype=complex)  # built in place: one array, no temporaries
        np.multiply(part[:, None, None], c[None, :, :], out=matrices)
        matrices += g[None, :, :]
        right = np.broadcast_to(right_one[None, :, :], (len(part), n, columns))
        solved = np.linalg.solve(matrices, right)
        out[start:start + chunk] = solved[:, :, 0] if rhs.ndim == 1 else solved
    return out


def transfer(system: DrivenSystem, f_hz: NDArray[np.float64]) -> NDArray[np.complex128]:
    """The driven system's response y/u at each frequency (V/V, or Ω for a current drive)."""
    s = 1j * TWO_PI * np.asarray(f_hz, dtype=float)
    x = solve_batched(system.g, system.c, system.b.astype(complex), s)
    return x[:, system.output]
