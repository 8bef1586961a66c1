"""Modified nodal analysis: a stage assembled as the pencil (G + sC)·x = b.

Unknowns are the voltages of the stage's nodes (node ``0`` is the reference and has none) and
the currents or states of the voltage-defined branches: inductors, voltage-output controlled
sources, op-amp outputs and the internal gain states of finite op-amps, and the sections of
behavioural blocks. Every element contributes entries that are constant or proportional to s,
so the matrix stays linear in s and a sweep is one batched solve.

Row convention: the row of a node says "the currents leaving this node through its elements sum
to zero". Currents of two-terminal parts count from ``nodes[0]`` to ``nodes[1]`` through the
part; a controlled current source drives its current from ``out+`` through the source to
``out-``; an op-amp's output current is the current it pushes into its output node.

References
----------
C.-W. Ho, A. E. Ruehli and P. A. Brennan, "The modified nodal approach to network analysis",
IEEE Trans. Circuits and Systems, vol. 22, no. 6, pp. 504-509, 1975.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import NDArray

from stagewise.model.fingerprint import stage_fingerprint
from stagewise.model.project import GROUND, IDEAL_OPAMP, OpampModel, Part, Project, Stage
from stagewise.model.values import Quantity

__all__ = [
    "BLOCK_IN",
    "BLOCK_OUT",
    "CircuitError",
    "ElementStamp",
    "OpampStates",
    "StageSystem",
    "assemble",
    "opamp_open_loop_gain",
    "stage_fingerprint",
]

BLOCK_IN = "in"
VALUE_TYPES = frozenset({"R", "C", "L", "vcvs", "vccs", "ccvs", "cccs"})
BLOCK_OUT = "out"
TWO_PI = 2.0 * math.pi


class CircuitError(ValueError):
    """A stage that cannot be assembled or solved; the message names the part or node."""


@dataclass(frozen=True, slots=True)
class OpampStates:
    """Where a finite op-amp lives in the matrix: its gain-state row and the state columns.

    The gain-state row is ``(1 + s/ωp1)·x/A0 − (v+ − v−) = 0``; breaking the loop there (the
    loop-gain analysis) replaces the ``v+ − v−`` entries by an injected test signal.
    """

    ref: str
    model: str
    state_row: int
    in_plus: int  # unknown index of v+, or -1 when the input is node 0
    in_minus: int
    output: int  # unknown index of the output node voltage
    a0: float


@dataclass(frozen=True, slots=True)
class ElementStamp:
    """Where a valued part sits in the matrix, for noise and tolerance analyses.

    ``nodes`` are unknown indices (-1 for node 0) in the order of the part's nodes; ``row`` is
    the part's branch unknown (inductors, voltage-output sources) or -1. ``value`` is in SI
    units, ``tol`` a fraction or ``None``.
    """

    ref: str
    type: str
    nodes: tuple[int, ...]
    value: float
    tol: float | None
    row: int = -1


@dataclass(frozen=True, slots=True)
class StageSystem:
    """The assembled pencil of one stage, without any drive.

    Attributes
    ----------
    g : ndarray, shape (n, n)
        Conductance-like part (constant entries).
    c : ndarray, shape (n, n)
        Part proportional to s (capacitances, inductances, state time constants).
    unknowns : tuple of str
        A readable name for each unknown: ``v(node)``, ``i(L1)``, ``x(U1)``, ...
    node_index : dict
        Node name -> index of its voltage among the unknowns (node ``0`` absent).
    input_index, output_index : int
        Unknown indices of the input and output port nodes.
    opamps : tuple of OpampStates
        Finite op-amps, for loop-gain and noise analyses.
    elements : tuple of ElementStamp
        Every R, C, L and controlled source with its matrix position (noise, tolerances).
    ideal_opamps : tuple of str
        Refs of ideal op-amps (nullors).
    """

    g: NDArray[np.float64]
    c: NDArray[np.float64]
    unknowns: tuple[str, ...]
    node_index: dict[str, int]
    input_index: int
    output_index: int
    opamps: tuple[OpampStates, ...] = ()
    ideal_opamps: tuple[str, ...] = ()
    elements: tuple[ElementStamp, ...] = ()
    fingerprint: str = ""

    @property
    def size(self) -> int:
        return len(self.unknowns)


@dataclass
class _Builder:
    node_index: dict[str, int] = field(default_factory=dict)
    unknowns: list[str] = field(default_factory=list)
    g_entries: list[tuple[int, int, float]] = field(default_factory=list)
    c_entries: list[tuple[int, int, float]] = field(default_factory=list)

    def node(self, name: str) -> int:
        if name == GROUND:
            return -1
        if name not in self.node_index:
            self.node_index[name] = self.add_unknown(f"v({name})")
        return self.node_index[name]

    def add_unknown(self, name: str) -> int:
        self.unknowns.append(name)
        return len(self.unknowns) - 1

    def g(self, row: int, column: int, value: float) -> None:
        if row >= 0 and column >= 0 and value != 0.0:
            self.g_entries.append((row, column, value))

    def c(self, row: int, column: int, value: float) -> None:
        if row >= 0 and column >= 0 and value != 0.0:
            self.c_entries.append((row, column, value))

    def voltage_branch(self, row: int, plus: int, minus: int) -> None:
        """A branch whose current is unknown ``row``, flowing plus -> minus through it; its own
        row starts ``v(plus) − v(minus)`` (the caller adds what that voltage equals)."""
        self.g(plus, row, 1.0)
        self.g(minus, row, -1.0)
        self.g(row, plus, 1.0)
        self.g(row, minus, -1.0)

    def admittance(self, a: int, b: int, value: float, capacitive: bool) -> None:
        stamp = self.c if capacitive else self.g
        stamp(a, a, value)
        stamp(b, b, value)
        stamp(a, b, -value)
        stamp(b, a, -value)

    def matrices(self) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        n = len(self.unknowns)
        g = np.zeros((n, n))
        c = np.zeros((n, n))
        for row, column, value in self.g_entries:
            g[row, column] += value
        for row, column, value in self.c_entries:
            c[row, column] += value
        return g, c


def opamp_open_loop_gain(model: OpampModel) -> float:
    """A0 as a plain ratio from ``a0_db``."""
    return float(10.0 ** (model.a0_db.si / 20.0))


def _si(quantity: Quantity | None, default: float = 0.0) -> float:
    return default if quantity is None else quantity.si


def assemble(stage: Stage, project: Project) -> StageSystem:
    """Assemble a stage's MNA pencil (no drive, output unloaded).

    Parameters
    ----------
    stage : Stage
        A circuit or block stage (already validated).
    project : Project
        Supplies the op-amp models the stage uses.

    Raises
    ------
    CircuitError
        A part the engine cannot stamp, naming it.
    """
    if stage.is_block:
        return _assemble_block(stage)
    builder = _Builder()
    # Ports first, so that their indices are stable and small.
    input_index = builder.node(stage.ports["in"])
    output_index = builder.node(stage.ports["out"])
    for part in stage.parts:
        for node in part.nodes:
            builder.node(node)
    branch: dict[str, int] = {}
    # Voltage-defined branches get their current unknown before any current-controlled source
    # refers to them.
    for part in stage.parts:
        if part.type in ("L", "vcvs", "ccvs"):
            branch[part.ref] = builder.add_unknown(f"i({part.ref})")
    opamps: list[OpampStates] = []
    ideal: list[str] = []
    elements: list[ElementStamp] = []
    for part in stage.parts:
        _stamp(builder, part, stage, project, branch, opamps, ideal)
        if part.type != "opamp":
            elements.append(ElementStamp(
                ref=part.ref,
                type=part.type,
                nodes=tuple(builder.node(name) for name in part.nodes),
                value=_si(part.value),
                tol=None if part.tol is None else part.tol.si,
                row=branch.get(part.ref, -1),
            ))
    g, c = builder.matrices()
    return StageSystem(
        g=g,
        c=c,
        unknowns=tuple(builder.unknowns),
        node_index=dict(builder.node_index),
        input_index=input_index,
        output_index=output_index,
        opamps=tuple(opamps),
        ideal_opamps=tuple(ideal),
        elements=tuple(elements),
        fingerprint=stage_fingerprint(stage, project),
    )


def _current_of(builder: _Builder, control: Part, branch: dict[str, int]) -> tuple[list[tuple[int, float]], list[tuple[int, float]]]:
    """The current through ``control`` (nodes[0] -> nodes[1]) as G- and C-coefficients."""
    if control.type in ("L", "vcvs", "ccvs"):
        return [(branch[control.ref], 1.0)], []
    a, b = builder.node(control.nodes[0]), builder.node(control.nodes[1])
    value = _si(control.value)
    if control.type == "R":
        return [(a, 1.0 / value), (b, -1.0 / value)], []
    if control.type == "C":
        return [], [(a, value), (b, -value)]
    raise CircuitError(f'the current of {control.ref} ({control.type}) cannot control a source')


def _stamp(
    builder: _Builder,
    part: Part,
    stage: Stage,
    project: Project,
    branch: dict[str, int],
    opamps: list[OpampStates],
    ideal: list[str],
) -> None:
    nodes = [builder.node(name) for name in part.nodes]
    value = _si(part.value)
    kind = part.type
    if kind == "R" and not (value != 0.0 and math.isfinite(value)):
        # A conductance of 1/0 has no place in the matrix; a wire is a merged node.
        raise CircuitError(f"{part.ref}: a resistance of {part.value} cannot be solved; join the two nodes "
                           "instead of a 0 Ω resistor")
    if kind in VALUE_TYPES and not math.isfinite(value):
        raise CircuitError(f"{part.ref}: its value {part.value} is not a finite number")
    if kind == "R":
        builder.admittance(nodes[0], nodes[1], 1.0 / value, capacitive=False)
    elif kind == "C":
        builder.admittance(nodes[0], nodes[1], value, capacitive=True)
    elif kind == "L":
        row = branch[part.ref]
        builder.voltage_branch(row, nodes[0], nodes[1])
        builder.c(row, row, -value)
    elif kind == "vcvs":
        row = branch[part.ref]
        builder.voltage_branch(row, nodes[0], nodes[1])
        builder.g(row, nodes[2], -value)
        builder.g(row, nodes[3], value)
    elif kind == "vccs":
        for out_node, sign in ((nodes[0], 1.0), (nodes[1], -1.0)):
            builder.g(out_node, nodes[2], sign * value)
            builder.g(out_node, nodes[3], -sign * value)
    elif kind in ("ccvs", "cccs"):
        control = stage.part(part.control or "")
        if control is None:
            raise CircuitError(f'{part.ref}: its control "{part.control}" is not a part of stage "{stage.id}"')
        g_terms, c_terms = _current_of(builder, control, branch)
        if kind == "ccvs":
            row = branch[part.ref]
            builder.voltage_branch(row, nodes[0], nodes[1])
            for column, coefficient in g_terms:
                builder.g(row, column, -value * coefficient)
            for column, coefficient in c_terms:
                builder.c(row, column, -value * coefficient)
        else:
            for out_node, sign in ((nodes[0], 1.0), (nodes[1], -1.0)):
                for column, coefficient in g_terms:
                    builder.g(out_node, column, sign * value * coefficient)
                for column, coefficient in c_terms:
                    builder.c(out_node, column, sign * value * coefficient)
    elif kind == "opamp":
        _stamp_opamp(builder, part, nodes, project, opamps, ideal)
    else:
        raise CircuitError(f'{part.ref}: "{kind}" is not a part type the engine can stamp')


def _stamp_opamp(
    builder: _Builder,
    part: Part,
    nodes: list[int],
    project: Project,
    opamps: list[OpampStates],
    ideal: list[str],
) -> None:
    in_plus, in_minus, out = nodes
    if part.model in (None, IDEAL_OPAMP):
        # Nullor: v+ = v-, no input current, the output supplies whatever current it must.
        current = builder.add_unknown(f"i({part.ref})")
        builder.g(out, current, -1.0)
        builder.g(current, in_plus, 1.0)
        builder.g(current, in_minus, -1.0)
        ideal.append(part.ref)
        return
    model = project.opamp_models.get(part.model)
    if model is None:
        raise CircuitError(f'{part.ref}: op-amp model "{part.model}" is not in the project')
    for name, quantity in (("gbw_hz", model.gbw_hz), ("p2_hz", model.p2_hz), ("rin_ohm", model.rin_ohm)):
        if quantity is not None and not (quantity.si > 0 and math.isfinite(quantity.si)):
            raise CircuitError(f'{part.ref}: op-amp model "{part.model}" has {name} = {quantity}; it must be above zero')
    a0 = opamp_open_loop_gain(model)
    gbw_rad_s = TWO_PI * model.gbw_hz.si
    # Gain state, row divided by A0 for conditioning:
    #   (1 + s/ωp1)·x / A0 − (v+ − v−) = 0,  ωp1 = ω_gbw / A0  =>  x/A0 + s·x/ω_gbw = v+ − v−
    state = builder.add_unknown(f"x({part.ref})")
    builder.g(state, state, 1.0 / a0)
    builder.c(state, state, 1.0 / gbw_rad_s)
    builder.g(state, in_plus, -1.0)
    builder.g(state, in_minus, 1.0)
    drive = state
    if model.p2_hz is not None:
        # Second pole: (1 + s/ωp2)·y = x
        second = builder.add_unknown(f"y({part.ref})")
        builder.g(second, second, 1.0)
        builder.c(second, second, 1.0 / (TWO_PI * model.p2_hz.si))
        builder.g(second, state, -1.0)
        drive = second
    rout = _si(model.rout_ohm)
    if rout > 0:
        # Norton form of the internal source behind rout: current (drive − v_out)/rout into out.
        builder.g(out, out, 1.0 / rout)
        builder.g(out, drive, -1.0 / rout)
    else:
        current = builder.add_unknown(f"i({part.ref})")
        builder.g(out, current, -1.0)
        builder.g(current, out, 1.0)
        builder.g(current, drive, -1.0)
    if model.rin_ohm is not None:
        builder.admittance(in_plus, in_minus, 1.0 / model.rin_ohm.si, capacitive=False)
    if model.cin_diff_f is not None:
        builder.admittance(in_plus, in_minus, model.cin_diff_f.si, capacitive=True)
    if model.cin_cm_f is not None:
        builder.admittance(in_plus, -1, model.cin_cm_f.si, capacitive=True)
        builder.admittance(in_minus, -1, model.cin_cm_f.si, capacitive=True)
    opamps.append(OpampStates(part.ref, part.model, state, in_plus, in_minus, out, a0))


# -- behavioural blocks ----------------------------------------------------------------------


def _root_polynomial(root: Quantity | tuple[Quantity, Quantity]) -> tuple[float, float, float]:
    """Coefficients (1, d1, d2) of a normalised root factor 1 + d1·s + d2·s²; (0, 1, 0) for s."""
    if isinstance(root, tuple):
        omega = TWO_PI * root[0].si
        return 1.0, 1.0 / (root[1].si * omega), 1.0 / omega**2
    if root.si == 0:
        return 0.0, 1.0, 0.0
    return 1.0, 1.0 / (TWO_PI * root.si), 0.0


def _block_sections(stage: Stage) -> list[tuple[tuple[float, float, float], tuple[float, float, float]]]:
    """Split the block into sections (numerator, denominator), each at most second order.

    Real poles are paired into second-order sections; complex zero pairs go to second-order
    sections first, then real zeros fill what is left. A zero at 0 Hz contributes s·τ, τ the
    time constant (1/ω0) of the section it lands in: a first-order high-pass then has
    high-frequency gain ``gain``, and a second-order band-pass (one zero at 0 in a pole pair)
    has centre gain ``gain``·Q.
    """
    denominators: list[list[float]] = []
    real_poles: list[float] = []
    for root in stage.poles_hz:
        if not isinstance(root, tuple) and root.si == 0:
            raise CircuitError(f'stage "{stage.id}": a pole at 0 Hz (an integrator) cannot be a block; '
                               "model it as a circuit")
        coefficients = _root_polynomial(root)
        if isinstance(root, tuple):
            denominators.append(list(coefficients))
        else:
            real_poles.append(coefficients[1])
    while len(real_poles) >= 2:
        t1, t2 = real_poles.pop(0), real_poles.pop(0)
        denominators.append([1.0, t1 + t2, t1 * t2])
    if real_poles:
        denominators.append([1.0, real_poles[0], 0.0])
    capacity = [2 if d[2] != 0 else 1 for d in denominators]
    assigned: list[list[tuple[float, float, float]]] = [[] for _ in denominators]
    pairs = [root for root in stage.zeros_hz if isinstance(root, tuple)]
    singles = [root for root in stage.zeros_hz if not isinstance(root, tuple)]
    for root in pairs:
        for index, free in enumerate(capacity):
            if free == 2:
                assigned[index].append(_root_polynomial(root))
                capacity[index] = 0
                break
        else:
            raise CircuitError(f'stage "{stage.id}": more zeros than poles; a block must not gain without bound')
    for root in singles:
        for index, free in enumerate(capacity):
            if free >= 1:
                assigned[index].append(_root_polynomial(root))
                capacity[index] -= 1
                break
        else:
            raise CircuitError(f'stage "{stage.id}": more zeros than poles; a block must not gain without bound')
    sections = []
    for denominator, zeros in zip(denominators, assigned, strict=True):
        scale = math.sqrt(denominator[2]) if denominator[2] else denominator[1]
        numerator = np.array([1.0])  # ascending powers of s
        for z0, z1, z2 in zeros:
            if z0 == 0.0:  # zero at the origin: s·τ of this section
                factor = np.array([0.0, scale])
            else:
                factor = np.array([z0, z1, z2])
            numerator = np.polynomial.polynomial.polymul(numerator, factor)
        numerator = np.pad(numerator, (0, 3 - len(numerator)))[:3]
        sections.append(((float(numerator[0]), float(numerator[1]), float(numerator[2])),
                         (denominator[0], denominator[1], denominator[2])))
    return sections


def _assemble_block(stage: Stage) -> StageSystem:
    if stage.zin_r_ohm is not None and stage.zin_r_ohm.si == 0:
        raise CircuitError(f'stage "{stage.id}": an input resistance of 0 Ω shorts the input; leave it out or '
                           "give it a value")
    for root in [*stage.poles_hz, *stage.zeros_hz]:
        if isinstance(root, tuple) and not (root[0].si > 0 and root[1].si > 0):
            raise CircuitError(f'stage "{stage.id}": a complex pair needs f0 and Q above zero, found '
                               f"[{root[0]}, {root[1]}]")
    builder = _Builder()
    input_index = builder.node(BLOCK_IN)
    output_index = builder.node(BLOCK_OUT)
    if stage.zin_r_ohm is not None:
        builder.admittance(input_index, -1, 1.0 / stage.zin_r_ohm.si, capacitive=False)
    if stage.zin_c_f is not None:
        builder.admittance(input_index, -1, stage.zin_c_f.si, capacitive=True)
    signal = input_index
    sections = _block_sections(stage)
    for number, (numerator, denominator) in enumerate(sections, start=1):
        n0, n1, n2 = numerator
        _, d1, d2 = denominator
        x1 = builder.add_unknown(f"x{number}a({stage.id})")
        if d2 > 0:
            tau = math.sqrt(d2)
            x2 = builder.add_unknown(f"x{number}b({stage.id})")
            # tau·s·x1 − x2 = 0
            builder.c(x1, x1, tau)
            builder.g(x1, x2, -1.0)
            # x1 + (d1/tau)·x2 + tau·s·x2 − u = 0   (that is, D(s)·x1 = u)
            builder.g(x2, x1, 1.0)
            builder.g(x2, x2, d1 / tau)
            builder.c(x2, x2, tau)
            builder.g(x2, signal, -1.0)
            # y = n0·x1 + (n1/tau)·x2 + (n2/tau²)·(u − x1 − (d1/tau)·x2)
            y = builder.add_unknown(f"y{number}({stage.id})")
            builder.g(y, y, 1.0)
            builder.g(y, x1, -(n0 - n2 / tau**2))
            builder.g(y, x2, -(n1 / tau - n2 * d1 / tau**3))
            builder.g(y, signal, -n2 / tau**2)
        else:
            tau = d1
            # x1 + tau·s·x1 − u = 0
            builder.g(x1, x1, 1.0)
            builder.c(x1, x1, tau)
            builder.g(x1, signal, -1.0)
            # y = n0·x1 + (n1/tau)·(u − x1)
            y = builder.add_unknown(f"y{number}({stage.id})")
            builder.g(y, y, 1.0)
            builder.g(y, x1, -(n0 - n1 / tau))
            builder.g(y, signal, -n1 / tau)
        signal = y
    gain = _si(stage.gain, 1.0)
    zout = _si(stage.zout_ohm)
    if zout > 0:
        builder.g(output_index, output_index, 1.0 / zout)
        builder.g(output_index, signal, -gain / zout)
    else:
        current = builder.add_unknown(f"i({stage.id})")
        builder.g(output_index, current, -1.0)
        builder.g(current, output_index, 1.0)
        builder.g(current, signal, -gain)
    g, c = builder.matrices()
    return StageSystem(
        g=g,
        c=c,
        unknowns=tuple(builder.unknowns),
        node_index=dict(builder.node_index),
        input_index=input_index,
        output_index=output_index,
        fingerprint=stage_fingerprint(stage, None),
    )
