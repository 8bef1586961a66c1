"""Loop gain of every finite op-amp, by breaking the loop at its internal gain state.

A finite op-amp's gain-state row reads ``x/A0 + s·x/ω_gbw − (v+ − v−) = 0`` (``mna``). The loop
is broken there: the ``v+ − v−`` entries of that row are removed and a test signal ``u`` takes
their place on the right-hand side, so the state follows ``x = A(s)·u``. The circuit carries it
round and returns ``d = v+ − v−``. Closing the loop sets ``u = d``, so the characteristic
equation is ``1 − d/u = 0``; the loop gain is ``T = −d/u``, the usual ``A(s)·β`` of a negative
feedback loop, with every loading effect of the real circuit included (source and load
impedances, output resistance, input capacitances, the next stage in a merged chain).

The drive is zeroed: a voltage drive becomes a short at the input, a current drive an open
input.

Which method decides what. Whether the loop is stable is not read from the margins: it is the
closed loop's verdict (:mod:`stagewise.engine.stability`: every finite eigenvalue of the
drive-zeroed pencil, which is the closed loop, strictly in the left half-plane). The Bode
margins answer "how far from instability" only for a loop already known to be stable; a loop
that is unstable open-loop, or wired with positive feedback, can show any phase margin at all.
So the margins are reported only when the closed loop is stable, and null with the unstable
pole named otherwise.

Crossover is where ``|T| = 1`` (the highest downward crossing), refined in log f (bracketed regula falsi) on
exact solves. When ``|T|`` passes through 1 several times, the phase margin is the smallest over
every crossing (up or down) of the angular distance from ``T`` to −1, ``180° − |∠T|`` with the
angle taken in (−180°, 180°]: for an ordinary loop (phase between −180° and 0° at crossover)
this is the familiar ``180° + ∠T``. Gain margin is ``−20·log10|T|`` where the unwrapped phase
crosses ``−180°`` (an odd multiple of 180°); when there are several (a conditionally stable
loop), the one nearest instability is reported: the smallest |margin| in dB, which is negative
when the gain would have to fall (not rise) by that much to reach instability.

A loop gain of exactly zero (nothing carries the op-amp's output back to its inputs in this
circuit, e.g. a transimpedance stage placed behind a voltage drive that shorts its input) is
"no loop": every figure null with that reason, never an error.

References
----------
H. W. Bode, *Network Analysis and Feedback Amplifier Design*, Van Nostrand, 1945 (return ratio,
gain and phase margins).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from stagewise.engine.mna import CircuitError, OpampStates, StageSystem, assemble
from stagewise.engine.poles import SingularPencilError, finite_eigenvalues
from stagewise.engine.stability import Stability, stability_of_poles
from stagewise.engine.sweep import SOLVE_CHUNK_BYTES, drive, solve_batched
from stagewise.model.project import Project, Stage

__all__ = [
    "IDEAL_WHY",
    "NO_LOOP_WHY",
    "LoopResult",
    "closed_loop_stability",
    "chain_loops",
    "loop_gain",
    "loop_gains",
    "loops_to_json",
    "stage_loops",
]

TWO_PI = 2.0 * math.pi
IDEAL_WHY = "ideal op-amp: infinite gain, no loop to measure"
NO_LOOP_WHY = ("the loop gain is zero at every frequency: nothing carries the op-amp's output back to its "
               "inputs in this circuit (no loop)")
POINTS_PER_DECADE = 60
BISECTION_STEPS = 60
# A root is found when its bracket is 1e-13 wide in ln f, or the function is within 1e-13 of
# zero (|T| − 1, or a phase offset in radians).
ROOT_LOG_TOLERANCE = 1e-13
ROOT_VALUE_TOLERANCE = 1e-13


@dataclass(frozen=True, slots=True)
class LoopResult:
    """Loop gain of one op-amp and its margins; ``None`` values carry a ``*_why``.

    ``f_hz`` and ``loop_gain`` hold the swept T(j2πf) (empty for an ideal op-amp), for plots.
    """

    ref: str
    crossover_hz: float | None
    phase_margin_deg: float | None
    gain_margin_db: float | None
    phase_crossover_hz: float | None
    crossover_why: str | None
    phase_margin_why: str | None
    gain_margin_why: str | None
    f_hz: NDArray[np.float64]
    loop_gain: NDArray[np.complex128]


def _broken(g: NDArray[np.float64], opamp: OpampStates) -> NDArray[np.float64]:
    """G with the ``−(v+ − v−)`` entries of the op-amp's state row removed."""
    opened = g.copy()
    if opamp.in_plus >= 0:
        opened[opamp.state_row, opamp.in_plus] += 1.0
    if opamp.in_minus >= 0:
        opened[opamp.state_row, opamp.in_minus] -= 1.0
    return opened


def _evaluate(g: NDArray[np.float64], c: NDArray[np.float64], opamp: OpampStates,
              f_hz: NDArray[np.float64]) -> NDArray[np.complex128]:
    """T(j2πf) = −(v+ − v−)/u for an injection u in the state row."""
    s = 1j * TWO_PI * np.asarray(f_hz, dtype=float)
    rhs = np.zeros(g.shape[0], dtype=complex)
    rhs[opamp.state_row] = 1.0
    try:
        x = solve_batched(g, c, rhs, s)
    except np.linalg.LinAlgError as error:
        raise CircuitError(f"{opamp.ref}: the circuit with its loop broken cannot be solved "
                           "(a floating node once the op-amp's input dependence is removed)") from error
    returned = np.zeros(s.size, dtype=complex)
    if opamp.in_plus >= 0:
        returned += x[:, opamp.in_plus]
    if opamp.in_minus >= 0:
        returned -= x[:, opamp.in_minus]
    result: NDArray[np.complex128] = -returned
    return result


def _default_grid(c: NDArray[np.float64], opamps: tuple[OpampStates, ...]) -> NDArray[np.float64]:
    """From 1/100 of the lowest dominant pole to 1000 × the highest gain-bandwidth."""
    gbw_hz = [1.0 / (TWO_PI * c[o.state_row, o.state_row]) for o in opamps]
    low = min(g / o.a0 for g, o in zip(gbw_hz, opamps, strict=True)) / 100.0
    high = max(gbw_hz) * 1000.0
    count = int(math.ceil(math.log10(high / low) * POINTS_PER_DECADE)) + 1
    return np.logspace(math.log10(low), math.log10(high), count)


def _bisect(function: Any, low: float, high: float) -> float:
    """Root of ``function`` (sign change between low and high), bracketed, in log f.

    Regula falsi with the Illinois modification (Dowell and Jarratt, BIT 11, 1971): the bracket
    is kept, so the root is never lost, and convergence is superlinear, so a root to 1e-13 of
    its frequency takes about ten exact solves instead of the sixty of plain bisection. Ends
    with a bisection step whenever the interpolation stalls.
    """
    x_low, x_high = math.log(low), math.log(high)
    f_low, f_high = function(low), function(high)
    if f_low == 0:
        return low
    if f_high == 0 or (f_low > 0) == (f_high > 0):
        return high if f_high == 0 else math.sqrt(low * high)
    side = 0
    for _ in range(BISECTION_STEPS):
        if x_high - x_low <= ROOT_LOG_TOLERANCE:
            break
        x = (x_low * f_high - x_high * f_low) / (f_high - f_low)
        if not x_low < x < x_high:
            x = 0.5 * (x_low + x_high)
        value = function(math.exp(x))
        if value == 0:
            return math.exp(x)
        if (value > 0) == (f_low > 0):
            x_low, f_low = x, value
            if side == -1:
                f_high *= 0.5
            side = -1
        else:
            x_high, f_high = x, value
            if side == 1:
                f_low *= 0.5
            side = 1
        if min(abs(f_low), abs(f_high)) <= ROOT_VALUE_TOLERANCE:
            break
    return math.exp(x_low if abs(f_low) <= abs(f_high) else x_high)


def _all_loop_gains(g: NDArray[np.float64], c: NDArray[np.float64], opamps: tuple[OpampStates, ...],
                    f_hz: NDArray[np.float64]) -> NDArray[np.complex128] | None:
    """T(j2πf) of every op-amp from one batched solve of the closed pencil, or None if singular.

    Breaking op-amp k's loop adds ``e_r·wᵀ`` to the matrix M = G + sC (r its state row,
    w = e_in+ − e_in−). With y = M⁻¹e_r and a = wᵀy, the Sherman–Morrison formula gives
    wᵀ(M + e_r·wᵀ)⁻¹e_r = a / (1 + a), so T = −a / (1 + a): every loop from the closed
    circuit's solve with one right-hand side per op-amp (Sherman and Morrison, Ann. Math.
    Statist. 21, 1950). Shape (len(opamps), len(f_hz)).
    """
    s = 1j * TWO_PI * np.asarray(f_hz, dtype=float)
    rhs = np.zeros((g.shape[0], len(opamps)), dtype=complex)
    for column, opamp in enumerate(opamps):
        rhs[opamp.state_row, column] = 1.0
    columns = np.arange(len(opamps))
    plus = np.array([max(opamp.in_plus, 0) for opamp in opamps])
    minus = np.array([max(opamp.in_minus, 0) for opamp in opamps])
    plus_used = np.array([opamp.in_plus >= 0 for opamp in opamps])
    minus_used = np.array([opamp.in_minus >= 0 for opamp in opamps])
    # Chunked over frequencies: the solutions of one chunk (n unknowns × one column per op-amp)
    # stay near SOLVE_CHUNK_BYTES; only the two entries per column that make a are kept.
    chunk = max(1, int(SOLVE_CHUNK_BYTES // (16 * g.shape[0] * len(opamps))))
    a = np.empty((s.size, len(opamps)), dtype=complex)
    for start in range(0, s.size, chunk):
        try:
            y = solve_batched(g, c, rhs, s[start:start + chunk])
        except np.linalg.LinAlgError:
            return None
        a[start:start + chunk] = (np.where(plus_used, y[:, plus, columns], 0.0)
                                  - np.where(minus_used, y[:, minus, columns], 0.0))
    with np.errstate(divide="ignore", invalid="ignore"):
        result = np.asarray((-a / (1.0 + a)).T, dtype=complex)
    if not np.all(np.isfinite(result)):
        return None
    return result


def _wrapped_deg(value: complex) -> float:
    """The angle of ``value`` in degrees, in (−180°, 180°]."""
    return math.degrees(math.atan2(value.imag, value.real))


def loop_gain(g: NDArray[np.float64], c: NDArray[np.float64], opamp: OpampStates,
              f_hz: NDArray[np.float64], stability: Stability | None = None,
              values: NDArray[np.complex128] | None = None) -> LoopResult:
    """Loop gain and margins of one op-amp of a drive-zeroed pencil (G, C).

    Parameters
    ----------
    g, c : ndarray, shape (n, n)
        The pencil with the drive zeroed (``sweep.drive(system, current).g``/``.c``).
    opamp : OpampStates
        The op-amp whose loop is broken.
    f_hz : ndarray
        Log-spaced search grid in hertz, ascending.
    stability : Stability, optional
        The closed loop's verdict; when it is unstable the margins are null with its reason.
        ``None``: not known (the margins are computed regardless).
    values : ndarray, optional
        T on ``f_hz`` when the caller already has it (:func:`loop_gains` solves all loops at once);
        the crossings are refined on exact solves of the broken loop either way.
    """
    opened = _broken(g, opamp)
    if values is None or not np.any(np.abs(values) > 1e-9):
        # A loop gain near zero everywhere is decided on the exact broken-loop solve: the
        # shared solve leaves rounding residue where the exact one gives zero (no loop).
        values = _evaluate(opened, c, opamp, f_hz)
    magnitude = np.abs(values)
    if not np.any(magnitude > 0):
        return LoopResult(opamp.ref, None, None, None, None, NO_LOOP_WHY, NO_LOOP_WHY, NO_LOOP_WHY,
                          np.asarray(f_hz, dtype=float), values)
    phase = np.unwrap(np.angle(values))

    def exact(frequency: float) -> complex:
        return complex(_evaluate(opened, c, opamp, np.array([frequency]))[0])

    def near_branch(value: complex, reference: float) -> float:
        angle = math.atan2(value.imag, value.real)
        return angle + TWO_PI * round((reference - angle) / TWO_PI)

    crossover = margin = None
    crossover_why = margin_why = None
    above = magnitude >= 1.0
    downward = np.flatnonzero(above[:-1] & ~above[1:])
    crossings_of_one = np.flatnonzero(above[:-1] != above[1:])
    if not above.any():
        crossover_why = (f"|T| stays below 1 from {f_hz[0]:.3g} to {f_hz[-1]:.3g} Hz "
                         f"(at most {20 * math.log10(float(magnitude.max())):.1f} dB): no crossover")
    elif above[-1]:
        crossover_why = f"|T| is still above 1 at {f_hz[-1]:.3g} Hz, the top of the search"
    elif downward.size == 0:
        crossover_why = "|T| never falls through 1 on the search grid"
    else:
        top = int(downward[-1])
        crossover = _bisect(lambda f: abs(exact(f)) - 1.0, float(f_hz[top]), float(f_hz[top + 1]))
        # The smallest distance to −1 over every unit-gain crossing (several in a loop with
        # resonances); at the only crossing of an ordinary loop this is 180° + ∠T.
        margins = []
        for crossing_of_one in crossings_of_one:
            at = int(crossing_of_one)
            where = crossover if at == top else _bisect(lambda f: abs(exact(f)) - 1.0,
                                                        float(f_hz[at]), float(f_hz[at + 1]))
            margins.append(180.0 - abs(_wrapped_deg(exact(where))))
        margin = min(margins)
    if crossover is None:
        margin_why = "no crossover: " + (crossover_why or "")
    # Phase crossings through odd multiples of 180°.
    turns = np.floor((phase + math.pi) / TWO_PI)  # changes where phase passes −180° + k·360°
    crossings = np.flatnonzero(turns[1:] != turns[:-1])
    gain_margin = phase_crossover = None
    gain_margin_why = None
    if crossings.size == 0:
        lowest = math.degrees(float(phase.min()))
        gain_margin_why = (f"the phase never reaches −180° up to {f_hz[-1]:.3g} Hz (lowest {lowest:.1f}°): "
                           "the gain margin is unbounded")
    else:
        best: tuple[float, float] | None = None
        for crossing in crossings:
            index = int(crossing)
            target = math.pi * (2.0 * float(max(turns[index], turns[index + 1])) - 1.0)
            reference = float(phase[index])

            def offset(f: float, target: float = target, reference: float = reference) -> float:
                return near_branch(exact(f), reference) - target

            where = _bisect(offset, float(f_hz[index]), float(f_hz[index + 1]))
            size = abs(exact(where))
            if size == 0:
                continue
            margin_db = -20.0 * math.log10(size)
            if best is None or abs(margin_db) < abs(best[0]):
                best = (margin_db, where)
        if best is None:
            gain_margin_why = "the loop gain is zero where its phase reaches −180°"
        else:
            gain_margin, phase_crossover = best
    if stability is not None and not stability.stable:
        unstable = (f"the closed loop is unstable ({stability.reason}): margins describe how far a stable "
                    "loop is from instability, so they have no value here")
        margin = gain_margin = phase_crossover = None
        margin_why = gain_margin_why = unstable
    return LoopResult(
        ref=opamp.ref,
        crossover_hz=crossover,
        phase_margin_deg=margin,
        gain_margin_db=gain_margin,
        phase_crossover_hz=phase_crossover,
        crossover_why=crossover_why,
        phase_margin_why=margin_why,
        gain_margin_why=gain_margin_why,
        f_hz=np.asarray(f_hz, dtype=float),
        loop_gain=values,
    )


def closed_loop_stability(system: StageSystem, *, current_drive: bool) -> Stability | None:
    """The verdict from every finite eigenvalue of the drive-zeroed pencil (the closed loop).

    ``None`` when the pencil is singular for every s (the stage has no unique solution).
    """
    driven = drive(system, current_drive)
    try:
        return stability_of_poles(finite_eigenvalues(driven.g, driven.c))
    except (SingularPencilError, np.linalg.LinAlgError):
        return None


def _ideal(ref: str) -> LoopResult:
    empty_f: NDArray[np.float64] = np.zeros(0)
    empty_t: NDArray[np.complex128] = np.zeros(0, dtype=complex)
    return LoopResult(ref, None, None, None, None, IDEAL_WHY, IDEAL_WHY, IDEAL_WHY, empty_f, empty_t)


def loop_gains(system: StageSystem, *, current_drive: bool, f_hz: NDArray[np.float64] | None = None,
               stability: Stability | None = None) -> tuple[LoopResult, ...]:
    """Loop gain and margins of every op-amp of a system, drive zeroed.

    Parameters
    ----------
    system : StageSystem
        A stage (isolated) or the merged chain (every op-amp in chain).
    current_drive : bool
        The drive that is zeroed: voltage (input shorted) or current (input open).
    f_hz : ndarray, optional
        Search grid; by default from 1/100 of the lowest dominant pole (gbw/A0) to
        1000 × the highest gain-bandwidth, 60 points per decade.
    stability : Stability, optional
        The closed loop's verdict when the caller has it; computed from the pencil otherwise.
        Margins are null when it is unstable.

    Returns
    -------
    tuple of LoopResult
        Finite op-amps in matrix order, then the ideal ones (null margins with the reason).
    """
    results: list[LoopResult] = []
    if system.opamps:
        driven = drive(system, current_drive)
        if stability is None:
            stability = closed_loop_stability(system, current_drive=current_drive)
        grid = _default_grid(system.c, system.opamps) if f_hz is None else np.asarray(f_hz, dtype=float)
        swept = _all_loop_gains(driven.g, driven.c, system.opamps, grid)
        results.extend(loop_gain(driven.g, driven.c, opamp, grid, stability,
                                 None if swept is None else swept[index])
                       for index, opamp in enumerate(system.opamps))
    results.extend(_ideal(ref) for ref in system.ideal_opamps)
    return tuple(results)


def stage_loops(stage: Stage, project: Project) -> tuple[LoopResult, ...]:
    """Loops of a stage isolated (its own drive zeroed, output unloaded)."""
    return loop_gains(assemble(stage, project), current_drive=stage.drive == "current")


def chain_loops(project: Project) -> tuple[LoopResult, ...]:
    """Loops of every op-amp in the merged chain (refs ``stage_id:ref``), the chain drive zeroed."""
    from stagewise.engine.chain import merged_system  # the composition layer, imported when used

    merged = merged_system(project)
    return loop_gains(merged.system, current_drive=merged.current_drive)


def loops_to_json(results: tuple[LoopResult, ...] | list[LoopResult]) -> list[dict[str, Any]]:
    """The DESIGN section 6 ``loops`` list: ``ref``, ``crossover_hz``, ``phase_margin_deg``,
    ``gain_margin_db`` (and ``phase_crossover_hz``), each null with a ``*_why`` beside it."""
    document: list[dict[str, Any]] = []
    for result in results:
        entry: dict[str, Any] = {
            "ref": result.ref,
            "crossover_hz": result.crossover_hz,
            "phase_margin_deg": result.phase_margin_deg,
            "gain_margin_db": result.gain_margin_db,
            "phase_crossover_hz": result.phase_crossover_hz,
        }
        if result.crossover_hz is None:
            entry["crossover_hz_why"] = result.crossover_why
        if result.phase_margin_deg is None:
            entry["phase_margin_deg_why"] = result.phase_margin_why
        if result.gain_margin_db is None:
            entry["gain_margin_db_why"] = result.gain_margin_why
            entry["phase_crossover_hz_why"] = result.gain_margin_why
        document.append(entry)
    return document
