"""Poles and zeros of a linear system from its matrix pencil, and the minimal pole/zero model.

A driven stage (or a merged chain) is ``(G + sC)·x = b·u`` with output ``y = x[output]``. Its
poles are the finite eigenvalues of the pencil ``G + sC`` (values of s where the matrix is
singular); its zeros are the finite eigenvalues of the Rosenbrock system pencil

    [[G + sC, −b],
     [e_outᵀ,  0]]

Both pencils usually have infinite eigenvalues (algebraic unknowns, ideal sources, nullors),
sometimes in Jordan chains (a capacitor across a voltage source, index 2): a plain QZ solve then
scatters rounding errors of size eps^(1/k) around infinity, which a threshold cannot sort from
real poles far from the band. So the infinite part is deflated exactly first, by orthogonal
reductions of the pencil (rank decisions on equilibrated matrices), and only the remaining
regular pencil, whose eigenvalues are all finite, goes to QZ.

Poles and zeros that coincide within a relative tolerance are removed in pairs (they are
uncontrollable or unobservable modes, e.g. a balanced bridge) and reported. The gain constant K
of ``H(s) = K·∏(s − z)/∏(s − p)`` is fixed by one exact evaluation of the response.

Public API
----------
``pole_zero_model(g, c, b, output, cancel_rtol=1e-6) -> PoleZeroModel``
    The minimal model of any driven pencil (used by the stage and by the chain composition).
``finite_eigenvalues(a, e) -> ndarray``
    Finite values of s with det(a + s·e) = 0 (raises :class:`SingularPencilError`).
``transfer_at(g, c, b, output, s) -> ndarray``
    The exact response at complex frequencies s (rad/s), one batched solve.
``index_one_state_space(g, c, b, output) -> (A, B, C, D)``
    An ODE form of an index-1 pencil (time responses when the zeros cannot be trusted).
``root_table(roots, kind="pole") -> list[dict]``
    Each root as ``{"re", "im", "f_hz", "q", "zeta", "half_plane"}`` for reports (one entry per
    conjugate pair member), reasons beside null Q/ζ, a note on right-half-plane roots.

References
----------
P. Van Dooren, "The computation of Kronecker's canonical form of a singular pencil", Linear
Algebra and its Applications, vol. 27, pp. 103-140, 1979 (deflation of the infinite structure).
H. H. Rosenbrock, *State-space and Multivariable Theory*, Nelson, 1970 (the system matrix and
its zeros).
C. B. Moler and G. W. Stewart, "An algorithm for generalized matrix eigenvalue problems", SIAM J.
Numer. Anal., vol. 10, pp. 241-256, 1973 (QZ).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from typing import Any

import numpy as np
from numpy.typing import NDArray

from stagewise.engine.sweep import solve_batched

__all__ = [
    "PoleZeroModel",
    "SingularPencilError",
    "finite_eigenvalues",
    "index_one_state_space",
    "origin_multiplicity",
    "pole_zero_model",
    "poles_only_model",
    "root_table",
    "transfer_at",
]

TWO_PI = 2.0 * math.pi
# Rank decisions on equilibrated matrices: a singular value below this fraction of the pencil's
# norm is a structural zero (rounding of an exact zero is ~1e-16 of the norm).
RANK_RTOL = 1e-11
# A root of the equilibrated pencil below this magnitude (in units of the pencil's own frequency
# scale) is a root at s = 0 blurred by rounding.
ZERO_RTOL = 1e-10
# Roots beyond this multiple of the pencil's own frequency scale are numerical debris (an
# ill-conditioned rank decision sends an infinite eigenvalue there), never circuit dynamics.
HORIZON = 1e10
# The model must reproduce the exact response to this relative error (against the response, floored
# at 1e-9 of its largest value: deep stop-band values carry the solve's own rounding), or its
# zeros are flagged as ill-conditioned.
FIT_TOLERANCE = 1e-4
# A computed root whose imaginary part is below this fraction of its magnitude is real: a double
# real pole splits into a pair with imaginary part ~sqrt(eps)·|p| under rounding.
REAL_RTOL = 1e-7


class SingularPencilError(ValueError):
    """The pencil's determinant vanishes for every s: the system has no unique solution."""


@dataclass(frozen=True, slots=True)
class PoleZeroModel:
    """The minimal pole/zero model ``H(s) = gain·∏(s − z)/∏(s − p)``, s in rad/s.

    Attributes
    ----------
    poles_rad_s, zeros_rad_s : ndarray of complex
        Roots left after cancellation, conjugate pairs adjacent (positive imaginary part first),
        sorted by magnitude.
    gain : float
        K, the leading coefficient ratio (unit of the response: V/V, or Ω for a current drive,
        times (rad/s)^(poles − zeros)).
    cancelled : tuple of (pole, zero)
        Pairs removed because they coincide within ``cancel_rtol``.
    scale_rad_s : float
        The pencil's natural frequency scale (norm of G over norm of C), a good place to look.
    beyond_horizon : tuple of complex
        Roots (poles or zeros) found beyond ``HORIZON`` times the scale and left out: their
        values are rounding debris of infinite eigenvalues, not dynamics of the circuit.
    fit_error : float
        Largest relative difference between this model and the exact solve over the roots'
        frequency range (NaN: not checked). Above ``FIT_TOLERANCE`` the zeros are not to be
        trusted: a high relative degree makes them ill-conditioned in any matrix method
        (rounding δ puts spurious zeros near |s| ~ δ^(−1/r)·ω), though the poles stay exact.
    log_abs_gain : float
        ln|K|. A long chain's K (∏|p| over dozens of poles) can exceed the floating-point range;
        ``gain`` is then ±inf while every evaluation goes through this logarithm. NaN means "take
        it from ``gain``" (models built by hand).
    """

    poles_rad_s: NDArray[np.complex128]
    zeros_rad_s: NDArray[np.complex128]
    gain: float
    cancelled: tuple[tuple[complex, complex], ...] = ()
    scale_rad_s: float = 1.0
    beyond_horizon: tuple[complex, ...] = ()
    log_abs_gain: float = math.nan
    fit_error: float = math.nan

    @property
    def all_poles_rad_s(self) -> NDArray[np.complex128]:
        """Every finite pole of the pencil: the kept ones and those of the cancelled pairs."""
        cancelled = np.array([pole for pole, _ in self.cancelled], dtype=complex)
        return _tidy(np.concatenate([self.poles_rad_s, cancelled]))

    @property
    def gain_sign(self) -> float:
        """+1 or −1, the sign of K."""
        return -1.0 if self.gain < 0 else 1.0

    @property
    def log_gain(self) -> float:
        """ln|K|, overflow-free."""
        if math.isnan(self.log_abs_gain):
            return math.log(abs(self.gain)) if self.gain != 0 else -math.inf
        return self.log_abs_gain

    def evaluate(self, s: NDArray[np.complexfloating[Any, Any]] | complex) -> NDArray[np.complex128]:
        """H(s) from the roots (s in rad/s), summed in logarithms so long chains cannot overflow."""
        points = np.atleast_1d(np.asarray(s, dtype=complex))
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            logarithm = (self.log_gain
                         + np.sum(np.log(points[:, None] - self.zeros_rad_s[None, :]), axis=1)
                         - np.sum(np.log(points[:, None] - self.poles_rad_s[None, :]), axis=1))
            return np.asarray(self.gain_sign * np.exp(logarithm), dtype=complex)

    @property
    def dc_gain(self) -> float | None:
        """H(0), or ``None`` when a pole sits at s = 0 (the gain grows without bound)."""
        if np.any(self.poles_rad_s == 0):
            return None
        if np.any(self.zeros_rad_s == 0):
            return 0.0
        return float(np.real(self.evaluate(0.0)[0]))

    @property
    def relative_degree(self) -> int:
        """Number of poles minus number of zeros (negative: the gain grows with frequency)."""
        return len(self.poles_rad_s) - len(self.zeros_rad_s)


# -- equilibration ---------------------------------------------------------------------------


def _frequency_scale(g: NDArray[np.float64], c: NDArray[np.float64]) -> float:
    g_norm = float(np.linalg.norm(g))
    c_norm = float(np.linalg.norm(c))
    if c_norm == 0.0 or g_norm == 0.0:
        return 1.0
    return g_norm / c_norm


def _equilibrate(
    a: NDArray[np.float64], e: NDArray[np.float64]
) -> tuple[NDArray[np.float64], NDArray[np.float64], float]:
    """Scale s, rows and columns (powers of two, exact) so that |a| + |e| has rows and columns near 1.

    Returns the scaled pencil and the frequency scale ω_s: the eigenvalues of the scaled pencil
    are s/ω_s. Row and column scaling leave the eigenvalues unchanged.
    """
    scaled_a, scaled_e, scale, _, _ = _equilibrate_with_factors(a, e)
    return scaled_a, scaled_e, scale


def _equilibrate_with_factors(
    a: NDArray[np.float64], e: NDArray[np.float64]
) -> tuple[NDArray[np.float64], NDArray[np.float64], float, NDArray[np.float64], NDArray[np.float64]]:
    """As :func:`_equilibrate`, also returning the row and column factors R, S (â = R·a·S)."""
    scale = _frequency_scale(a, e)
    a = a.copy()
    e = e * scale
    row_total = np.ones(a.shape[0])
    column_total = np.ones(a.shape[1])
    for _ in range(8):
        magnitude = np.abs(a) + np.abs(e)
        rows = magnitude.max(axis=1)
        rows[rows == 0] = 1.0
        row_factor = np.exp2(-np.round(np.log2(rows)))
        a *= row_factor[:, None]
        e *= row_factor[:, None]
        row_total *= row_factor
        magnitude = np.abs(a) + np.abs(e)
        columns = magnitude.max(axis=0)
        columns[columns == 0] = 1.0
        column_factor = np.exp2(-np.round(np.log2(columns)))
        a *= column_factor[None, :]
        e *= column_factor[None, :]
        column_total *= column_factor
        if np.all(row_factor == 1.0) and np.all(column_factor == 1.0):
            break
    # Re-balance the two halves after the diagonal scaling.
    extra = _frequency_scale(a, e)
    return a, e * extra, scale * extra, row_total, column_total


def index_one_state_space(
    g: NDArray[np.float64], c: NDArray[np.float64], b: NDArray[np.float64], output: int
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64], float]:
    """The ODE x' = A·x + B·u, y = C·x + D·u (t in seconds) of an index-1 pencil.

    ``C·x' + G·x = b·u`` is equilibrated, rotated so that C = U·diag(Σ, 0)·Vᵀ, and its algebraic
    unknowns eliminated (Schur complement of the algebraic block, which index 1 makes regular).
    Not minimal: uncontrollable and unobservable modes stay, harmlessly, in A.

    Returns
    -------
    a, b, c : ndarray
        Shapes (m, m), (m,), (m,).
    d : float

    Raises
    ------
    ValueError
        When the pencil has index above 1 (its algebraic block is singular).
    """
    a_hat, e_hat, scale, rows, columns = _equilibrate_with_factors(np.asarray(g, dtype=float),
                                                                  np.asarray(c, dtype=float))
    b_hat = rows * np.asarray(b, dtype=float)
    out_hat = np.zeros(len(b_hat))
    out_hat[output] = columns[output]  # y = e_outᵀ·x = e_outᵀ·S·x̂
    reference = max(float(np.linalg.norm(a_hat, 2)), float(np.linalg.norm(e_hat, 2)), 1e-300)
    u, sigma, vt = np.linalg.svd(e_hat)
    r = _rank(sigma, reference)
    v = vt.T
    a_t = u.T @ a_hat @ v
    b_t = u.T @ b_hat
    out_t = v.T @ out_hat
    a11, a12, a21, a22 = a_t[:r, :r], a_t[:r, r:], a_t[r:, :r], a_t[r:, r:]
    if a22.size and _rank(np.asarray(np.linalg.svd(a22, compute_uv=False), dtype=float), reference) < a22.shape[0]:
        raise ValueError("the circuit's equations have index above 1 (a loop of capacitors and sources, or a "
                         "cut of inductors and current sources)")
    if a22.size:
        solve_a21 = np.linalg.solve(a22, a21)
        solve_b2 = np.linalg.solve(a22, b_t[r:])
        reduced_a = a11 - a12 @ solve_a21
        reduced_b = b_t[:r] - a12 @ solve_b2
        reduced_out = out_t[:r] - solve_a21.T @ out_t[r:]
        direct = float(out_t[r:] @ solve_b2)
    else:
        reduced_a, reduced_b, reduced_out, direct = a11, b_t, out_t, 0.0
    # Σ·x̂₁' = ω_s·(−Ã·x̂₁ + b̃·u): the pencil's s was scaled by ω_s.
    inverse_sigma = 1.0 / sigma[:r]
    state = -scale * inverse_sigma[:, None] * reduced_a
    drive_vector = scale * inverse_sigma * reduced_b
    return state, drive_vector, reduced_out, direct


def _rank(singular_values: NDArray[np.float64], reference: float) -> int:
    return int(np.sum(singular_values > RANK_RTOL * max(reference, 1e-300)))


def _orthonormal_complement(matrix: NDArray[np.float64], reference: float) -> tuple[NDArray[np.float64], int]:
    """Orthonormal basis of the null space of ``matrix`` (columns), and the matrix's rank."""
    u, singular, vt = np.linalg.svd(matrix, full_matrices=True)
    rank = _rank(singular, reference)
    return vt[rank:].T, rank


# -- finite eigenvalues ----------------------------------------------------------------------


def _snap_origin(values: NDArray[np.complex128]) -> NDArray[np.complex128]:
    """Make a simple root at s = 0 exact; ``values`` are in units of the pencil's scale.

    A root at the origin (an integrator, a DC-blocking zero) comes out of QZ as rounding noise
    of the pencil's size. Multiple roots at the origin spread wider (δ^(1/k)); their number is
    found from the structure by :func:`origin_multiplicity`.
    """
    values = np.asarray(values, dtype=complex).copy()
    values[np.abs(values) <= ZERO_RTOL] = 0.0
    return values


def finite_eigenvalues(a: NDArray[np.float64], e: NDArray[np.float64], snap: bool = True) -> NDArray[np.complex128]:
    """The finite values of s where ``a + s·e`` is singular.

    The infinite eigenvalues are deflated exactly before QZ: with ``e = U·diag(Σ, 0)·Vᵀ`` the
    algebraic part of the pencil is eliminated (Schur complement); where it is itself singular
    (higher index), its constraints restrict the differential unknowns and the unknowns it
    leaves free are projected out, and the reduction repeats on the smaller pencil.

    Parameters
    ----------
    a, e : ndarray, shape (n, n)
        Real matrices of the pencil ``a + s·e``.

    snap : bool
        Make roots within rounding of s = 0 exactly 0 (simple roots only).

    Returns
    -------
    ndarray of complex
        Finite eigenvalues in the units of s (rad/s for circuit pencils), unsorted.

    Raises
    ------
    SingularPencilError
        When det(a + s·e) is zero for every s.
    """
    a = np.asarray(a, dtype=float)
    e = np.asarray(e, dtype=float)
    if a.shape[0] == 0:
        return np.zeros(0, dtype=complex)
    a, e, scale = _equilibrate(a, e)
    reference = max(float(np.linalg.norm(a, 2)), float(np.linalg.norm(e, 2)), 1e-300)
    while True:
        n = a.shape[0]
        if n == 0:
            return np.zeros(0, dtype=complex)
        u, sigma, vt = np.linalg.svd(e)
        rank_e = _rank(sigma, reference)
        if rank_e == n:
            import scipy.linalg  # lazily: 0.6 s of import, off the start-up path

            values = np.asarray(scipy.linalg.eigvals(a, -e), dtype=complex)
            return np.asarray((_snap_origin(values) if snap else values) * scale, dtype=complex)
        if rank_e == 0:
            if _rank(np.asarray(np.linalg.svd(a, compute_uv=False), dtype=float), reference) < n:
                raise SingularPencilError("the pencil is singular for every s")
            return np.zeros(0, dtype=complex)
        v = vt.T
        a_t = u.T @ a @ v
        r = rank_e
        a11, a12 = a_t[:r, :r], a_t[:r, r:]
        a21, a22 = a_t[r:, :r], a_t[r:, r:]
        sigma1 = np.diag(sigma[:r])
        p, s22, qt = np.linalg.svd(a22)
        q_rank = _rank(s22, reference)
        a21_p = p.T @ a21
        a12_q = a12 @ qt.T
        # Middle block: x2' = −S1⁻¹·A21'·x1 (algebraic unknowns fixed by the differential ones).
        inverse = 1.0 / s22[:q_rank]
        a11_reduced = a11 - a12_q[:, :q_rank] @ (inverse[:, None] * a21_p[:q_rank])
        constraints = a21_p[q_rank:]  # B·x1 = 0
        free = a12_q[:, q_rank:]  # unknowns that appear only in the differential rows
        k = constraints.shape[0]
        if k == 0:
            a, e = a11_reduced, sigma1
            continue
        null_b, rank_b = _orthonormal_complement(constraints, reference)
        left, rank_f = _orthonormal_complement(free.T, reference)
        if rank_b < k or rank_f < k:
            raise SingularPencilError("the pencil is singular for every s")
        a = left.T @ a11_reduced @ null_b
        e = left.T @ sigma1 @ null_b


# -- roots: tidy, cancel, tabulate -----------------------------------------------------------


def _tidy(roots: NDArray[np.complex128]) -> NDArray[np.complex128]:
    """Make real roots exactly real, pair conjugates exactly, sort by magnitude then imag."""
    roots = np.asarray(roots, dtype=complex)
    real_mask = np.abs(roots.imag) <= REAL_RTOL * np.abs(roots)
    reals = np.sort(roots[real_mask].real)[::-1]  # slowest (closest to 0 from the left) first
    upper = roots[~real_mask & (roots.imag > 0)]
    lower = roots[~real_mask & (roots.imag < 0)]
    pairs: list[complex] = []
    remaining = list(lower)
    for root in upper:
        if remaining:
            conjugates = np.conj(np.array(remaining))
            index = int(np.argmin(np.abs(conjugates - root)))
            partner = remaining.pop(index)
            root = 0.5 * (root + np.conj(partner))
        pairs.append(complex(root))
    for orphan in remaining:  # not expected for real matrices; keep it honest, not dropped
        pairs.append(complex(np.conj(orphan)))
    ordered: list[tuple[float, float, list[complex]]] = []
    for value in reals:
        ordered.append((abs(float(value)), 0.0, [complex(float(value), 0.0)]))
    for root in pairs:
        ordered.append((abs(root), abs(root.imag), [root, root.conjugate()]))
    ordered.sort(key=lambda item: (item[0], item[1]))
    result = [root for _, _, group in ordered for root in group]
    return np.array(result, dtype=complex)


def _cancel(
    poles: NDArray[np.complex128], zeros: NDArray[np.complex128], rtol: float, atol: float
) -> tuple[NDArray[np.complex128], NDArray[np.complex128], list[tuple[complex, complex]]]:
    """Remove pole-zero pairs with |p − z| ≤ rtol·max(|p|, |z|) + atol (greedy, nearest first)."""
    pole_list = list(poles)
    zero_list = list(zeros)
    cancelled: list[tuple[complex, complex]] = []
    candidates: list[tuple[float, int, int]] = []
    for i, pole in enumerate(pole_list):
        for j, zero in enumerate(zero_list):
            distance = abs(pole - zero)
            if distance <= rtol * max(abs(pole), abs(zero)) + atol:
                candidates.append((distance, i, j))
    candidates.sort()
    used_poles: set[int] = set()
    used_zeros: set[int] = set()
    for _, i, j in candidates:
        if i in used_poles or j in used_zeros:
            continue
        used_poles.add(i)
        used_zeros.add(j)
        cancelled.append((complex(pole_list[i]), complex(zero_list[j])))
    kept_poles = np.array([p for i, p in enumerate(pole_list) if i not in used_poles], dtype=complex)
    kept_zeros = np.array([z for j, z in enumerate(zero_list) if j not in used_zeros], dtype=complex)
    return kept_poles, kept_zeros, cancelled


REAL_ROOT_WHY = ("a real root has no Q or ζ: they describe a complex pair; a real root is a first-order "
                 "section with time constant 1/|s| (a pair of real roots counts as ζ ≥ 1, overdamped)")
AXIS_ROOT_WHY = "on the jω axis: no damping, so Q is infinite (ζ = 0)"
RIGHT_HALF_PLANE_NOTES = {
    "zero": ("right-half-plane zero (non-minimum phase): the gain rises past it as past any zero, but the phase "
             "lags (up to 90° per zero) instead of leading, and a step first moves the wrong way; in an op-amp stage it usually comes from the signal that "
             "reaches the output directly through the feedback network and the op-amp's output resistance, "
             "ahead of the amplifier"),
    "pole": "right-half-plane pole: the response grows without bound (unstable)",
}
# Said after the note of a right-half-plane complex pair only: a real root has no Q to read.
RIGHT_HALF_PLANE_Q = "; Q < 0 marks the right half-plane, |Q| is the usual figure"


def root_table(roots: NDArray[np.complex128], kind: str = "pole") -> list[dict[str, Any]]:
    """Roots as report rows ``{"re", "im", "f_hz", "q", "zeta", "half_plane"}`` (re, im in rad/s).

    ``f_hz`` is the natural frequency |s|/(2π); ``q`` = |s|/(−2·Re s) for a complex root (negative
    for a right-half-plane pair) and ``zeta`` = −Re s/|s| = 1/(2Q). A real root gets ``q`` and
    ``zeta`` null with ``q_why``/``zeta_why`` saying why (Q describes a complex pair); a root on
    the imaginary axis gets ``q`` null (infinite) with its reason and ``zeta`` 0.
    ``half_plane`` is ``"left"``, ``"right"`` or ``"axis"``; a right-half-plane root has a
    plain-words ``note`` saying what it is (``kind`` is ``"pole"`` or ``"zero"``).

    References
    ----------
    Standard second-order section s² + (ω0/Q)·s + ω0², e.g. Ogata, *Modern Control Engineering*,
    ch. 5; non-minimum-phase zeros: same, ch. 7.
    """
    rows: list[dict[str, Any]] = []
    for root in roots:
        magnitude = abs(root)
        row: dict[str, Any] = {"re": float(root.real), "im": float(root.imag), "f_hz": float(magnitude / TWO_PI)}
        if root.imag != 0.0 and root.real != 0.0:
            row["q"] = float(magnitude / (-2.0 * root.real))
            row["zeta"] = float(-root.real / magnitude)
        elif root.imag != 0.0:
            row["q"], row["q_why"], row["zeta"] = None, AXIS_ROOT_WHY, 0.0
        else:
            row["q"], row["q_why"], row["zeta"], row["zeta_why"] = None, REAL_ROOT_WHY, None, REAL_ROOT_WHY
        row["half_plane"] = "right" if root.real > 0 else "left" if root.real < 0 else "axis"
        if root.real > 0:
            row["note"] = (RIGHT_HALF_PLANE_NOTES.get(kind, RIGHT_HALF_PLANE_NOTES["pole"])
                           + (RIGHT_HALF_PLANE_Q if root.imag != 0.0 else ""))
        rows.append(row)
    return rows


# -- the exact response ----------------------------------------------------------------------


def transfer_at(
    g: NDArray[np.float64],
    c: NDArray[np.float64],
    b: NDArray[np.float64],
    output: int,
    s: NDArray[np.complexfloating[Any, Any]] | complex,
) -> NDArray[np.complex128]:
    """The response ``x[output]`` of ``(G + sC)·x = b`` at every s (rad/s), one batched solve."""
    points = np.atleast_1d(np.asarray(s, dtype=complex))
    # Chunked over the points (memory O(n²) per chunk, not O(points·n²)).
    return np.asarray(solve_batched(g, c, b.astype(complex), points)[:, output], dtype=complex)


def _gain_point(roots: NDArray[np.complex128], scale: float) -> complex:
    """A point on the jω axis well away from every root, near the roots' geometric centre.

    Roots far below the pencil's scale are left out of the centre: where QZ leaves a multiple
    root at the origin spread into a small ring, evaluating far above it keeps K exact.
    """
    magnitudes = np.abs(roots[roots != 0])
    magnitudes = magnitudes[magnitudes > 1e-3 * scale]
    centre = float(np.exp(np.mean(np.log(magnitudes)))) if len(magnitudes) else scale
    best = 1j * centre
    best_distance = -1.0
    for factor in (1.0, 1.618, 0.618, 2.718, 0.368, 7.39, 0.135):
        candidate = 1j * centre * factor
        if len(roots) == 0:
            return candidate
        distance = float(np.min(np.abs(candidate - roots)) / abs(candidate))
        if distance > best_distance:
            best, best_distance = candidate, distance
    return complex(best)


def origin_multiplicity(a: NDArray[np.float64], e: NDArray[np.float64]) -> int:
    """How many roots of det(a + s·e) sit exactly at s = 0, from the pencil's structure.

    With μ = 1/s, det(a + s·e) = s^n·det(e + μ·a): a root of multiplicity m at s = 0 is an
    infinite eigenvalue of the reversed pencil, whose finite eigenvalues therefore number
    n − m. The count comes from the same exact deflation, so it does not depend on how far
    rounding spreads a multiple root (a k-fold root leaves QZ as a ring of radius δ^(1/k)).
    """
    n = int(a.shape[0])
    try:
        return n - len(finite_eigenvalues(e, a, snap=False))
    except SingularPencilError:
        return 0


def _settle_origin(
    roots: NDArray[np.complex128], count: int
) -> NDArray[np.complex128]:
    """Set the ``count`` roots nearest to s = 0 to exactly 0 (the rest are kept)."""
    roots = np.asarray(roots, dtype=complex).copy()
    if count <= 0:
        return roots
    order = np.argsort(np.abs(roots), kind="stable")
    roots[order[:count]] = 0.0
    return roots


def pole_zero_model(
    g: NDArray[np.float64],
    c: NDArray[np.float64],
    b: NDArray[np.float64],
    output: int,
    cancel_rtol: float = 1e-6,
    poles: NDArray[np.complex128] | None = None,
) -> PoleZeroModel:
    """The minimal pole/zero model of ``(G + sC)·x = b·u``, ``y = x[output]``.

    Parameters
    ----------
    g, c : ndarray, shape (n, n)
        The pencil (SI units; s in rad/s).
    b : ndarray, shape (n,)
        Input vector of the drive.
    output : int
        Index of the output unknown.
    cancel_rtol : float
        Relative distance under which a pole and a zero cancel.
    poles : ndarray of complex, optional
        The pencil's finite poles when already known (they do not depend on ``b`` or
        ``output``): another model's ``all_poles_rad_s`` of the same ``g`` and ``c``.

    Returns
    -------
    PoleZeroModel

    Raises
    ------
    SingularPencilError
        When ``G + sC`` is singular for every s (the stage has no unique solution), or the
        output does not respond to the input at all (the response is identically zero).
    """
    g = np.asarray(g, dtype=float)
    c = np.asarray(c, dtype=float)
    b = np.asarray(b, dtype=float)
    n = g.shape[0]
    known = poles is not None
    poles = np.asarray(poles, dtype=complex) if poles is not None else finite_eigenvalues(g, c)
    system_a = np.zeros((n + 1, n + 1))
    system_e = np.zeros((n + 1, n + 1))
    system_a[:n, :n] = g
    system_a[:n, n] = -b
    system_a[n, output] = 1.0
    system_e[:n, :n] = c
    scale = _frequency_scale(g, c)
    try:
        zeros = finite_eigenvalues(system_a, system_e)
    except SingularPencilError as error:
        raise SingularPencilError("the output does not respond to the input (the response is zero at every "
                                  "frequency)") from error
    if not known:
        poles = _settle_origin(poles, origin_multiplicity(g, c))
    zeros = _settle_origin(zeros, origin_multiplicity(system_a, system_e))
    horizon = HORIZON * scale
    far = tuple(complex(r) for r in np.concatenate([poles[np.abs(poles) > horizon], zeros[np.abs(zeros) > horizon]]))
    poles, zeros = _tidy(poles[np.abs(poles) <= horizon]), _tidy(zeros[np.abs(zeros) <= horizon])
    # Roots at s = 0 are exact (snapped), so the absolute floor only needs to absorb rounding
    # near the origin; tied to the pencil's own frequency scale, never to its largest root.
    kept_poles, kept_zeros, cancelled = _cancel(poles, zeros, cancel_rtol, 1e-12 * scale)
    kept_poles, kept_zeros = _tidy(kept_poles), _tidy(kept_zeros)
    point = _gain_point(np.concatenate([poles, zeros]), scale)
    value = complex(transfer_at(g, c, b, output, point)[0])
    if value == 0:
        raise SingularPencilError("the output does not respond to the input (the response is zero at every "
                                  "frequency)")
    # K = H(s0)·∏(s0 − p)/∏(s0 − z), in logarithms: over dozens of poles the product leaves the
    # floating-point range long before K itself is meaningless.
    logarithm = complex(np.log(value) + np.sum(np.log(point - kept_poles)) - np.sum(np.log(point - kept_zeros)))
    # K is real; its phase is 0 or π up to rounding.
    sign = -1.0 if math.cos(logarithm.imag) < 0 else 1.0
    with np.errstate(over="ignore"):
        gain = sign * float(np.exp(logarithm.real))
    model = PoleZeroModel(
        poles_rad_s=kept_poles,
        zeros_rad_s=kept_zeros,
        gain=gain,
        log_abs_gain=logarithm.real,
        cancelled=tuple(cancelled),
        scale_rad_s=scale,
        beyond_horizon=far,
    )
    return replace(model, fit_error=_fit_error(model, g, c, b, output))


def poles_only_model(
    g: NDArray[np.float64], c: NDArray[np.float64], poles: NDArray[np.complex128] | None = None
) -> PoleZeroModel:
    """The poles of ``G + sC`` as a model without zeros or gain (a system too large for them).

    The zeros and K are not computed (``zeros_rad_s`` is empty, ``gain`` NaN, so ``evaluate``
    gives NaN, never a made-up value) and ``fit_error`` is infinite: every user of the model then
    takes the response's end slopes and levels from exact solves, as for ill-conditioned zeros.

    Parameters
    ----------
    poles : ndarray of complex, optional
        The pencil's finite poles when already known (another output of the same pencil).
    """
    if poles is None:
        poles = finite_eigenvalues(g, c)
        poles = _settle_origin(poles, origin_multiplicity(g, c))
    scale = _frequency_scale(np.asarray(g, dtype=float), np.asarray(c, dtype=float))
    poles = np.asarray(poles, dtype=complex)
    far = tuple(complex(p) for p in poles[np.abs(poles) > HORIZON * scale])
    return PoleZeroModel(poles_rad_s=_tidy(poles[np.abs(poles) <= HORIZON * scale]),
                         zeros_rad_s=np.zeros(0, dtype=complex), gain=math.nan, scale_rad_s=scale,
                         beyond_horizon=far, fit_error=math.inf)


def _fit_error(model: PoleZeroModel, g: NDArray[np.float64], c: NDArray[np.float64], b: NDArray[np.float64],
               output: int) -> float:
    """Largest relative model error on 48 log-spaced points across the roots' range (one solve)."""
    roots = np.abs(np.concatenate([model.poles_rad_s, model.zeros_rad_s]))
    roots = roots[roots > 0]
    low = float(np.min(roots)) / 10.0 if len(roots) else model.scale_rad_s / 100.0
    high = float(np.max(roots)) * 10.0 if len(roots) else model.scale_rad_s * 100.0
    # Off the axis grid a little (×1.0137) so no point lands exactly on a notch.
    s = 1j * np.logspace(math.log10(low), math.log10(high), 48) * 1.0137
    try:
        exact = transfer_at(g, c, b, output, s)
    except np.linalg.LinAlgError:
        return math.nan
    fitted = model.evaluate(s)
    usable = np.isfinite(exact) & (np.abs(exact) > 0)
    if not np.any(usable):
        return math.nan
    size = np.maximum(np.abs(exact[usable]), 1e-9 * float(np.max(np.abs(exact[usable]))))
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        errors = np.abs(fitted[usable] - exact[usable]) / size
    return float(np.max(errors)) if np.all(np.isfinite(errors)) else math.inf
