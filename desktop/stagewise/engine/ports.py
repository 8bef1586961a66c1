"""Port relations: each stage reduced, at every frequency, to two equations in its port variables.

A stage is a two-port between its input node, its output node and node ``0``. Its port
variables are ``w = (V_in, I_in, V_out, I_out)``, both currents flowing *into* the stage. With
the internal unknowns eliminated, every well-posed stage satisfies exactly two independent
linear equations ``P(s)·w = 0`` (``P`` is 2 x 4). Unlike impedance, admittance or chain (ABCD)
parameters, this form exists for every well-posed stage: an ideal op-amp output (``V_out``
fixed by ``V_in``, any ``I_out``), an input at a virtual ground (``V_in ≡ 0``), or a stage whose
input and output are the same node (a shunt sensor model: ``V_in = V_out``).

How the two equations are found
-------------------------------
The stage's MNA rows with the two port currents injected, ``(G + sC)·x − e_in·I_in −
e_out·I_out = 0``, are ``n`` equations in ``n + 2`` unknowns: a two-dimensional solution space.
Two terminating rows make the system square. Solving it once for ``t = (1, 0)`` and once for
``t = (0, 1)`` (one stacked LAPACK call over all frequencies) spans the solution space.

1. A probe at a few frequencies terminates both ports in a resistance R0 (the geometric mean
   of the stage's resistors): ``V + R0·I = t`` is regular for every well-posed stage, and
   gives the relation ``Y0·V + (R0·Y0 − 1)·I = 0`` with ``I = Y0·t``. From it the engine reads
   which two port variables can be imposed (:func:`termination_scores`) and whether the stage
   by itself holds ``V_in ≡ 0`` or ``I_in ≡ 0`` (:func:`forced_zero`).
2. The relation itself is solved with two port variables imposed, in the order of preference
   of :data:`TERMINATIONS` (input voltage and output current for most stages; both currents for
   an input at a virtual ground), which gives the other two explicitly. Explicit forms carry
   the stage's exact structure (a shunt stage's ``V_out = V_in``, an ideal output's zero
   output impedance), so they stay accurate whatever the impedance level of the neighbours,
   where an R0 form would lose digits in proportion to the mismatch.
3. Where a neighbour drives a port like a current source (a current drive, a high output
   impedance), the chain re-reduces the stage imposing the current there instead, frequency by
   frequency (:func:`reduce_stage_terminated`): computing a small input current for a given
   voltage cancels digits; computing the voltage for a given current does not.

The relation describes the same set of port solutions whichever terminations were used; its
2 x 2 minors (:func:`relation_minors`) are what the cascade uses.

References
----------
C.-W. Ho, A. E. Ruehli and P. A. Brennan, "The modified nodal approach to network analysis",
IEEE Trans. Circuits and Systems, vol. 22, no. 6, pp. 504-509, 1975.
V. Belevitch, *Classical Network Theory*, Holden-Day, 1968 (multiports described by linear
relations between port voltages and currents, which exist where immittance matrices do not).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from stagewise.engine.mna import CircuitError, StageSystem
from stagewise.engine.sweep import SOLVE_CHUNK_BYTES

__all__ = [
    "V_IN",
    "I_IN",
    "V_OUT",
    "I_OUT",
    "MINOR_PAIRS",
    "PortRelation",
    "forced_zero",
    "TERMINATIONS",
    "reduce_stage",
    "reduce_stage_terminated",
    "reference_resistance",
    "relation_minors",
    "retermination",
    "termination_scores",
]

TWO_PI = 2.0 * math.pi
# Column order of the port variables in a relation P·w = 0.
V_IN, I_IN, V_OUT, I_OUT = 0, 1, 2, 3
# Column pairs of the minors a PortRelation carries, in this order.
MINOR_PAIRS: tuple[tuple[int, int], ...] = (
    (V_IN, I_IN), (V_IN, V_OUT), (V_IN, I_OUT), (I_IN, V_OUT), (I_IN, I_OUT), (V_OUT, I_OUT),
)
DEFAULT_R0_OHM = 1e3
# Retries with other terminations when a stage terminated in R0 is singular at a frequency
# (it would take a negative resistance equal to -R0 somewhere in the stage).
_R0_FACTORS = (1.0, 3.7, 0.29)


@dataclass(frozen=True, slots=True)
class PortRelation:
    """A stage's port relation ``P(j2πf)·(V_in, I_in, V_out, I_out) = 0`` at every frequency.

    Attributes
    ----------
    f_hz : ndarray, shape (F,)
        Frequencies in hertz.
    p : ndarray, shape (F, 2, 4), complex
        The two equations per frequency; columns in the order ``V_in`` (V), ``I_in`` (A),
        ``V_out`` (V), ``I_out`` (A), both currents flowing into the stage. Each row is scaled
        to unit largest magnitude.
    fingerprint : str
        The stage fingerprint the relation was computed from (the cache key).
    minors : ndarray, shape (6, F), complex
        The 2 x 2 minors of ``p`` (its Plücker coordinates), for the column pairs of
        :data:`MINOR_PAIRS`; the cascade works on these (see :func:`relation_minors`).
    r0_ohm : float
        The reference resistance of the stage (its resistors' geometric mean, else 1 kΩ).
    imposed : tuple of two int, or None
        The two port variables the relation was solved for (``(V_IN, I_OUT)`` for most
        stages); ``None`` when it came from the R0-terminated form.
    input_voltage_zero : bool
        The stage by itself holds V_in ≡ 0 (its input is a virtual ground).
    input_current_zero : bool
        The stage by itself takes no input current, I_in ≡ 0.
    per_frequency : bool
        The terminations were chosen frequency by frequency to suit the neighbouring stages
        (:func:`reduce_stage_terminated`); ``imposed`` is then ``None``.
    """

    f_hz: NDArray[np.float64]
    p: NDArray[np.complex128]
    fingerprint: str
    r0_ohm: float
    minors: NDArray[np.complex128]
    imposed: tuple[int, int] | None = None
    input_voltage_zero: bool = False
    input_current_zero: bool = False
    per_frequency: bool = False


def relation_minors(relation: NDArray[np.complex128]) -> NDArray[np.complex128]:
    """The six 2 x 2 minors of a relation (its Plücker coordinates), shape (6, F).

    ``minors[k] = P[0, a]·P[1, b] − P[0, b]·P[1, a]`` for ``(a, b) = MINOR_PAIRS[k]``. They
    describe the relation independently of which two equations were written down, and the
    cascade through a stage is a 2 x 2 map of them (see :func:`stagewise.engine.chain.cascade`).

    References
    ----------
    W. V. D. Hodge and D. Pedoe, *Methods of Algebraic Geometry*, vol. 1, Cambridge, 1947
    (Grassmann/Plücker coordinates of a linear subspace).
    """
    rows = np.ascontiguousarray(np.moveaxis(relation, 0, -1))  # (2, 4, F)
    return np.stack([rows[0, a] * rows[1, b] - rows[0, b] * rows[1, a] for a, b in MINOR_PAIRS])


def reference_resistance(system: StageSystem) -> float:
    """The terminating resistance R0 (Ω): the geometric mean of the stage's resistors, else 1 kΩ."""
    values = [element.value for element in system.elements if element.type == "R" and element.value > 0]
    if not values:
        return DEFAULT_R0_OHM
    return float(math.exp(sum(math.log(value) for value in values) / len(values)))


# The pairs of port variables that can be imposed by the terminations, in order of preference:
# voltage in / current out (the isolated drive with the output open), both currents, both
# voltages, current in / voltage out, the input pair, the output pair.
TERMINATIONS: tuple[tuple[int, int], ...] = (
    (V_IN, I_OUT), (I_IN, I_OUT), (V_IN, V_OUT), (I_IN, V_OUT), (V_IN, I_IN), (V_OUT, I_OUT),
)
# A termination is accepted, in the order of preference, unless it is singular by the stage's
# structure (an input at a virtual ground cannot take a voltage): on the R0 scale its
# complementary 2 x 2 block keeps at least this fraction of the largest possible minor. The
# preferred explicit forms carry the stage's exact structure (a shunt stage's V_out = V_in,
# an ideal output's zero output impedance), so they stay accurate whatever impedance level
# the neighbouring stages present; a better-scored but less structured form would not (the
# impedance form of a 1 GΩ shunt next to a 1 Ω virtual ground loses nine digits).
_GOOD_TERMINATION = 1e-9
_SAMPLES = 9


def _terminated_solve(system: StageSystem, s: NDArray[np.complex128], imposed: tuple[int, int] | None,
                      r0_ohm: float, per_frequency: NDArray[np.int_] | None = None) -> NDArray[np.complex128]:
    """Solve the stage with two terminating rows, for t = e1 and t = e2.

    ``imposed`` names the two port variables set to ``t`` (a voltage row ``v(port) = t`` or a
    current row ``I_port = t``); ``None`` terminates both ports in R0 (``V + R0·I = t``).
    ``per_frequency`` (shape (F, 2)), when given, names the imposed pair at each frequency
    instead. Returns the four port variables, shape (F, 4, 2): column j for t = e_j.
    """
    n = system.size
    size = n + 2
    g = np.zeros((size, size))
    c = np.zeros((size, size))
    g[:n, :n] = system.g
    c[:n, :n] = system.c
    port_in, port_out = system.input_index, system.output_index
    # The injected port currents enter their node's current balance (rows: currents leaving).
    g[port_in, n] -= 1.0
    g[port_out, n + 1] -= 1.0
    column_of = np.array([port_in, n, port_out, n + 1])  # V_IN, I_IN, V_OUT, I_OUT
    if imposed is None and per_frequency is None:
        # V_in + R0·I_in = t1, V_out + R0·I_out = t2.
        g[n, port_in], g[n, n] = 1.0, r0_ohm
        g[n + 1, port_out], g[n + 1, n + 1] = 1.0, r0_ohm
    elif imposed is not None:
        g[n, column_of[imposed[0]]] = 1.0
        g[n + 1, column_of[imposed[1]]] = 1.0
    ports = np.empty((len(s), 4, 2), dtype=complex)
    # Chunked over frequencies (memory O(size²) per chunk: 600 frequencies of a 400-node stage
    # were 1.5 GB at once); within a chunk built in place: at a few thousand small matrices,
    # temporaries cost as much as the solve.
    chunk = max(1, int(SOLVE_CHUNK_BYTES // (16 * size * (size + 2))))
    for start in range(0, len(s), chunk):
        part = s[start:start + chunk]
        matrices = np.empty((len(part), size, size), dtype=complex)
        np.multiply(part[:, None, None], c[None, :, :], out=matrices)
        matrices += g[None, :, :]
        if per_frequency is not None:
            rows = np.arange(len(part))
            matrices[rows, n, column_of[per_frequency[start:start + chunk, 0]]] = 1.0
            matrices[rows, n + 1, column_of[per_frequency[start:start + chunk, 1]]] = 1.0
        right = np.zeros((len(part), size, 2), dtype=complex)
        right[:, n, 0] = 1.0
        right[:, n + 1, 1] = 1.0
        ports[start:start + chunk] = np.linalg.solve(matrices, right)[:, column_of, :]
    return ports


def _r0_relation(ports: NDArray[np.complex128], r0_ohm: float) -> NDArray[np.complex128]:
    # With t = V + R0·I imposed, I = Y0·t, so Y0·V + (R0·Y0 − 1)·I = 0 (one row per current).
    currents = ports[:, [I_IN, I_OUT], :]
    relation = np.empty((ports.shape[0], 2, 4), dtype=complex)
    relation[:, :, V_IN] = currents[:, :, 0]
    relation[:, :, V_OUT] = currents[:, :, 1]
    relation[:, :, I_IN] = r0_ohm * currents[:, :, 0]
    relation[:, :, I_OUT] = r0_ohm * currents[:, :, 1]
    relation[:, 0, I_IN] -= 1.0
    relation[:, 1, I_OUT] -= 1.0
    return relation


def _explicit_relation(ports: NDArray[np.complex128], imposed: tuple[int, int] | NDArray[np.int_]
                       ) -> NDArray[np.complex128]:
    # Each of the two free variables as an explicit combination of the two imposed ones:
    # free_r − Σ_j W[r, j]·imposed_j = 0. Its coefficients are transfer functions of a regular
    # system, each accurate to its own size whatever the impedance level of the ports.
    count = ports.shape[0]
    if isinstance(imposed, tuple):  # the same pair at every frequency: plain slices
        free_variables = [index for index in range(4) if index not in imposed]
        uniform = np.zeros((count, 2, 4), dtype=complex)
        for row, variable in enumerate(free_variables):
            uniform[:, row, variable] = 1.0
            for column, source in enumerate(imposed):
                uniform[:, row, source] = -ports[:, variable, column]
        return uniform
    pairs = np.asarray(imposed, dtype=int)
    taken = np.zeros((count, 4), dtype=bool)
    rows = np.arange(count)
    taken[rows, pairs[:, 0]] = True
    taken[rows, pairs[:, 1]] = True
    free = np.nonzero(~taken)[1].reshape(count, 2)
    relation = np.zeros((count, 2, 4), dtype=complex)
    for row in range(2):
        relation[rows, row, free[:, row]] = 1.0
        for column in range(2):
            relation[rows, row, pairs[:, column]] = -ports[rows, free[:, row], column]
    return relation


def termination_scores(relation: NDArray[np.complex128], r0_ohm: float) -> NDArray[np.float64]:
    """How well each pair of :data:`TERMINATIONS` determines the other two variables.

    For each frequency and pair: |minor of the complementary columns| over the square root of
    the sum of all six squared minors (Cauchy-Binet), with currents measured as R0·I so that
    volts and amperes weigh alike. 1 is ideal, 0 means the pair cannot be imposed.

    Returns
    -------
    ndarray, shape (F, 6)
    """
    scaled = relation.copy()
    scaled[:, :, [I_IN, I_OUT]] /= r0_ohm

    def minor(a: int, b: int) -> NDArray[np.complex128]:
        return scaled[:, 0, a] * scaled[:, 1, b] - scaled[:, 0, b] * scaled[:, 1, a]

    pairs = [(a, b) for a in range(4) for b in range(a + 1, 4)]
    total = np.sqrt(sum(np.abs(minor(a, b)) ** 2 for a, b in pairs))
    total = np.where(total > 0, total, 1.0)
    scores = []
    for imposed in TERMINATIONS:
        a, b = (index for index in range(4) if index not in imposed)
        scores.append(np.abs(minor(a, b)) / total)
    result: NDArray[np.float64] = np.stack(scores, axis=1)
    return result


def _sample(frequencies: NDArray[np.float64]) -> NDArray[np.float64]:
    if len(frequencies) <= _SAMPLES:
        return frequencies
    picks = np.unique(np.linspace(0, len(frequencies) - 1, _SAMPLES).round().astype(int))
    sampled: NDArray[np.float64] = frequencies[picks]
    return sampled


def _robust_r0(system: StageSystem, s: NDArray[np.complex128], base: float) -> tuple[
        NDArray[np.complex128], float] | None:
    for factor in _R0_FACTORS:
        r0_ohm = base * factor
        try:
            ports = _terminated_solve(system, s, None, r0_ohm)
        except np.linalg.LinAlgError:
            continue
        if np.all(np.isfinite(ports)):
            return _r0_relation(ports, r0_ohm), r0_ohm
    return None


def reduce_stage(system: StageSystem, f_hz: NDArray[np.float64], *, stage_id: str = "") -> PortRelation:
    """Reduce an assembled stage to its port relation at the frequencies ``f_hz``.

    First the stage terminated in R0 at both ports (regular for every well-posed stage) is
    solved at a few of the frequencies, to learn which two port variables can be imposed
    (:func:`termination_scores`): for most stages the input voltage and output current, for an
    input at a virtual ground the two currents, and so on. Then one batched solve over all
    frequencies with those two variables imposed gives the other two explicitly; that explicit
    form keeps full accuracy at any impedance level of the neighbouring stages.

    Parameters
    ----------
    system : StageSystem
        The stage's pencil (from :func:`stagewise.engine.mna.assemble`).
    f_hz : array_like, shape (F,)
        Frequencies in hertz.
    stage_id : str
        Used in error messages only.

    Returns
    -------
    PortRelation

    Raises
    ------
    CircuitError
        When the stage is not a well-posed two-port (a port at node 0, a floating node, a loop
        of voltage sources, an op-amp without feedback), naming the stage.

    Examples
    --------
    >>> relation = reduce_stage(assemble(stage, project), frequency_grid(project.settings))  # doctest: +SKIP
    >>> relation.p.shape, relation.imposed                                                   # doctest: +SKIP
    ((601, 2, 4), (0, 3))
    """
    name = f'stage "{stage_id}"' if stage_id else "the stage"
    if system.input_index < 0 or system.output_index < 0:
        raise CircuitError(f"{name}: a port cannot be node 0")
    frequencies = np.asarray(f_hz, dtype=float)
    s = np.asarray(1j * TWO_PI * frequencies, dtype=np.complex128)
    base = reference_resistance(system)
    sampled = _robust_r0(system, np.asarray(1j * TWO_PI * _sample(frequencies), dtype=np.complex128), base)
    if sampled is None:
        raise CircuitError(f"{name} is not a well-posed two-port: with its ports terminated its equations "
                           "are singular (a floating node, a loop of voltage sources or an op-amp without "
                           "feedback)")
    sample_relation, r0_ohm = sampled
    sample_r0 = r0_ohm
    worst = np.min(termination_scores(sample_relation, r0_ohm), axis=0)
    order = [index for index in range(len(TERMINATIONS)) if worst[index] >= _GOOD_TERMINATION]
    order += [index for index in np.argsort(-worst) if index not in order and worst[index] > 0]
    relation: NDArray[np.complex128] | None = None
    imposed: tuple[int, int] | None = None
    for index in order:
        candidate = TERMINATIONS[int(index)]
        try:
            ports = _terminated_solve(system, s, candidate, r0_ohm)
        except np.linalg.LinAlgError:
            continue
        if np.all(np.isfinite(ports)):
            relation, imposed = _explicit_relation(ports, candidate), candidate
            break
    if relation is None:
        # No pair can be imposed at every frequency: the R0 form is regular wherever the stage is.
        full = _robust_r0(system, s, base)
        if full is None:
            raise CircuitError(f"{name} is not a well-posed two-port at every analysis frequency")
        relation, r0_ohm = full
    scale = np.max(np.abs(relation), axis=2, keepdims=True)
    relation = relation / np.where(scale > 0, scale, 1.0)
    return PortRelation(
        f_hz=frequencies, p=relation, fingerprint=system.fingerprint, r0_ohm=r0_ohm,
        minors=relation_minors(relation), imposed=imposed,
        # Structural facts, read where the R0 form weighs volts and amperes alike.
        input_voltage_zero=bool(np.all(forced_zero(sample_relation, V_IN, sample_r0))),
        input_current_zero=bool(np.all(forced_zero(sample_relation, I_IN, sample_r0))),
    )


def retermination(relation: PortRelation, impose_input_current: NDArray[np.bool_],
                   impose_output_voltage: NDArray[np.bool_]) -> bool:
    """Whether terminating by these masks differs from how ``relation`` was computed."""
    if relation.imposed is None or relation.imposed[0] not in (V_IN, I_IN) or relation.imposed[1] not in (
            V_OUT, I_OUT):
        return False
    return bool(np.any(impose_input_current != (relation.imposed[0] == I_IN))
                or np.any(impose_output_voltage != (relation.imposed[1] == V_OUT)))


def reduce_stage_terminated(system: StageSystem, base: PortRelation, impose_input_current: NDArray[np.bool_],
                            impose_output_voltage: NDArray[np.bool_]) -> PortRelation | None:
    """Re-reduce a stage imposing, frequency by frequency, the variables its neighbours suit.

    At a port where the neighbour's impedance is higher than the stage's side, the neighbour
    acts as a current source and the stage's relation is best solved for a given current;
    where it is lower, for a given voltage. (Computing the small input current of a stage
    whose input impedance is far above its series resistance, for a given voltage, cancels
    digits; computing the voltage for a given current does not.)

    Parameters
    ----------
    system : StageSystem
        The stage's pencil.
    base : PortRelation
        The stage's relation from :func:`reduce_stage` (its frequencies and structural facts).
    impose_input_current, impose_output_voltage : ndarray of bool, shape (F,)
        Where to impose I_in (else V_in) and V_out (else I_out).

    Returns
    -------
    PortRelation or None
        ``None`` when these terminations are singular somewhere (keep ``base`` then).
    """
    pairs = np.stack([np.where(impose_input_current, I_IN, V_IN), np.where(impose_output_voltage, V_OUT, I_OUT)],
                     axis=1)
    s = np.asarray(1j * TWO_PI * base.f_hz, dtype=np.complex128)
    try:
        ports = _terminated_solve(system, s, None, base.r0_ohm, per_frequency=pairs)
    except np.linalg.LinAlgError:
        return None
    if not np.all(np.isfinite(ports)):
        return None
    relation = _explicit_relation(ports, pairs)
    scale = np.max(np.abs(relation), axis=2, keepdims=True)
    relation = relation / np.where(scale > 0, scale, 1.0)
    return PortRelation(f_hz=base.f_hz, p=relation, fingerprint=base.fingerprint, r0_ohm=base.r0_ohm,
                        minors=relation_minors(relation), imposed=None, input_voltage_zero=base.input_voltage_zero,
                        input_current_zero=base.input_current_zero, per_frequency=True)


def forced_zero(relation: NDArray[np.complex128], column: int, r0_ohm: float | None = None,
                tolerance: float = 1e-9) -> NDArray[np.bool_]:
    """Where the relation by itself forces the port variable ``column`` to zero.

    ``V_in ≡ 0`` (an input at a virtual ground) holds when a combination of the two rows
    involves ``V_in`` alone, that is when the 2 x 3 block of the other three columns has rank
    one: all its 2 x 2 minors vanish against the product of the rows' norms.

    Parameters
    ----------
    relation : ndarray, shape (F, 2, 4)
    column : int
        One of ``V_IN``, ``I_IN``, ``V_OUT``, ``I_OUT``.
    r0_ohm : float, optional
        Measure currents as R0·I, so that volts and amperes weigh alike (recommended).
    tolerance : float
        Relative size below which a minor counts as zero.

    Returns
    -------
    ndarray of bool, shape (F,)
    """
    if r0_ohm is not None:
        relation = relation.copy()
        relation[:, :, [I_IN, I_OUT]] /= r0_ohm
    others = [index for index in range(4) if index != column]
    block = relation[:, :, others]
    minors = np.stack([
        block[:, 0, a] * block[:, 1, b] - block[:, 0, b] * block[:, 1, a]
        for a, b in ((0, 1), (0, 2), (1, 2))
    ], axis=1)
    norms = np.linalg.norm(relation[:, 0, :], axis=1) * np.linalg.norm(relation[:, 1, :], axis=1)
    rank_one = np.max(np.abs(minors), axis=1) <= tolerance * norms
    involved = np.max(np.abs(relation[:, :, column]), axis=1) > tolerance * np.sqrt(norms)
    result: NDArray[np.bool_] = rank_one & involved
    return result
