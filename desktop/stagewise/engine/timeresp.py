"""Step and impulse responses of a minimal pole/zero model, exact (no ODE integration).

The model ``H(s) = K·∏(s − z)/∏(s − p)`` is realised as a cascade of real first- and
second-order sections (a conditioning-friendly state-space form, each section scaled to its own
natural frequency), and the responses are read from matrix exponentials for all instants at
once (modal form when the eigenvectors are well conditioned, else doubling along arithmetic
progressions of instants from one ``expm`` each: no loop per sample):

    step:     y(t) = C·∫₀ᵗ e^{Aτ} dτ·B + D,   from expm([[A, B], [0, 0]]·t)
    impulse:  y(t) = C·e^{At}·B   (plus D·δ(t), reported as ``impulse_weight``)

The time span comes from the poles: ten times the slowest decay time constant 1/min(−Re p), so
even the 0.1 % band is reached (e^−10 ≈ 4.5e−5); the grid is linear over the span joined with
uniform runs per decade from the fastest time constant, so fast edges are resolved too. Every metric
instant is then refined on the exact response (k-section search), not read off the grid.

Definitions (as in python-control's ``step_info``, so results compare):
rise time from the first 10 % to the first 90 % crossing of the final value; overshoot the
largest excursion beyond the final value in % of it; settling time the last instant the
response is outside ±1 % (±0.1 %) of the final value. When the final value is zero (a zero at
DC: high-pass or band-pass), rise time and overshoot have no meaning and are ``None`` with the
reason, and the settling band is taken relative to the peak excursion instead.

Public API
----------
``step_response(model, t_s=None) -> StepResponse``
``step_response_of_pencil(g, c, b, output, model, t_s=None) -> StepResponse``
    From poles and residues only, for models whose zeros failed their check (``fit_error``).
``impulse_response(model, t_s=None) -> ImpulseResponse``
``time_span_s(model) -> float``
``realisation(model) -> (a, b, c, d)``
``refine_crossing(function, low, high, level, rounds=6, points=33) -> float``
``step_metrics(grid, y, final, response) -> StepResponse``
    The metrics alone, for a response known by samples (a bench capture) or by an evaluator.

References
----------
C. Moler and C. Van Loan, "Nineteen dubious ways to compute the exponential of a matrix,
twenty-five years later", SIAM Review, vol. 45, no. 1, pp. 3-49, 2003 (augmented-matrix form of
the step response, scaling and squaring).
K. Ogata, *Modern Control Engineering*, 5th ed., ch. 5 (transient-response specifications).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field, replace

import numpy as np
from numpy.typing import NDArray

from stagewise.engine.poles import PoleZeroModel, index_one_state_space

__all__ = [
    "ImpulseResponse",
    "StepResponse",
    "impulse_response",
    "modal_realisation",
    "realisation",
    "refine_crossing",
    "step_metrics",
    "step_response",
    "step_response_of_pencil",
    "time_span_s",
]

SPAN_TIME_CONSTANTS = 10.0
LINEAR_POINTS = 1200
POINTS_PER_DECADE = 60
# A pole counts as being on the jω axis (or in the right half-plane) beyond this fraction of its
# magnitude: rounding of the pencil leaves ~1e-12 relative.
STABILITY_RTOL = 1e-9
# An unstable response is shown until its fastest growing mode reaches e^GROWTH_LIMIT.
GROWTH_LIMIT = 20.0

Matrix = NDArray[np.float64]


@dataclass(frozen=True, slots=True)
class StepResponse:
    """Unit-step response and its metrics (None plus a reason in ``why`` when not defined).

    ``why`` maps a metric name (``final``, ``rise_s``, ``overshoot_pct``, ``settle_1pct_s``,
    ``settle_0p1pct_s``) to the sentence saying why it has no value. ``settle_basis`` says what
    the settling band is relative to: ``"final value"`` or ``"peak"``.
    """

    t_s: NDArray[np.float64]
    y: NDArray[np.float64]
    final: float | None
    rise_s: float | None
    overshoot_pct: float | None
    settle_1pct_s: float | None
    settle_0p1pct_s: float | None
    settle_basis: str = "final value"
    why: dict[str, str] = field(default_factory=dict)


@dataclass(frozen=True, slots=True)
class ImpulseResponse:
    """Impulse response ``y(t)`` (unit per second) and the weight of a δ(t) at t = 0 (D)."""

    t_s: NDArray[np.float64]
    y: NDArray[np.float64]
    impulse_weight: float
    why: str | None = None


# -- realisation -----------------------------------------------------------------------------


def _split(roots: NDArray[np.complex128]) -> tuple[list[float], list[complex]]:
    reals = [float(r.real) for r in roots if r.imag == 0]
    uppers = [complex(r) for r in roots if r.imag > 0]
    return reals, uppers


def _second_order(numerator: NDArray[np.float64], a1: float, a0: float, reference: float
                  ) -> tuple[Matrix, Matrix, Matrix, Matrix]:
    """Section N(s)/(s² + a1·s + a0) with N = n2·s² + n1·s + n0 (descending coefficients).

    States x1 = ω²/D·u, x2 = s·ω/D·u with ω = sqrt(|a0|) (or ``reference`` when a0 = 0), so
    that every entry is of order ω:  x1' = ω·x2,  x2' = −(a0/ω)·x1 − a1·x2 + ω·u.
    """
    n2, n1, n0 = numerator
    omega = math.sqrt(abs(a0)) if a0 != 0 else reference
    a = np.array([[0.0, omega], [-a0 / omega, -a1]])
    b = np.array([[0.0], [omega]])
    c = np.array([[(n0 - n2 * a0) / omega**2, (n1 - n2 * a1) / omega]])
    d = np.array([[n2]])
    return a, b, c, d


def _first_order(numerator: NDArray[np.float64], pole: float, reference: float
                 ) -> tuple[Matrix, Matrix, Matrix, Matrix]:
    """Section (n1·s + n0)/(s − p): state x = w/(s − p)·u with w = |p| (or ``reference``)."""
    n1, n0 = numerator
    weight = abs(pole) if pole != 0 else reference
    a = np.array([[pole]])
    b = np.array([[weight]])
    # N/(s−p) = n1 + (n0 + n1·p)/(s − p)
    c = np.array([[(n0 + n1 * pole) / weight]])
    d = np.array([[n1]])
    return a, b, c, d


def _series(first: tuple[Matrix, Matrix, Matrix, Matrix], second: tuple[Matrix, Matrix, Matrix, Matrix]
            ) -> tuple[Matrix, Matrix, Matrix, Matrix]:
    """``second`` driven by the output of ``first``."""
    a1, b1, c1, d1 = first
    a2, b2, c2, d2 = second
    n1, n2 = a1.shape[0], a2.shape[0]
    a = np.zeros((n1 + n2, n1 + n2))
    a[:n1, :n1] = a1
    a[n1:, :n1] = b2 @ c1
    a[n1:, n1:] = a2
    b = np.vstack([b1, b2 @ d1])
    c = np.hstack([d2 @ c1, c2])
    return a, b, c, d2 @ d1


def realisation(model: PoleZeroModel) -> tuple[Matrix, Matrix, Matrix, Matrix]:
    """A real state-space realisation (A, B, C, D) of the model, as a cascade of sections.

    Raises
    ------
    ValueError
        When the model has more zeros than poles (not proper: no state-space form).
    """
    if model.relative_degree < 0:
        raise ValueError("the response has more zeros than poles: its gain grows without bound with frequency")
    pole_reals, pole_pairs = _split(model.poles_rad_s)
    zero_reals, zero_pairs = _split(model.zeros_rad_s)
    magnitudes = np.abs(model.poles_rad_s[model.poles_rad_s != 0])
    reference = float(np.exp(np.mean(np.log(magnitudes)))) if len(magnitudes) else model.scale_rad_s
    # Denominators: complex pairs; real poles pair up only when a complex zero pair needs room.
    sections: list[dict[str, object]] = []
    for pole in pole_pairs:
        sections.append({"den": (-2.0 * pole.real, abs(pole) ** 2), "zeros": [], "room": 2})
    reals = sorted(pole_reals, key=abs)
    while len(zero_pairs) > sum(1 for s in sections if s["room"] == 2 and not s["zeros"]) and len(reals) >= 2:
        p1, p2 = reals.pop(0), reals.pop(0)
        sections.append({"den": (-(p1 + p2), p1 * p2), "zeros": [], "room": 2})
    for pole in reals:
        sections.append({"den": (pole,), "zeros": [], "room": 1})
    for pair in zero_pairs:
        for section in sections:
            if section["room"] == 2:
                section["zeros"] = [pair, pair.conjugate()]
                section["room"] = 0
                break
        else:  # complex zeros with only first-order room left: not expected for proper models
            raise ValueError("a complex zero pair could not be placed in a second-order section")
    for zero in zero_reals:
        for section in sections:
            room = section["room"]
            assert isinstance(room, int)
            if room >= 1:
                zeros = section["zeros"]
                assert isinstance(zeros, list)
                zeros.append(complex(zero))
                section["room"] = room - 1
                break
    log_gain = model.log_gain  # ln|K| accumulates the section norms: K alone may overflow
    blocks: list[tuple[Matrix, Matrix, Matrix, Matrix]] = []
    for section in sections:
        den = section["den"]
        zeros = section["zeros"]
        assert isinstance(den, tuple) and isinstance(zeros, list)
        numerator = np.real(np.poly(np.array(zeros, dtype=complex))) if zeros else np.array([1.0])
        if len(den) == 2:
            a1, a0 = float(den[0]), float(den[1])
            padded = np.concatenate([np.zeros(3 - len(numerator)), numerator])
            omega = math.sqrt(abs(a0)) if a0 != 0 else reference
            # Normalised at 2ω0, away from an undamped pair's resonance (where D(jω0) = 0).
            point = 2j * omega
            value = np.polyval(padded, point) / (point**2 + a1 * point + a0)
            norm = float(abs(value)) if np.isfinite(value) and value != 0 else 1.0
            log_gain += math.log(norm)
            blocks.append(_second_order(padded / norm, a1, a0, reference))
        else:
            pole = float(den[0])
            padded = np.concatenate([np.zeros(2 - len(numerator)), numerator])
            omega = abs(pole) if pole != 0 else reference
            value = np.polyval(padded, 1j * omega) / (1j * omega - pole)  # never 0: pole is real
            norm = float(abs(value)) if np.isfinite(value) and value != 0 else 1.0
            log_gain += math.log(norm)
            blocks.append(_first_order(padded / norm, pole, reference))
    gain = model.gain_sign * math.exp(log_gain)
    if not blocks:  # no poles and no zeros: a pure gain
        return np.zeros((0, 0)), np.zeros((0, 1)), np.zeros((1, 0)), np.array([[gain]])
    system = blocks[0]
    for block in blocks[1:]:
        system = _series(system, block)
    a, b, c, d = system
    return a, b, c * gain, d * gain


# -- time span -------------------------------------------------------------------------------


def time_span_s(model: PoleZeroModel) -> float:
    """A span that shows the whole step: ten times the slowest decay time constant, plus twice
    the poles' low-frequency group delay Σ −Re(1/p) (a long cascade of fast sections delays the
    edge by the sum of their time constants, beyond any single one).

    For poles on the jω axis or in the right half-plane (no decay), ten times the slowest
    period or time constant instead. With a pole in the right half-plane the span ends where its
    growth reaches e^GROWTH_LIMIT (about 5e8): enough to show the response running away, and
    short of the overflow of e^709 that a longer span would reach.
    """
    poles = model.poles_rad_s
    decays = -poles.real
    stable = decays > STABILITY_RTOL * np.abs(poles)
    magnitudes = np.abs(poles[poles != 0])
    if np.any(stable):
        delay = float(np.sum(decays[stable] / np.abs(poles[stable]) ** 2))
        span = SPAN_TIME_CONSTANTS / float(np.min(decays[stable])) + 2.0 * delay
    elif len(magnitudes):
        span = SPAN_TIME_CONSTANTS / float(np.min(magnitudes))
    else:
        span = SPAN_TIME_CONSTANTS / model.scale_rad_s
    growth = poles.real[poles.real > STABILITY_RTOL * np.abs(poles)]
    if len(growth):
        span = min(span, GROWTH_LIMIT / float(np.max(growth)))
    return span


def _time_grid(model: PoleZeroModel, span_s: float) -> NDArray[np.float64]:
    """Linear over the span, plus uniform runs per decade below its first step (fast edges).

    The grid is piecewise uniform on purpose: the exact evaluation walks arithmetic progressions.
    """
    magnitudes = np.abs(model.poles_rad_s[model.poles_rad_s != 0])
    fastest = 1.0 / float(np.max(magnitudes)) if len(magnitudes) else span_s / SPAN_TIME_CONSTANTS
    linear = np.linspace(0.0, span_s, LINEAR_POINTS)
    first_step = float(linear[1])
    start = fastest / 50.0
    early: list[NDArray[np.float64]] = []
    while start < first_step:
        stop = min(10.0 * start, first_step)
        early.append(np.linspace(start, stop, POINTS_PER_DECADE, endpoint=False))
        start = stop
    return np.concatenate([linear[:1], *early, linear[1:]])


# -- evaluation ------------------------------------------------------------------------------


MODAL_CONDITION_LIMIT = 1e6


class _Propagator:
    """y(t) = output·e^{matrix·t}·initial for every t, without a loop per instant.

    When the matrix has a well-conditioned eigenvector basis (distinct poles, the usual case)
    the modal form Σ r_k·w_k·e^{λ_k t} is evaluated for all t at once. Otherwise (repeated poles:
    Jordan blocks; long cascades) the instants are split into arithmetic progressions, and along
    each one the states follow by doubling, Z[2^k..2^(k+1)) = e^{M·h·2^k}·Z[0..2^k), from one
    expm per progression (scaling and squaring; Moler and Van Loan, 2003). The decomposition is
    made once per system, so repeated refinements cost only evaluations.
    """

    def __init__(self, matrix: Matrix, initial: NDArray[np.float64], output: NDArray[np.float64]) -> None:
        self.matrix = matrix
        self.initial = initial
        self.output = output
        self.modal: tuple[NDArray[np.complex128], NDArray[np.complex128]] | None = None
        values, vectors = np.linalg.eig(matrix)
        if np.linalg.cond(vectors) <= MODAL_CONDITION_LIMIT:
            weights = np.linalg.solve(vectors, initial.astype(complex))
            self.modal = (values, (output @ vectors) * weights)

    def __call__(self, t_s: NDArray[np.float64]) -> NDArray[np.float64]:
        t_s = np.asarray(t_s, dtype=float)
        if self.modal is not None:
            values, residues = self.modal
            return np.asarray(np.real(np.exp(np.outer(t_s, values)) @ residues), dtype=float)
        import scipy.linalg  # lazily: 0.6 s of import, off the start-up path

        order = np.argsort(t_s, kind="stable")
        sorted_t = t_s[order]
        result = np.empty(len(sorted_t))
        start = 0
        while start < len(sorted_t):
            if start == len(sorted_t) - 1:
                length, step = 1, 0.0
            else:
                step = float(sorted_t[start + 1] - sorted_t[start])
                # Uniform up to the rounding of the instants themselves (np.linspace over a short
                # bracket far from t = 0 leaves steps that differ by ~eps·t): treating such
                # instants as exactly uniform moves each by that rounding, nothing more.
                slack = 1e-9 * max(step, 1e-300) + 64.0 * np.finfo(float).eps * float(abs(sorted_t[-1]))
                uniform = np.abs(np.diff(sorted_t[start:]) - step) <= slack
                broken = np.nonzero(~uniform)[0]
                length = int(broken[0]) + 1 if len(broken) else len(sorted_t) - start
            states = (scipy.linalg.expm(self.matrix * sorted_t[start]) @ self.initial)[:, None]
            if length > 1:
                power = scipy.linalg.expm(self.matrix * step)
                while states.shape[1] < length:
                    states = np.hstack([states, power @ states])
                    power = power @ power
            result[start:start + length] = self.output @ states[:, :length]
            start += length
        unsorted = np.empty_like(result)
        unsorted[order] = result
        return unsorted


def _step_evaluator(system: tuple[Matrix, Matrix, Matrix, Matrix]) -> Callable[[NDArray[np.float64]], NDArray[np.float64]]:
    """t -> y(t) = C·∫₀ᵗ e^{Aτ}dτ·B + D, the last column of expm([[A, B], [0, 0]]·t)."""
    a, b, c, d = system
    n = a.shape[0]
    direct = float(d[0, 0])
    if n == 0:
        return lambda t_s: np.full(np.asarray(t_s).shape, direct)
    augmented = np.zeros((n + 1, n + 1))
    augmented[:n, :n] = a
    augmented[:n, n] = b[:, 0]
    initial = np.zeros(n + 1)
    initial[n] = 1.0
    propagator = _Propagator(augmented, initial, np.concatenate([c[0], [0.0]]))
    return lambda t_s: propagator(t_s) + direct


def _step_values(system: tuple[Matrix, Matrix, Matrix, Matrix], t_s: NDArray[np.float64]) -> NDArray[np.float64]:
    return _step_evaluator(system)(t_s)


def _impulse_values(system: tuple[Matrix, Matrix, Matrix, Matrix], t_s: NDArray[np.float64]) -> NDArray[np.float64]:
    a, b, c, _ = system
    t_s = np.asarray(t_s, dtype=float)
    if a.shape[0] == 0:
        return np.zeros(t_s.shape)
    return _Propagator(a, b[:, 0], c[0])(t_s)


def refine_crossing(function: Callable[[NDArray[np.float64]], NDArray[np.float64]], low: float, high: float,
                    level: float, rounds: int = 6, points: int = 33) -> float:
    """The first point in [low, high] where ``function`` crosses ``level`` (k-section search).

    ``function`` is evaluated on ``points`` points per round in one vectorised call; the bracket
    shrinks by a factor ``points − 1`` per round, and the last bracket is interpolated linearly.
    The caller guarantees that ``function(low)`` and ``function(high)`` lie on opposite sides.
    """
    side = math.copysign(1.0, float(function(np.array([low]))[0]) - level)
    for _ in range(rounds):
        grid = np.linspace(low, high, points)
        values = function(grid) - level
        beyond = np.nonzero(np.sign(values) != side)[0]
        if len(beyond) == 0 or beyond[0] == 0:
            break
        index = int(beyond[0])
        low, high = float(grid[index - 1]), float(grid[index])
    ends = function(np.array([low, high])) - level
    if ends[1] == ends[0]:
        return high
    return float(low + (high - low) * (-ends[0]) / (ends[1] - ends[0]))


def _instability(model: PoleZeroModel) -> str | None:
    poles = model.poles_rad_s
    if len(poles) == 0:
        return None
    limit = STABILITY_RTOL * np.abs(poles)
    right = poles[poles.real > limit]
    if len(right):
        from stagewise.engine.stability import describe_pole  # noqa: PLC0415 (it imports this module)

        # The same words as the stability verdict beside it (the pole furthest right, upper half).
        first = max(right, key=lambda pole: (pole.real, pole.imag >= 0))
        return f"the system is unstable: {describe_pole(complex(first.real, abs(first.imag)))}"
    if np.any(poles == 0):
        return "the step response grows without bound: a pole at s = 0 (an integrator)"
    axis = poles[np.abs(poles.real) <= limit]
    if len(axis):
        return (f"the step response never settles: a pole pair on the jω axis at {abs(axis[0]) / (2 * math.pi):.6g} Hz "
                "(no damping)")
    return None


def step_response(model: PoleZeroModel, t_s: NDArray[np.float64] | None = None) -> StepResponse:
    """The unit-step response of ``model`` and its metrics.

    Parameters
    ----------
    model : PoleZeroModel
        Minimal model (s in rad/s).
    t_s : ndarray, optional
        Instants in seconds; default: a grid over :func:`time_span_s` (metrics are refined on
        the exact response whatever the grid).

    Returns
    -------
    StepResponse
        Values in the unit of the response (V for a 1 V step; V per A for a current step).
    """
    try:
        system = realisation(model)
    except ValueError as error:
        reason = f"{error}; its step response holds an impulse"
        return StepResponse(np.zeros(0), np.zeros(0), None, None, None, None, None,
                            why=dict.fromkeys(_STEP_NAMES, reason))
    return _step_of_system(system, model, model.dc_gain, t_s)


_STEP_NAMES = ("final", "rise_s", "overshoot_pct", "settle_1pct_s", "settle_0p1pct_s")


def modal_realisation(
    g: Matrix, c: Matrix, b: NDArray[np.float64], output: int, poles: NDArray[np.complex128]
) -> tuple[Matrix, Matrix, Matrix, Matrix]:
    """A real modal realisation of ``(G + sC)·x = b``, ``y = x[output]``, from its poles alone.

    Near a simple pole p, (G + sC)⁻¹ ≈ v·wᵀ/((s − p)·wᵀCv) with v, w the right and left null
    vectors of G + pC, so H has the residue r = (e_outᵀv)(wᵀb)/(wᵀCv); a conjugate pair
    r/(s − p) + r̄/(s − p̄) is the real block [[σ, ω], [−ω, σ]] with B = [1, 0]ᵀ and C = [2·Re r,
    2·Im r]. The direct term is what the residues leave of H far above the poles. No zeros are
    needed, so this serves when the zeros are ill-conditioned (a high relative degree).

    Raises
    ------
    ValueError
        When a repeated pole forms a Jordan block (no simple residues). Poles repeated by
        decoupled identical sections are fine: their null space carries the whole residue.

    References
    ----------
    T. Kailath, *Linear Systems*, Prentice-Hall, 1980, sec. 6.2 (modal forms, residues).
    """
    c_norm = float(np.linalg.norm(c)) or 1.0
    blocks_a: list[Matrix] = []
    blocks_b: list[Matrix] = []
    blocks_c: list[Matrix] = []
    residues: list[complex] = []
    used: list[complex] = []
    groups: list[tuple[complex, int]] = []
    for pole in poles:
        if pole.imag < 0:
            continue
        for index, (known, count) in enumerate(groups):
            if abs(pole - known) <= 1e-6 * max(abs(known), 1e-300):
                groups[index] = (known, count + 1)
                break
        else:
            groups.append((complex(pole), 1))
    import scipy.linalg  # lazily: 0.6 s of import, off the start-up path

    # One QZ with both eigenvector sets serves every pole: (G + λC)·v = 0 and wᵀ(G + λC) = 0.
    with np.errstate(divide="ignore", invalid="ignore"):
        values, left_vectors, right_vectors = scipy.linalg.eig(g, -c, left=True, right=True)
    finite = np.isfinite(values)
    values = np.where(finite, values, np.inf)
    for pole, multiplicity in groups:
        # A pole repeated k times by decoupled identical sections (buffered stages) has a
        # k-dimensional null space: the residue is e_outᵀ·V·(WᵀCV)⁻¹·Wᵀb. A Jordan block (a
        # coupled repetition) leaves WᵀCV singular and has no such residue.
        nearest = np.argsort(np.abs(values - pole))[:multiplicity]
        right = right_vectors[:, nearest]
        left = left_vectors[:, nearest].conj().T
        coupling = left @ c @ right
        if np.linalg.cond(coupling) > 1e8 or float(np.max(np.abs(coupling))) <= 1e-15 * c_norm:
            raise ValueError("a repeated pole forms a Jordan block, so the response has no simple residues")
        residue = complex(right[output] @ np.linalg.solve(coupling, left @ b.astype(complex)))
        residues.append(residue)
        used.append(complex(pole))
        if pole.imag == 0:
            blocks_a.append(np.array([[pole.real]]))
            blocks_b.append(np.array([[1.0]]))
            blocks_c.append(np.array([[residue.real]]))
        else:
            blocks_a.append(np.array([[pole.real, pole.imag], [-pole.imag, pole.real]]))
            blocks_b.append(np.array([[1.0], [0.0]]))
            blocks_c.append(np.array([[2.0 * residue.real, 2.0 * residue.imag]]))
    size = sum(block.shape[0] for block in blocks_a)
    a = np.zeros((size, size))
    b_vector = np.zeros((size, 1))
    c_row = np.zeros((1, size))
    offset = 0
    for block_a, block_b, block_c in zip(blocks_a, blocks_b, blocks_c, strict=True):
        width = block_a.shape[0]
        a[offset:offset + width, offset:offset + width] = block_a
        b_vector[offset:offset + width] = block_b
        c_row[:, offset:offset + width] = block_c
        offset += width
    # Direct term: H far above every pole minus the residues' share there.
    far = 1j * 1e4 * max((abs(p) for p in used), default=1.0)
    matrix = g + far * c
    exact = complex(np.linalg.solve(matrix.astype(complex), b.astype(complex))[output])
    partial = sum(r / (far - p) + (np.conj(r) / (far - np.conj(p)) if p.imag > 0 else 0.0)
                  for r, p in zip(residues, used, strict=True))
    direct = (exact - partial).real
    if abs(direct) <= 1e-9 * max(abs(exact), abs(partial), 1e-300):
        direct = 0.0
    _check_modal_fit(g, c, b, output, (a, b_vector, c_row, np.array([[direct]])), used)
    return a, b_vector, c_row, np.array([[direct]])


def _check_modal_fit(g: Matrix, c: Matrix, b: NDArray[np.float64], output: int,
                     system: tuple[Matrix, Matrix, Matrix, Matrix], poles: list[complex]) -> None:
    """Raise when the modal form misses the exact response (residues too ill-conditioned).

    Residues of long cascades are large and alternate in sign; their sum then loses every digit
    (the eigenvalues' condition numbers 1/|wᵀCv| reach 1e13). Better no step than a wrong one.
    """
    a, b_vector, c_row, d = system
    magnitudes = [abs(p) for p in poles if p != 0] or [1.0]
    s = 1j * np.logspace(math.log10(min(magnitudes) / 10.0), math.log10(max(magnitudes) * 10.0), 24) * 1.0137
    exact = np.linalg.solve(g[None, :, :] + s[:, None, None] * c[None, :, :],
                            np.broadcast_to(b.astype(complex)[None, :, None], (len(s), len(b), 1)))[:, output, 0]
    size = a.shape[0]
    modal = d[0, 0] + (c_row @ np.linalg.solve(s[:, None, None] * np.eye(size)[None] - a[None],
                                               np.broadcast_to(b_vector.astype(complex)[None], (len(s), size, 1))))[:, 0, 0]
    scale = np.maximum(np.abs(exact), 1e-9 * float(np.max(np.abs(exact))))
    error = float(np.max(np.abs(modal - exact) / scale))
    if not error <= 1e-6:
        raise ValueError(f"the residues are ill-conditioned here (the modal form misses the response by {error:.2g})")


def step_response_of_pencil(
    g: Matrix, c: Matrix, b: NDArray[np.float64], output: int, model: PoleZeroModel,
    t_s: NDArray[np.float64] | None = None,
) -> StepResponse:
    """The step response from the pencil's poles and residues, when the zeros cannot be trusted.

    The final value is the exact H(0) from one solve of G·x = b. See :func:`modal_realisation`;
    when the residues are ill-conditioned too (long cascades), the pencil's own index-1 ODE form
    is used (:func:`~stagewise.engine.poles.index_one_state_space`), checked against the exact
    response the same way.
    """
    # All the pencil's poles: with untrusted zeros, a "cancellation" may have paired a true pole
    # with a spurious zero.
    poles = model.all_poles_rad_s
    model = replace(model, poles_rad_s=poles, zeros_rad_s=np.zeros(0, dtype=complex), cancelled=())
    try:
        system = modal_realisation(g, c, b, output, poles)
    except (ValueError, np.linalg.LinAlgError) as modal_error:
        # Residues failed too: fall back to the pencil's own ODE form (exact, not minimal).
        try:
            state, drive_vector, out_row, direct = index_one_state_space(g, c, b, output)
            system = (state, drive_vector[:, None], out_row[None, :], np.array([[direct]]))
            _check_modal_fit(g, c, b, output, system, list(poles))
        except (ValueError, np.linalg.LinAlgError) as error:
            return StepResponse(np.zeros(0), np.zeros(0), None, None, None, None, None,
                                why=dict.fromkeys(_STEP_NAMES, f"{modal_error}; {error}"))
    final: float | None
    try:
        final = float(np.linalg.solve(g, b)[output]) if not np.any(model.poles_rad_s == 0) else None
    except np.linalg.LinAlgError:
        final = None
    return _step_of_system(system, model, final, t_s)


# Below this fraction of the peak excursion, a final value is a leak, not the signal's level.
FAINT_FINAL = 0.1


def _step_of_system(system: tuple[Matrix, Matrix, Matrix, Matrix], model: PoleZeroModel, final: float | None,
                    t_s: NDArray[np.float64] | None) -> StepResponse:
    names = _STEP_NAMES
    span = time_span_s(model)
    grid = _time_grid(model, span) if t_s is None else np.asarray(t_s, dtype=float)
    evaluate = _step_evaluator(system)
    y = evaluate(grid)
    problem = _instability(model)
    if problem is not None:
        return StepResponse(grid, y, None, None, None, None, None, why=dict.fromkeys(names, problem))
    if final is None:
        return StepResponse(grid, y, None, None, None, None, None,
                            why=dict.fromkeys(names, "the final value could not be computed"))
    if abs(final) <= 1e-9 * float(np.max(np.abs(y), initial=0.0)):
        final = 0.0  # an exact solve of a DC-blocked response leaves rounding, not a level
    return step_metrics(grid, y, final, evaluate)


def step_metrics(grid: NDArray[np.float64], y: NDArray[np.float64], final: float,
                 response: Callable[[NDArray[np.float64]], NDArray[np.float64]]) -> StepResponse:
    """Rise time, overshoot and settling of a step response sampled on ``grid`` (definitions above).

    ``response`` evaluates the response at any instants of the span; crossings are refined on it.
    The predicted step passes its exact evaluator; a bench capture passes linear interpolation
    between its samples, so both are measured by the same rules.
    """
    why: dict[str, str] = {}
    rise: float | None = None
    overshoot: float | None = None
    basis = "final value"
    excursion = float(np.max(np.abs(y), initial=0.0))
    if final == 0.0 or abs(final) < FAINT_FINAL * excursion:
        if final == 0.0:
            reason = ("the step response returns to zero (a zero at DC: high-pass or band-pass), so rise time and "
                      "overshoot are not defined")
        else:
            # A high-pass shape with a small DC path (a leakage resistance): measured against the
            # level it settles to, the rise and overshoot would describe the leak, not the signal.
            reason = (f"the step response settles at {abs(final) / excursion:.2g} of its peak (a high-pass shape "
                      "with a small DC path), so rise time and overshoot against the final value do not apply")
        why["rise_s"] = reason
        why["overshoot_pct"] = reason
        basis = "peak"
        reference = excursion
        normalised = y / reference if reference > 0 else y
        target = final / reference if reference > 0 else 0.0
    else:
        reference = abs(final)
        normalised = y / final
        target = 1.0

        def relative(t: NDArray[np.float64]) -> NDArray[np.float64]:
            return response(t) / final

        instants: list[float | None] = []
        for fraction in (0.1, 0.9):
            above = np.nonzero(normalised >= fraction)[0]
            if len(above) == 0:
                instants.append(None)
                continue
            index = int(above[0])
            if index == 0:
                instants.append(float(grid[0]))
            else:
                instants.append(refine_crossing(relative, float(grid[index - 1]), float(grid[index]), fraction))
        if instants[0] is not None and instants[1] is not None:
            rise = instants[1] - instants[0]
        else:
            why["rise_s"] = "the step response does not reach 90 % of its final value within the span"
        peak_index = int(np.argmax(normalised))
        peak = float(normalised[peak_index])
        if 0 < peak_index < len(grid) - 1:
            local = np.linspace(grid[peak_index - 1], grid[peak_index + 1], 65)
            for _ in range(3):
                values = relative(local)
                best = int(np.argmax(values))
                peak = max(peak, float(values[best]))
                low, high = local[max(best - 1, 0)], local[min(best + 1, len(local) - 1)]
                local = np.linspace(low, high, 65)
        overshoot = max(peak - 1.0, 0.0) * 100.0
    settles: list[float | None] = []
    for band, name in ((0.01, "settle_1pct_s"), (0.001, "settle_0p1pct_s")):
        outside = np.nonzero(np.abs(normalised - target) >= band)[0]
        if len(outside) == 0:
            settles.append(float(grid[0]))
            continue
        last = int(outside[-1])
        if last == len(grid) - 1:
            settles.append(None)
            why[name] = f"the step response is still outside ±{band * 100:g} % at the end of the span ({grid[-1]:.4g} s)"
            continue
        scale = reference if basis == "peak" else final

        def deviation(t: NDArray[np.float64], scale: float = scale) -> NDArray[np.float64]:
            return np.abs(response(t) / scale - target)

        settles.append(refine_crossing(deviation, float(grid[last]), float(grid[last + 1]), band))
    return StepResponse(
        t_s=grid,
        y=y,
        final=float(final),
        rise_s=rise,
        overshoot_pct=overshoot,
        settle_1pct_s=settles[0],
        settle_0p1pct_s=settles[1],
        settle_basis=basis,
        why=why,
    )


def impulse_response(model: PoleZeroModel, t_s: NDArray[np.float64] | None = None) -> ImpulseResponse:
    """The impulse response ``C·e^{At}·B`` of ``model`` (unit of the response per second).

    A direct term D (as many zeros as poles) adds ``D·δ(t)``, reported as ``impulse_weight``.
    """
    try:
        system = realisation(model)
    except ValueError as error:
        return ImpulseResponse(np.zeros(0), np.zeros(0), 0.0, why=f"{error}; its impulse response holds derivatives of δ(t)")
    grid = _time_grid(model, time_span_s(model)) if t_s is None else np.asarray(t_s, dtype=float)
    return ImpulseResponse(grid, _impulse_values(system, grid), float(system[3][0, 0]))
