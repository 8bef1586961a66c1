"""DC accuracy and drift: the error budget of each stage and of the chain at the converter.

At s = 0 the pencil of a stage, or of the merged chain, is the real matrix G (drive attached).
Every DC error source is an injection vector ``w`` into the equations G·x = b·u + w, so the
error it puts at an output ``o`` is ``e_oᵀ G⁻¹ w = z_oᵀ w`` with ``Gᵀ z_o = e_o``: one transposed
solve per output gives the transfer from every source at once (the adjoint method, as in noise);
the chain's outputs are its interfaces, so one solve with a few right-hand sides serves every
stage's output and the converter input. The circuit is linear, so the contributions superpose
exactly; the budget then adds them as a worst case (sum of magnitudes) and as a root-sum-square
(independent sources).

Sources
-------
Offset-like (independent of the signal; the drive is zeroed: a voltage drive shorts the input, a
current drive leaves it open):

- ``vos``: input offset voltage ``vos_v`` of a finite op-amp, in series with its + input; it
  enters the gain-state row ``x/A0 − (v+ + vos − v−) = 0`` (see ``mna``). Its sign is unknown,
  so its output is a magnitude.
- ``ib``: input bias current ``ib_a`` flowing into both inputs (positive into the pins; a
  negative value flows out). Both pins carry it with the same sign, so its two paths are added
  with their signs: with the source resistance at + equal to Rf ∥ Rg they cancel. ``via`` gives
  each path.
- ``ios``: input offset current ``ios_a``: Ib+ = Ib + Ios/2, Ib− = Ib − Ios/2, sign unknown.
- ``psrr``: ``supply_variation_v`` / PSRR, an input offset (only where the project gives the
  supply variation).
- ``block_offset``: a behavioural block's ``offset_v`` at its output source.

Gain-like (proportional to the signal; each expressed at the place's reference signal level,
see below, and as a relative gain error):

- ``finite_gain``: the DC gain with op-amp k of finite A0 against the gain with that op-amp
  ideal (A0 → ∞), exact by the Sherman–Morrison formula on the gain-state entry 1/A0 (and the
  place's ideal gain with all its op-amps ideal by the Woodbury identity). Signed. For a
  non-inverting stage this is 1/(1 + 1/(A0·β)) − 1.
- ``tol``: a part at ±tol: the first-order change of the gain from the adjoint sensitivity
  ∂x/∂m = −G⁻¹ (∂G/∂m) x (exact derivative; rank-one part patterns as in ``spread``).
- ``cmrr``: the common-mode voltage of the op-amp's inputs (from the signal) divided by CMRR,
  as an input offset of unknown sign.
- ``block_gain``: a block's ``gain_error`` bound.

Over the temperature range ``settings.temp_range_c`` (ΔT = the larger distance of its ends from
25 °C, the temperature of data-sheet figures):

- ``vos_drift``: ``vos_drift_v_per_c``·ΔT, sign unknown.
- ``ib_drift``, ``ios_drift``: the rise of Ib (and Ios) at the end of the range where it is
  largest (none when it is largest at 25 °C), by the input type's law: CMOS and JFET inputs, Ib(T) = Ib(25 °C)·2^((T − 25)/10)
  (the leakage of the input protection and gate junctions doubles about every 10 °C); bipolar
  inputs, Ib(T) = Ib(25 °C)·exp(−0.007·(T − 25)) (Ib = Ic/β and β rises about +0.7 %/°C). A model
  without ``input_type`` keeps Ib out of the drift, and the notes say so.
- ``tempco``: a part's ``tc_ppm_per_c``·ΔT as a gain change (no tracking between parts).

Reference signal level: the DC input that puts the converter input at its positive full scale
(``full_scale_vpp``/2) where the chain passes DC, else the declared ``input.amplitude``; carried
to each stage's output by the chain's DC gains. Totals in volts add gain-like terms at that
level. ``offset_out_v`` is the worst case of the offset-like terms at 25 °C. ``drift_out_v_per_c``
is the worst case of the drift terms divided by ΔT (the average slope over the range).

Second-order effects are left out and said so in ``notes``: the product of two errors (a part at
its tolerance changing an offset path), and the tempco's effect on offset paths.

Public API
----------
``dc_budgets(project, merged=None) -> DcBudgets``: every place (``isolated``, ``in_chain``,
``from_input`` for each stage; ``chain``), or a reason why not.
``bias_current_factor(input_type, temperature_c) -> float | None``
``budget_to_json(budget, converter=None) -> dict``

References
----------
J. Sherman and W. J. Morrison, "Adjustment of an inverse matrix corresponding to a change in one
element of a given matrix", Ann. Math. Statist. 21, 124-127 (1950).
M. A. Woodbury, "Inverting modified matrices", Memorandum Report 42, Princeton, 1950.
S. W. Director and R. A. Rohrer, "The generalized adjoint network and network sensitivities",
IEEE Trans. Circuit Theory 16, 318-323 (1969) (adjoint sensitivities).
P. R. Gray, P. J. Hurst, S. H. Lewis and R. G. Meyer, *Analysis and Design of Analog Integrated
Circuits*, ch. 1 and 6 (β temperature coefficient; op-amp offset and bias currents).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray

from stagewise.engine.chain import MergedChain, load_admittance, merge_systems
from stagewise.engine.metrics import put_with_why
from stagewise.engine.mna import CircuitError, ElementStamp, OpampStates, StageSystem, assemble
from stagewise.engine.sweep import drive
from stagewise.model.project import Converter, Project, Stage
from stagewise.review.words import FIELD_WORDS as WORDS

__all__ = [
    "BudgetRow",
    "BudgetTable",
    "DcBudget",
    "DcBudgets",
    "DcContribution",
    "bias_current_factor",
    "budget_table",
    "budget_to_json",
    "dc_budgets",
]

REFERENCE_TEMPERATURE_C = 25.0
# CMOS and JFET inputs: junction leakage doubles about every 10 °C (common practice).
LEAKAGE_DOUBLING_C = 10.0
# Bipolar inputs: β rises about +0.7 %/°C, so Ib = Ic/β falls as exp(−0.007·ΔT) (Gray et al.,
# ch. 1, value from memory).
BIPOLAR_IB_COEFFICIENT_PER_C = -0.007
PPM = 1e-6

OFFSET_KINDS = ("vos", "ib", "ios", "psrr", "block_offset")
GAIN_KINDS = ("finite_gain", "tol", "cmrr", "block_gain", "tempco")
DRIFT_KINDS = ("vos_drift", "ib_drift", "ios_drift", "tempco")
KIND_WORDS = {
    "vos": "offset voltage", "ib": "bias current", "ios": "offset current", "psrr": "supply rejection",
    "block_offset": "block offset", "finite_gain": "finite open-loop gain", "tol": "tolerance",
    "cmrr": "common-mode rejection", "block_gain": "block gain error", "vos_drift": "offset drift",
    "ib_drift": "bias current over temperature", "ios_drift": "offset current over temperature",
    "tempco": "temperature coefficient",
}


def bias_current_factor(input_type: str | None, temperature_c: float) -> float | None:
    """Ib(T)/Ib(25 °C) by the input type's law; ``None`` for an unknown input type.

    CMOS and JFET: 2^((T − 25)/10). Bipolar: exp(−0.007·(T − 25)).
    """
    delta = temperature_c - REFERENCE_TEMPERATURE_C
    if input_type in ("cmos", "jfet"):
        return float(2.0 ** (delta / LEAKAGE_DOUBLING_C))
    if input_type == "bipolar":
        return float(math.exp(BIPOLAR_IB_COEFFICIENT_PER_C * delta))
    return None


@dataclass(frozen=True, slots=True)
class DcContribution:
    """What one error source puts at a place's output.

    ``out_v`` is signed where the source's direction is known (``signed``: bias current, finite
    gain), else a magnitude; ``None`` for a gain-like term when there is no reference signal
    level. ``gain_error_pct`` is the relative gain error of gain-like terms (signed as
    ``out_v``). ``via`` splits a bias current's output into its paths (``in+``, ``in-``).
    """

    source: str
    kind: str
    stage_id: str
    ref: str
    out_v: float | None
    signed: bool
    over_temperature: bool
    gain_error_pct: float | None = None
    via: tuple[tuple[str, float], ...] = ()

    @property
    def magnitude_v(self) -> float:
        return 0.0 if self.out_v is None else abs(self.out_v)


@dataclass(frozen=True, slots=True)
class DcBudget:
    """The DC budget at one place (a stage isolated, in chain, from the input, or the chain).

    Voltages at the place's output. ``gain`` is the DC gain (V/V, Ω for a current drive),
    ``gain_ideal`` the same with the place's op-amps ideal. Gain errors are in percent of the
    gain: ``gain_error_pct`` the worst case at 25 °C (finite gain, tolerances, CMRR, block gain
    errors), ``gain_error_rss_pct`` their root-sum-square. Totals add every contribution:
    ``*_25c_v`` at 25 °C, ``total_wc_v``/``total_rss_v`` over ``temp_range_c`` (the same as at
    25 °C when no range is given). ``None`` values have a reason in ``why`` (key → sentence).
    """

    place: str
    stage_id: str
    gain: float | None
    gain_ideal: float | None
    gain_error_pct: float | None
    gain_error_rss_pct: float | None
    signal_out_v: float | None
    offset_out_v: float
    drift_out_v_per_c: float | None
    contributions: tuple[DcContribution, ...]
    total_wc_25c_v: float | None
    total_rss_25c_v: float | None
    total_wc_v: float | None
    total_rss_v: float | None
    temp_range_c: tuple[float, float] | None
    why: dict[str, str] = field(default_factory=dict)
    notes: tuple[str, ...] = ()


@dataclass(frozen=True, slots=True)
class DcBudgets:
    """Every place's budget; a place that cannot be computed maps to its reason (a str)."""

    isolated: dict[str, DcBudget | str]
    in_chain: dict[str, DcBudget | str]
    from_input: dict[str, DcBudget | str]
    chain: DcBudget | str


# -- sources ---------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class _Injection:
    """One source as an injection vector. Offset-like: ``vector`` per volt or ampere of
    ``magnitude``. Gain-like: ``vector`` per unit drive (it depends on the solution x)."""

    source: str
    kind: str
    stage_id: str
    ref: str
    vector: NDArray[np.float64]
    signed: bool
    over_temperature: bool
    gain_like: bool
    via: tuple[tuple[str, NDArray[np.float64]], ...] = ()


def _unit(size: int, index: int, scale: float = 1.0) -> NDArray[np.float64]:
    vector = np.zeros(size)
    if index >= 0:
        vector[index] = scale
    return vector


def _difference(size: int, plus: int, minus: int) -> NDArray[np.float64]:
    vector = np.zeros(size)
    if plus >= 0:
        vector[plus] += 1.0
    if minus >= 0:
        vector[minus] -= 1.0
    return vector


def _part_pattern(element: ElementStamp, size: int) -> tuple[NDArray[np.float64], NDArray[np.float64], float] | None:
    """∂G/∂m of a part whose value is multiplied by m, at m = 1, as coefficient·left·rightᵀ.

    A resistor's conductance 1/R is stamped, so ∂(1/(mR))/∂m = −1/R; a controlled source's gain
    enters linearly. Capacitors and inductors do not enter G (their derivative at DC is zero);
    current-controlled sources are left out (their stamp also holds the controlling part).
    """
    nodes = element.nodes
    if element.type == "R":
        left = _difference(size, nodes[0], nodes[1])
        return left, left, -1.0 / element.value
    if element.type == "vcvs":
        return _difference(size, element.row, -1), _difference(size, nodes[2], nodes[3]), -element.value
    if element.type == "vccs":
        return _difference(size, nodes[0], nodes[1]), _difference(size, nodes[2], nodes[3]), element.value
    return None


def _block_output(stage: Stage, system: StageSystem) -> tuple[int, int, float]:
    """(row of the block's output source, index of the signal it scales, row scale) in the
    block's own system (``mna._assemble_block``): a Norton source at the output node when
    ``zout_ohm`` > 0, else the row of the source current ``i(<id>)``."""
    sections = [index for index, name in enumerate(system.unknowns) if name.startswith("y") and
                name.endswith(f"({stage.id})")]
    signal = sections[-1] if sections else system.input_index
    zout = 0.0 if stage.zout_ohm is None else stage.zout_ohm.si
    if zout > 0:
        return system.output_index, signal, 1.0 / zout
    return system.unknowns.index(f"i({stage.id})"), signal, 1.0


@dataclass
class _Collector:
    size: int
    project: Project
    delta_t: float | None
    injections: list[_Injection] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    _matrices: tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]] | None = None

    def matrices(self) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
        """Every source's vector, and its in+ and in− paths (zero where none), as (n, sources)."""
        if self._matrices is None or self._matrices[0].shape[1] != len(self.injections):
            empty = np.zeros(self.size)
            paths = [dict(injection.via) for injection in self.injections]
            self._matrices = (
                np.column_stack([injection.vector for injection in self.injections] or [empty])[:, :len(paths)],
                np.column_stack([path.get("in+", empty) for path in paths] or [empty])[:, :len(paths)],
                np.column_stack([path.get("in-", empty) for path in paths] or [empty])[:, :len(paths)],
            )
        return self._matrices

    def add(self, source: str, kind: str, stage_id: str, ref: str, vector: NDArray[np.float64], *,
            signed: bool = False, hot: bool = False, gain_like: bool = False,
            via: tuple[tuple[str, NDArray[np.float64]], ...] = ()) -> None:
        self.injections.append(_Injection(source, kind, stage_id, ref, vector, signed, hot, gain_like, via))

    def stage(self, stage: Stage, system: StageSystem, where: list[int], x: NDArray[np.float64]) -> None:
        """Collect a stage's sources; ``where`` maps its local unknowns to this system's."""
        size = self.size

        def at(local: int) -> int:
            return -1 if local < 0 else where[local]

        if stage.is_block:
            row, signal, scale = _block_output(stage, system)
            if stage.offset_v is not None and stage.offset_v.si > 0:
                self.add(f"{stage.id} offset", "block_offset", stage.id, stage.id,
                         _unit(size, at(row), scale * stage.offset_v.si))
            if stage.gain_error is not None and stage.gain_error.si > 0:
                gain = 1.0 if stage.gain is None else stage.gain.si
                # ∂G/∂gain = −scale at (row, signal), so a gain change δ injects scale·δ·x[signal].
                vector = _unit(size, at(row), scale * gain * stage.gain_error.si * x[at(signal)])
                self.add(f"{stage.id} gain error", "block_gain", stage.id, stage.id, vector, gain_like=True)
            return
        for opamp in system.opamps:
            self._opamp(stage, opamp, at, x)
        for ref in system.ideal_opamps:
            self.notes.append(f"{stage.id}/{ref}: ideal op-amp, no DC errors in this model")
        for element in system.elements:
            part = stage.part(element.ref)
            tol = element.tol or 0.0
            tc = 0.0 if part is None or part.tc_ppm_per_c is None else part.tc_ppm_per_c.si * PPM
            if tol <= 0 and tc <= 0:
                continue
            local = ElementStamp(element.ref, element.type, tuple(at(node) for node in element.nodes),
                                 element.value, element.tol, at(element.row))
            pattern = _part_pattern(local, size)
            if pattern is None:
                if element.type in ("ccvs", "cccs"):
                    self.notes.append(f"{stage.id}/{element.ref}: a current-controlled source's tolerance and "
                                      "temperature coefficient are not counted")
                continue
            left, right, coefficient = pattern
            # ∂x/∂m = −G⁻¹ (∂G/∂m) x: injection −coefficient·left·(right·x) per unit of m.
            per_unit = -coefficient * float(right @ x) * left
            if tol > 0:
                self.add(f"{element.ref} tolerance", "tol", stage.id, element.ref, per_unit * tol, gain_like=True)
            if tc > 0 and self.delta_t is not None:
                self.add(f"{element.ref} tempco", "tempco", stage.id, element.ref, per_unit * tc * self.delta_t,
                         hot=True, gain_like=True)

    def _opamp(self, stage: Stage, opamp: OpampStates, at: Any, x: NDArray[np.float64]) -> None:
        size = self.size
        model = self.project.opamp_models.get(opamp.model)
        if model is None:
            return
        name = f"{opamp.ref}"
        state = at(opamp.state_row)
        plus, minus = at(opamp.in_plus), at(opamp.in_minus)
        given = [key for key in ("vos_v", "ib_a", "ios_a") if getattr(model, key) is not None]
        if not given:
            self.notes.append(f"{stage.id}/{opamp.ref}: model {opamp.model!r} gives no {WORDS['vos_v']}, "
                              f"{WORDS['ib_a']} or {WORDS['ios_a']}; its DC errors are not counted")
        if model.vos_v is not None:
            self.add(f"{name} Vos", "vos", stage.id, opamp.ref, _unit(size, state, model.vos_v.si))
            if model.vos_drift_v_per_c is not None and self.delta_t is not None:
                self.add(f"{name} Vos drift", "vos_drift", stage.id, opamp.ref,
                         _unit(size, state, model.vos_drift_v_per_c.si * self.delta_t), hot=True)
        # A bias current into a pin leaves its node: −Ib in that node's row.
        into_plus, into_minus = _unit(size, plus, -1.0), _unit(size, minus, -1.0)
        factor = self._ib_factor(stage, opamp, model.input_type, model.ib_a, model.ios_a)
        if model.ib_a is not None and model.ib_a.si != 0:
            ib = model.ib_a.si
            via = (("in+", into_plus * ib), ("in-", into_minus * ib))
            self.add(f"{name} Ib", "ib", stage.id, opamp.ref, (into_plus + into_minus) * ib, signed=True, via=via)
            if factor is not None and factor > 1.0:
                change = ib * (factor - 1.0)
                self.add(f"{name} Ib over temperature", "ib_drift", stage.id, opamp.ref,
                         (into_plus + into_minus) * change, signed=True, hot=True,
                         via=(("in+", into_plus * change), ("in-", into_minus * change)))
        if model.ios_a is not None and model.ios_a.si != 0:
            half = 0.5 * model.ios_a.si
            self.add(f"{name} Ios", "ios", stage.id, opamp.ref, (into_plus - into_minus) * half)
            if factor is not None and factor > 1.0:
                self.add(f"{name} Ios over temperature", "ios_drift", stage.id, opamp.ref,
                         (into_plus - into_minus) * half * (factor - 1.0), hot=True)
        if model.psrr_db is not None:
            variation = self.project.settings.supply_variation_v
            if variation is None:
                self.notes.append(f"{stage.id}/{opamp.ref}: the model gives a {WORDS['psrr_db']} but the project "
                                  f"settings give no {WORDS['supply_variation_v']}, so supply rejection is not "
                                  "counted")
            elif variation.si > 0:
                self.add(f"{name} PSRR", "psrr", stage.id, opamp.ref,
                         _unit(size, state, variation.si / 10.0 ** (model.psrr_db.si / 20.0)))
        if model.cmrr_db is not None:
            common = 0.5 * ((x[plus] if plus >= 0 else 0.0) + (x[minus] if minus >= 0 else 0.0))
            self.add(f"{name} CMRR", "cmrr", stage.id, opamp.ref,
                     _unit(size, state, common / 10.0 ** (model.cmrr_db.si / 20.0)), gain_like=True)

    def _ib_factor(self, stage: Stage, opamp: OpampStates, input_type: str | None, ib: Any, ios: Any) -> float | None:
        """Ib(T)/Ib(25 °C) at the end of the range where Ib is largest (at least 1), or None."""
        if self.delta_t is None or (ib is None and ios is None):
            return None
        low, high = self.project.settings.temp_range_c or (None, None)
        assert low is not None and high is not None
        factors = [bias_current_factor(input_type, end.si) for end in (low, high)]
        if factors[0] is None or factors[1] is None:
            self.notes.append(f"{stage.id}/{opamp.ref}: the model gives no {WORDS['input_type']} (CMOS, JFET or "
                              "bipolar), so its "
                              "bias current is held at the 25 °C value over the temperature range")
            return None
        # The error Ib·R keeps its sign, so its worst case is where Ib is largest; an end where Ib
        # shrinks makes the error smaller, not larger (no drift is counted when both ends do).
        return max(1.0, *(float(value) for value in factors if value is not None))


# -- solving ---------------------------------------------------------------------------------


def _delta_t(project: Project) -> float | None:
    span = project.settings.temp_range_c
    if span is None:
        return None
    return max(abs(span[0].si - REFERENCE_TEMPERATURE_C), abs(span[1].si - REFERENCE_TEMPERATURE_C))


@dataclass(frozen=True, slots=True)
class _Solved:
    """A driven DC system solved once: x per unit drive, adjoints for chosen outputs."""

    g: NDArray[np.float64]
    x: NDArray[np.float64]
    adjoint: dict[int, NDArray[np.float64]]  # output index -> z with Gᵀ z = e_out
    state_columns: dict[int, NDArray[np.float64]]  # state row -> G⁻¹ e_state
    alone: dict[int, NDArray[np.float64] | None] = field(default_factory=dict)  # state row -> x, that op-amp ideal
    transfers: dict[int, tuple[NDArray[np.float64], ...]] = field(default_factory=dict)

    def transfer(self, output: int, collector: _Collector) -> tuple[NDArray[np.float64], ...]:
        """zᵀ·(every source, its in+ path, its in− path) for one output: three (sources,) arrays."""
        if output not in self.transfers:
            z = self.adjoint[output]
            self.transfers[output] = tuple(z @ matrix for matrix in collector.matrices())
        return self.transfers[output]

    def ideal_alone(self, opamp: OpampStates) -> NDArray[np.float64] | None:
        """x with only this op-amp ideal (Sherman–Morrison), cached: many places ask for it."""
        if opamp.state_row not in self.alone:
            self.alone[opamp.state_row] = _with_ideal(self, [opamp])
        return self.alone[opamp.state_row]


def _solve(g: NDArray[np.float64], b: NDArray[np.float64], outputs: list[int], states: list[int]) -> _Solved:
    size = g.shape[0]
    forward = np.zeros((size, 1 + len(states)))
    forward[:, 0] = b
    for column, state in enumerate(states, start=1):
        forward[state, column] = 1.0
    unit = np.zeros((size, len(outputs)))
    for column, output in enumerate(outputs):
        unit[output, column] = 1.0
    try:
        solved: NDArray[np.float64] = np.asarray(np.linalg.solve(g, forward), dtype=float)
        adjoint: NDArray[np.float64] = np.asarray(np.linalg.solve(g.T, unit), dtype=float)
    except np.linalg.LinAlgError as error:
        raise CircuitError("the circuit has no DC solution: a node is joined to the rest only through "
                           "capacitors, or an op-amp has no DC feedback") from error
    if not (np.all(np.isfinite(solved)) and np.all(np.isfinite(adjoint))):
        raise CircuitError("the circuit has no DC solution (its DC equations are singular)")
    return _Solved(g, solved[:, 0], {output: adjoint[:, column] for column, output in enumerate(outputs)},
                   {state: solved[:, column] for column, state in enumerate(states, start=1)})


def _with_ideal(solved: _Solved, opamps: list[OpampStates]) -> NDArray[np.float64] | None:
    """x with these op-amps' A0 → ∞ (Woodbury on their 1/A0 entries), or None if singular."""
    if not opamps:
        return solved.x
    rows = [opamp.state_row for opamp in opamps]
    columns = np.column_stack([solved.state_columns[row] for row in rows])  # G⁻¹ U
    core = np.diag([opamp.a0 for opamp in opamps]) - columns[rows, :]  # D⁻¹ − Uᵀ G⁻¹ U
    # Singular core: with infinite gain the circuit has no solution (an op-amp without DC feedback).
    smallest = abs(core[0, 0]) if len(rows) == 1 else np.linalg.svd(core, compute_uv=False)[-1]
    if smallest <= 1e-9 * max(opamp.a0 for opamp in opamps):
        return None
    result: NDArray[np.float64] = solved.x + columns @ np.linalg.solve(core, solved.x[rows])
    return result


# -- places ----------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class _Place:
    place: str
    stage_id: str
    output: int
    denominator: int  # unknown index of the input voltage the gain divides by; -1: the drive
    stages: frozenset[str]
    opamps: tuple[OpampStates, ...]
    level_v: float | None
    level_why: str | None


def _gain(x: NDArray[np.float64], place: _Place) -> float:
    """x_out / x_in (or / the drive); 0 where no DC reaches the input."""
    denominator = float(x[place.denominator]) if place.denominator >= 0 else 1.0
    return 0.0 if denominator == 0 else float(x[place.output]) / denominator


def _budget(place: _Place, solved: _Solved, collector: _Collector, project: Project) -> DcBudget:
    why: dict[str, str] = {}
    notes = [note for note in collector.notes if note.split("/", 1)[0] in place.stages]
    x = solved.x
    gain_defined = abs(x[place.output]) > 0 and (place.denominator < 0 or abs(x[place.denominator]) > 0)
    scale = max(1.0, float(np.max(np.abs(x))))
    if gain_defined and abs(x[place.output]) <= 1e-12 * scale:
        gain_defined = False
    gain = _gain(x, place) if gain_defined else 0.0
    through_out, plus_out, minus_out = solved.transfer(place.output, collector)
    through_in = solved.transfer(place.denominator, collector)[0] if place.denominator >= 0 else None
    zero_gain = ("no DC signal passes here (a series capacitor or a zero at 0 Hz blocks DC), so the DC gain and "
                 "its error are undefined; offsets are still counted")
    level = place.level_v if gain_defined else None
    contributions: list[DcContribution] = []

    def relative(index: int) -> float:
        # d ln(gain) = dx_out/x_out − dx_in/x_in, each dx = zᵀ·vector.
        change = float(through_out[index]) / float(x[place.output])
        if through_in is not None:
            change -= float(through_in[index]) / float(x[place.denominator])
        return change

    for index, injection in enumerate(collector.injections):
        if injection.stage_id not in place.stages:
            continue
        if injection.gain_like:
            if not gain_defined:
                continue
            epsilon = relative(index)
            out = None if level is None else epsilon * level
            contributions.append(DcContribution(injection.source, injection.kind, injection.stage_id, injection.ref,
                                                out if injection.signed or out is None else abs(out),
                                                injection.signed, injection.over_temperature,
                                                100.0 * (epsilon if injection.signed else abs(epsilon))))
            continue
        value = float(through_out[index])
        via = (("in+", float(plus_out[index])), ("in-", float(minus_out[index]))) if injection.via else ()
        contributions.append(DcContribution(injection.source, injection.kind, injection.stage_id, injection.ref,
                                            value if injection.signed else abs(value), injection.signed,
                                            injection.over_temperature, None, via))
    gain_ideal: float | None = None
    finite_total: float | None = None
    if gain_defined and place.opamps:
        for opamp in place.opamps:
            alone = solved.ideal_alone(opamp)
            if alone is None or _gain(alone, place) == 0:
                notes.append(f"{opamp.ref}: with infinite gain the circuit has no DC solution (no DC feedback), "
                             "so its finite-gain error is not counted")
                continue
            epsilon = gain / _gain(alone, place) - 1.0
            local_ref = opamp.ref.rsplit(":", 1)[-1]
            contributions.append(DcContribution(f"{local_ref} finite gain", "finite_gain",
                                                place.stage_id or opamp.ref.split(":", 1)[0], local_ref,
                                                None if level is None else epsilon * level, True, False,
                                                100.0 * epsilon))
        ideal = _with_ideal(solved, list(place.opamps))
        if ideal is not None and _gain(ideal, place) != 0:
            gain_ideal = _gain(ideal, place)
            finite_total = gain / gain_ideal - 1.0
        else:
            why["gain_ideal"] = ("with every op-amp here of infinite gain the circuit has no DC solution (an op-amp "
                                 "without DC feedback), so there is no ideal gain to compare with")
    elif gain_defined:
        gain_ideal = gain
    # Largest first; terms without a value in volts after, by their gain error.
    contributions.sort(key=lambda item: (item.out_v is None, -item.magnitude_v, -abs(item.gain_error_pct or 0.0)))
    offsets = [item for item in contributions if item.kind in OFFSET_KINDS]
    offset_wc = float(sum(item.magnitude_v for item in offsets))
    gain_terms = [item for item in contributions if item.kind in GAIN_KINDS and not item.over_temperature]
    if gain_defined:
        percents = [abs(item.gain_error_pct or 0.0) for item in gain_terms]
        gain_error_pct: float | None = float(sum(percents))
        gain_error_rss: float | None = float(math.sqrt(sum(value * value for value in percents)))
        if finite_total is not None and len([c for c in gain_terms if c.kind == "finite_gain"]) > 1:
            notes.append(f"finite gain of all op-amps together: {100.0 * finite_total:+.4g} % (the per-op-amp "
                         "terms are each exact alone)")
    else:
        gain_error_pct = gain_error_rss = None
        why["gain_error_pct"] = zero_gain
        why["gain"] = zero_gain
    delta_t = collector.delta_t
    totals_missing = [item for item in contributions if item.out_v is None]
    at_25 = [item for item in contributions if not item.over_temperature]
    hot = [item for item in contributions if item.over_temperature]
    if totals_missing:
        reason = (f"gain errors need a signal level: {place.level_why}" if place.level_why
                  else "a gain error has no value in volts")
        totals: list[float | None] = [None, None, None, None]
        for key in ("total_wc_25c_v", "total_rss_25c_v", "total_wc_v", "total_rss_v"):
            why[key] = reason
    else:
        wc25 = float(sum(item.magnitude_v for item in at_25))
        rss25 = float(math.sqrt(sum(item.magnitude_v**2 for item in at_25)))
        wc = wc25 + float(sum(item.magnitude_v for item in hot))
        rss = float(math.sqrt(rss25**2 + sum(item.magnitude_v**2 for item in hot)))
        totals = [wc25, rss25, wc, rss]
    drift: float | None = None
    if delta_t is None:
        why["drift_out_v_per_c"] = f"no {WORDS['temp_range_c']} is set in the project settings, so the budget is at 25 °C only"
        notes.append(f"no {WORDS['temp_range_c']} is set in the project settings: the budget is at 25 °C only")
    elif delta_t == 0:
        why["drift_out_v_per_c"] = "the temperature range does not leave 25 °C"
    elif any(item.out_v is None for item in hot):
        why["drift_out_v_per_c"] = f"temperature coefficients need a signal level: {place.level_why}"
    else:
        drift = float(sum(item.magnitude_v for item in hot)) / delta_t
    if level is None:
        why["signal_out_v"] = zero_gain if not gain_defined else str(place.level_why)
    span = project.settings.temp_range_c
    if not contributions:
        notes.append("no DC error source is modelled here (no op-amp offset or bias figures, tolerances, "
                     "temperature coefficients or block errors)")
    notes.append("second-order terms (a part's tolerance or tempco acting on an offset path, products of two "
                 "errors) are not counted")
    return DcBudget(
        place=place.place, stage_id=place.stage_id,
        gain=gain if gain_defined else None, gain_ideal=gain_ideal,
        gain_error_pct=gain_error_pct, gain_error_rss_pct=gain_error_rss,
        signal_out_v=level, offset_out_v=offset_wc, drift_out_v_per_c=drift,
        contributions=tuple(contributions),
        total_wc_25c_v=totals[0], total_rss_25c_v=totals[1], total_wc_v=totals[2], total_rss_v=totals[3],
        temp_range_c=None if span is None else (float(span[0].si), float(span[1].si)),
        why=why, notes=tuple(dict.fromkeys(notes)),
    )


def _reference_drive(project: Project, output_per_unit: float) -> tuple[float | None, str | None]:
    """The drive (V or A) that defines the reference signal level, or why there is none."""
    full_scale = project.converter.full_scale_vpp
    if full_scale is not None and abs(output_per_unit) > 0:
        return 0.5 * full_scale.si / abs(output_per_unit), None
    if project.input.amplitude is not None:
        return project.input.amplitude.si, None
    if full_scale is not None:
        return None, ("the chain passes no DC to the converter and the project's input amplitude is not given, so there is "
                      "no reference signal level")
    return None, "neither the converter's full scale nor the project's input amplitude is given, so there is no reference signal level"


def dc_budgets(project: Project, merged: MergedChain | None = None) -> DcBudgets:
    """The DC budget of every stage (isolated, in chain, from the input) and of the chain.

    Parameters
    ----------
    project : Project
        A validated project: its op-amp models' DC keys, parts' ``tol`` and ``tc_ppm_per_c``,
        ``settings.temp_range_c`` and ``supply_variation_v``, the converter and input amplitude.
    merged : MergedChain, optional
        The merged chain when the caller has it already.

    Returns
    -------
    DcBudgets
        Each place maps to a :class:`DcBudget` or to a sentence saying why it has none.
    """
    delta_t = _delta_t(project)
    isolated: dict[str, DcBudget | str] = {}
    in_chain: dict[str, DcBudget | str] = {}
    from_input: dict[str, DcBudget | str] = {}
    chain: DcBudget | str
    levels: dict[str, tuple[float | None, str | None]] = {}
    systems: dict[str, StageSystem | str] = {}
    for stage in project.stages:
        try:
            systems[stage.id] = assemble(stage, project)
        except CircuitError as error:
            systems[stage.id] = f'stage "{stage.id}": {error}'
    try:
        merged = merged or _merge(project, systems)
        chain, levels = _chain_places(project, merged, delta_t, in_chain, from_input, systems)
    except CircuitError as error:
        chain = str(error)
        for stage in project.active_stages:
            in_chain[stage.id] = from_input[stage.id] = str(error)
    for stage in project.stages:
        if stage.bypass:
            in_chain[stage.id] = from_input[stage.id] = f'stage "{stage.id}" is bypassed, so it is not in the chain'
        level, level_why = levels.get(stage.id, (None, "the chain could not be solved at DC, so there is no "
                                                       "reference signal level"))
        if stage.bypass:
            level, level_why = None, f'stage "{stage.id}" is bypassed, so it has no signal level in the chain'
        system = systems[stage.id]
        if isinstance(system, str):
            isolated[stage.id] = system
            continue
        try:
            isolated[stage.id] = _isolated_place(stage, system, project, delta_t, level, level_why)
        except CircuitError as error:
            isolated[stage.id] = f'stage "{stage.id}": {error}'
    return DcBudgets(isolated=isolated, in_chain=in_chain, from_input=from_input, chain=chain)


def _merge(project: Project, systems: dict[str, StageSystem | str]) -> MergedChain:
    """The merged chain from the stages assembled here (each stage assembled once)."""
    active = [systems[stage.id] for stage in project.active_stages]
    failed = next((item for item in active if isinstance(item, str)), None)
    if failed is not None or not active:
        raise CircuitError(failed or "the chain has no active stage")
    load_r, load_c = load_admittance(project)
    return merge_systems([stage.id for stage in project.active_stages],
                         [item for item in active if not isinstance(item, str)],
                         current_drive=project.input.drive == "current", load_r_ohm=load_r, load_c_f=load_c)


def _isolated_place(stage: Stage, system: StageSystem, project: Project, delta_t: float | None,
                    level: float | None, level_why: str | None) -> DcBudget:
    driven = drive(system, stage.drive == "current")
    states = [opamp.state_row for opamp in system.opamps]
    probe = _solve(driven.g, driven.b, [driven.output], states)
    collector = _Collector(driven.g.shape[0], project, delta_t)
    collector.stage(stage, system, list(range(system.size)), probe.x)
    place = _Place("isolated", stage.id, driven.output, -1, frozenset({stage.id}), system.opamps, level, level_why)
    return _budget(place, probe, collector, project)


def _chain_places(project: Project, merged: MergedChain, delta_t: float | None,
                  in_chain: dict[str, DcBudget | str], from_input: dict[str, DcBudget | str],
                  systems: dict[str, StageSystem | str]) -> tuple[DcBudget, dict[str, tuple[float | None, str | None]]]:
    driven = merged.driven()
    interfaces = list(merged.interface_indices)
    states = [opamp.state_row for opamp in merged.system.opamps]
    solved = _solve(driven.g, driven.b, sorted(set(interfaces)), states)
    x = solved.x
    drive_level, drive_why = _reference_drive(project, float(x[interfaces[-1]]))
    collector = _Collector(driven.g.shape[0], project, delta_t)
    stages = {stage.id: stage for stage in project.active_stages}
    for position, stage_id in enumerate(merged.stage_ids):
        system = systems[stage_id]
        assert not isinstance(system, str)  # the merged chain was built from it
        collector.stage(stages[stage_id], system, list(merged.local_to_merged[position]), x)
    levels: dict[str, tuple[float | None, str | None]] = {}
    for position, stage_id in enumerate(merged.stage_ids):
        output = interfaces[position + 1]
        level = None if drive_level is None else drive_level * abs(float(x[output]))
        level_why = drive_why
        if level == 0.0:
            level, level_why = None, "no DC signal reaches this stage's output in the chain"
        levels[stage_id] = (level, level_why)
        own = tuple(opamp for opamp in merged.system.opamps if opamp.ref.startswith(f"{stage_id}:"))
        upstream = frozenset(merged.stage_ids[: position + 1])
        denominator = -1 if position == 0 and merged.current_drive else interfaces[position]
        in_chain[stage_id] = _budget(_Place("in_chain", stage_id, output, denominator, frozenset({stage_id}),
                                            own, level, level_why), solved, collector, project)
        upstream_opamps = tuple(opamp for opamp in merged.system.opamps
                                if opamp.ref.split(":", 1)[0] in upstream)
        from_input[stage_id] = _budget(_Place("from_input", stage_id, output, -1, upstream, upstream_opamps,
                                              level, level_why), solved, collector, project)
    last = interfaces[-1]
    chain_level = None if drive_level is None else drive_level * abs(float(x[last]))
    chain = _budget(_Place("chain", "", last, -1, frozenset(merged.stage_ids), merged.system.opamps,
                           chain_level, drive_why), solved, collector, project)
    return chain, levels


# -- documents -------------------------------------------------------------------------------


def budget_to_json(budget: DcBudget, converter: Converter | None = None) -> dict[str, Any]:
    """The ``dc`` object of ``analyze --json`` for one place.

    Keys: ``gain``, ``gain_ideal``, ``gain_error_pct``, ``gain_error_rss_pct``, ``offset_out_v``,
    ``drift_out_v_per_c``, ``signal_out_v``, ``contributions`` (``source``, ``kind``, ``stage``,
    ``ref``, ``out_v``, ``signed``, ``over_temperature``, ``gain_error_pct``, ``via``),
    ``total_wc_v``, ``total_rss_v``, ``total_wc_25c_v``, ``total_rss_25c_v``, ``temp_range_c``,
    ``notes``; with ``converter`` (the chain) also ``full_scale_v``, ``lsb_v``, ``total_wc_lsb``,
    ``total_rss_lsb``, ``total_wc_pct_fs``, ``total_rss_pct_fs``, ``total_wc_ppm_fs``, ``*_25c``
    variants. A ``<key>_why`` sentence beside every null.
    """
    document: dict[str, Any] = {}
    for key in ("gain", "gain_ideal", "gain_error_pct", "gain_error_rss_pct"):
        put_with_why(document, key, getattr(budget, key), budget.why.get(key, budget.why.get("gain")))
    document["offset_out_v"] = budget.offset_out_v
    put_with_why(document, "drift_out_v_per_c", budget.drift_out_v_per_c, budget.why.get("drift_out_v_per_c"))
    put_with_why(document, "signal_out_v", budget.signal_out_v, budget.why.get("signal_out_v"))
    document["contributions"] = [
        {"source": item.source, "kind": item.kind, "stage": item.stage_id, "ref": item.ref, "out_v": item.out_v,
         "signed": item.signed, "over_temperature": item.over_temperature, "gain_error_pct": item.gain_error_pct,
         **({"via": {label: value for label, value in item.via}} if item.via else {}),
         **({} if item.out_v is not None else {"out_v_why": budget.why.get("total_wc_v", "no signal level")})}
        for item in budget.contributions
    ]
    for key in ("total_wc_v", "total_rss_v", "total_wc_25c_v", "total_rss_25c_v"):
        put_with_why(document, key, getattr(budget, key), budget.why.get(key))
    document["temp_range_c"] = None if budget.temp_range_c is None else list(budget.temp_range_c)
    if converter is not None:
        _converter_totals(document, budget, converter)
    document["notes"] = list(budget.notes)
    return document


def _converter_totals(document: dict[str, Any], budget: DcBudget, converter: Converter) -> None:
    """LSB, % and ppm of full scale (full scale = the converter's span, full_scale_vpp)."""
    full_scale = None if converter.full_scale_vpp is None else converter.full_scale_vpp.si
    lsb = None if full_scale is None or converter.bits is None else full_scale / 2.0**converter.bits
    put_with_why(document, "full_scale_v", full_scale, "the converter's full scale is not given")
    put_with_why(document, "lsb_v", lsb, "the converter's full scale or resolution (bits) is not given")
    for suffix in ("", "_25c"):
        for total in ("wc", "rss"):
            volts = getattr(budget, f"total_{total}{suffix}_v")
            missing = budget.why.get(f"total_{total}{suffix}_v")
            put_with_why(document, f"total_{total}{suffix}_lsb", None if volts is None or lsb is None else volts / lsb,
                 missing or "the converter's full scale or resolution (bits) is not given")
            for unit, factor in (("pct_fs", 100.0), ("ppm_fs", 1e6)):
                put_with_why(document, f"total_{total}{suffix}_{unit}",
                     None if volts is None or full_scale is None else factor * volts / full_scale,
                     missing or "the converter's full scale is not given")


# -- the budget as a table (shared by the GUI view and the packet) ----------------------------


@dataclass(frozen=True, slots=True)
class BudgetRow:
    """One contribution, its value in the table's unit (``BudgetTable.unit``)."""

    source: str
    stage: str
    kind: str  # the words of KIND_WORDS
    value: float | None
    gain_error_pct: float | None
    over_temperature: bool


@dataclass(frozen=True, slots=True)
class BudgetTable:
    """A place's contributions, largest first, with one unit for the whole value column."""

    unit: str
    scale_v: float
    rows: tuple[BudgetRow, ...]


_PREFIXES = ((1.0, "V"), (1e-3, "mV"), (1e-6, "µV"), (1e-9, "nV"))


def budget_table(document: dict[str, Any]) -> BudgetTable:
    """The ``contributions`` of a ``dc`` document (:func:`budget_to_json`) as table rows.

    The value column takes the SI prefix of its largest entry, so every row reads in one unit.
    """
    entries = list(document.get("contributions") or [])
    largest = max((abs(float(entry["out_v"])) for entry in entries if entry.get("out_v") is not None), default=0.0)
    scale, unit = _PREFIXES[-1]
    for candidate_scale, candidate_unit in _PREFIXES:
        if largest >= candidate_scale:
            scale, unit = candidate_scale, candidate_unit
            break
    rows = tuple(
        BudgetRow(
            source=str(entry.get("source", "")),
            stage=str(entry.get("stage", "")),
            kind=KIND_WORDS.get(str(entry.get("kind")), str(entry.get("kind"))),
            value=None if entry.get("out_v") is None else float(entry["out_v"]) / scale,
            gain_error_pct=None if entry.get("gain_error_pct") is None else float(entry["gain_error_pct"]),
            over_temperature=bool(entry.get("over_temperature")),
        )
        for entry in entries
    )
    return BudgetTable(unit=unit, scale_v=scale, rows=rows)
