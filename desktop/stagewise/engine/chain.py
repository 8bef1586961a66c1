"""The chain of stages with loading: the merged circuit, the port-relation cascade, the engine.

The active stages (bypassed ones left out) are joined output to input: stage k's output node
and stage k+1's input node become one node; the project's load R ∥ C sits at the last output
and its drive (``project.input.drive``, an ideal voltage or current source) at the first input.

Two ways to the same numbers
----------------------------
* :func:`merged_system` assembles the whole chain as one circuit, at the matrix level so that
  circuits and behavioural blocks join alike: the stage pencils are placed block-diagonally,
  then the two unknowns of every interface are merged (their columns added, because the two
  voltages are one; their rows added, because Kirchhoff's current law of the joined node is the
  sum of both stages' current balances). It is a :class:`~stagewise.engine.mna.StageSystem`
  like any stage's, so every stage analysis (poles and zeros, noise, loop gain, tolerances)
  runs on the whole chain unchanged, and it is the exact reference of the tests.
* :class:`ChainEngine` reduces each stage to its port relation (:mod:`stagewise.engine.ports`,
  cached by stage fingerprint and frequency grid) and solves the chain of relations
  (:func:`cascade`): the chain response at every interface, each stage in chain against
  isolated (the loading error), and every interface's Z_out and Z_in, in one batch over all
  frequencies. After an edit only the edited stage is reduced again.

Public API
----------
``merged_system(project) -> MergedChain``
``ChainEngine().analyze(project, f_hz=None) -> ChainResult`` (any frequencies, in hertz)
``ChainEngine().isolated(stage, project, f_hz=None) -> IsolatedResponse``
``ChainEngine().whole_chain(project, f_hz=None) -> StageAnalysis``, ``.step(project)``
``analyze_chain``, ``isolated_response``, ``stage_port_relation``: the same without a cache.

References
----------
C.-W. Ho, A. E. Ruehli and P. A. Brennan, "The modified nodal approach to network analysis",
IEEE Trans. Circuits and Systems, vol. 22, no. 6, pp. 504-509, 1975 (MNA; joining nodes adds
their rows and columns).
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import NDArray

from stagewise.engine.cache import ComputeCache, grid_key
from stagewise.engine.mna import CircuitError, ElementStamp, OpampStates, StageSystem, assemble
from stagewise.engine.ports import (
    I_IN,
    I_OUT,
    V_IN,
    V_OUT,
    PortRelation,
    reduce_stage,
    reduce_stage_terminated,
    relation_minors,
    retermination,
)
from stagewise.engine.sweep import DrivenSystem, drive, frequency_grid, transfer
from stagewise.model.fingerprint import stage_fingerprint
from stagewise.model.project import Project, Stage

if TYPE_CHECKING:
    from stagewise.engine.stage import StageAnalysis
    from stagewise.engine.timeresp import StepResponse

__all__ = [
    "CURRENT_UNIT",
    "LOAD_PREFIX",
    "VOLTAGE_UNIT",
    "CascadeSolution",
    "ChainEngine",
    "ChainResult",
    "IsolatedResponse",
    "MergedChain",
    "StageInChain",
    "active_systems",
    "analyze_chain",
    "cascade",
    "isolated_from_system",
    "isolated_response",
    "load_admittance",
    "merge_systems",
    "merged_size",
    "merged_system",
    "stage_port_relation",
]

# Refs of the load's elements in the merged circuit: "load:R" and "load:C".
LOAD_PREFIX = "load"
SEPARATOR = ":"


@dataclass(frozen=True, slots=True)
class MergedChain:
    """The whole active chain assembled as one circuit.

    Attributes
    ----------
    system : StageSystem
        The merged pencil. ``node_index`` keys are ``"stage_id:node"`` (both names of a joined
        interface node map to the same unknown); ``unknowns``, ``elements``, ``opamps`` and
        ``ideal_opamps`` carry refs prefixed ``"stage_id:"``; the load's elements are
        ``"load:R"`` and ``"load:C"`` (absent when the project has no load). ``input_index`` is
        the first stage's input, ``output_index`` the last stage's output.
    stage_ids : tuple of str
        The active stages in chain order.
    interface_indices : tuple of int
        Unknown index of the node at each interface: chain input, after stage 1, ..., chain
        output (``len(stage_ids) + 1`` entries).
    local_to_merged : tuple of tuple of int
        For each active stage, the merged index of each of its own unknowns (in the order of
        that stage's :class:`StageSystem`).
    current_drive : bool
        True when the project's input is an ideal current source (``project.input.drive``).
    load_r_ohm, load_c_f : float or None
        The load at the last output (``None`` = absent).
    """

    system: StageSystem
    stage_ids: tuple[str, ...]
    interface_indices: tuple[int, ...]
    local_to_merged: tuple[tuple[int, ...], ...]
    current_drive: bool
    load_r_ohm: float | None
    load_c_f: float | None

    def driven(self) -> DrivenSystem:
        """The merged circuit with the project's drive attached at the chain input."""
        return drive(self.system, current=self.current_drive)


def active_systems(project: Project) -> list[tuple[Stage, StageSystem]]:
    """Assemble every active stage (bypassed stages left out), in chain order.

    Raises
    ------
    CircuitError
        When no stage is active, or a stage cannot be assembled (the message names it).
    """
    stages = project.active_stages
    if not stages:
        raise CircuitError("the chain has no active stage: every stage is bypassed or there is none")
    return [(stage, assemble(stage, project)) for stage in stages]


def load_admittance(project: Project) -> tuple[float | None, float | None]:
    """The load's resistance (Ω) and capacitance (F) at the last output, ``None`` where absent."""
    r_ohm = None if project.load.r_ohm is None else project.load.r_ohm.si
    c_f = None if project.load.c_f is None else project.load.c_f.si
    if r_ohm is not None and not r_ohm > 0:
        raise CircuitError(f"load.r_ohm: {r_ohm:g} Ω is not a positive resistance")
    if c_f is not None and not c_f >= 0:
        raise CircuitError(f"load.c_f: {c_f:g} F is not a capacitance (it must not be negative)")
    return r_ohm, c_f


def merged_system(project: Project) -> MergedChain:
    """Assemble the whole active chain of ``project`` as one circuit, load included.

    Parameters
    ----------
    project : Project
        Its active stages (``project.active_stages``), ``load`` and ``input.drive`` are used.

    Returns
    -------
    MergedChain

    Raises
    ------
    CircuitError
        No active stage, a stage that cannot be assembled, or a nonsense load.

    Examples
    --------
    >>> merged = merged_system(project)                      # doctest: +SKIP
    >>> h = sweep.transfer(merged.driven(), f_hz)            # drive -> chain output
    """
    pairs = active_systems(project)
    r_ohm, c_f = load_admittance(project)
    return merge_systems(
        [stage.id for stage, _ in pairs],
        [system for _, system in pairs],
        current_drive=project.input.drive == "current",
        load_r_ohm=r_ohm,
        load_c_f=c_f,
    )


def _find(parent: list[int], index: int) -> int:
    while parent[index] != index:
        parent[index] = parent[parent[index]]
        index = parent[index]
    return index


def _joined_unknowns(systems: list[StageSystem]) -> tuple[NDArray[np.int64], NDArray[np.int64], int]:
    """(offsets of the stages' blocks, merged index of every block unknown, merged size).

    Union-find over the block-diagonal unknowns: out(k) and in(k+1) are one node. A stage whose
    input and output are the same node (a shunt model) lets a join run through it.
    """
    offsets = np.cumsum([0] + [system.size for system in systems])
    total = int(offsets[-1])
    parent = list(range(total))
    for k in range(len(systems) - 1):
        left = int(offsets[k]) + systems[k].output_index
        right = int(offsets[k + 1]) + systems[k + 1].input_index
        root_left, root_right = _find(parent, left), _find(parent, right)
        if root_left != root_right:
            parent[max(root_left, root_right)] = min(root_left, root_right)
    roots = [_find(parent, index) for index in range(total)]
    kept = sorted(set(roots))
    new_index = {old: new for new, old in enumerate(kept)}
    where = np.array([new_index[root] for root in roots], dtype=int)
    return offsets, where, len(kept)


def merged_size(systems: list[StageSystem], *, current_drive: bool) -> int:
    """The number of unknowns of :func:`merge_systems`' pencil with its drive attached, without
    building it (the drive adds one unknown for a voltage source)."""
    return _joined_unknowns(systems)[2] + (0 if current_drive else 1)


def merge_systems(
    stage_ids: list[str],
    systems: list[StageSystem],
    *,
    current_drive: bool,
    load_r_ohm: float | None,
    load_c_f: float | None,
) -> MergedChain:
    """Join already assembled stage systems output to input (see :func:`merged_system`)."""
    if not systems:
        raise CircuitError("the chain has no active stage")
    offsets, where, size = _joined_unknowns(systems)
    # G_merged adds the rows and the columns of joined unknowns (a scatter-add per stage block,
    # O(n²) for the block-diagonal stages instead of an O(n³) incidence product; the same sums).
    g = np.zeros((size, size))
    c = np.zeros((size, size))
    for k, system in enumerate(systems):
        block = where[int(offsets[k]):int(offsets[k + 1])]
        np.add.at(g, (block[:, None], block[None, :]), system.g)
        np.add.at(c, (block[:, None], block[None, :]), system.c)

    def remap(k: int, local: int) -> int:
        return -1 if local < 0 else int(where[int(offsets[k]) + local])

    unknown_names = [""] * size
    node_index: dict[str, int] = {}
    elements: list[ElementStamp] = []
    opamps: list[OpampStates] = []
    ideal: list[str] = []
    local_to_merged: list[tuple[int, ...]] = []
    for k, (stage_id, system) in enumerate(zip(stage_ids, systems, strict=True)):
        prefix = stage_id + SEPARATOR
        mapping = tuple(remap(k, local) for local in range(system.size))
        local_to_merged.append(mapping)
        for local, name in enumerate(system.unknowns):
            if not unknown_names[mapping[local]]:  # a joined node keeps the earlier stage's name
                unknown_names[mapping[local]] = prefix + name
        for node, local in system.node_index.items():
            node_index[prefix + node] = mapping[local]
        for element in system.elements:
            elements.append(ElementStamp(
                ref=prefix + element.ref,
                type=element.type,
                nodes=tuple(remap(k, node) for node in element.nodes),
                value=element.value,
                tol=element.tol,
                row=remap(k, element.row),
            ))
        for opamp in system.opamps:
            opamps.append(OpampStates(
                ref=prefix + opamp.ref,
                model=opamp.model,
                state_row=remap(k, opamp.state_row),
                in_plus=remap(k, opamp.in_plus),
                in_minus=remap(k, opamp.in_minus),
                output=remap(k, opamp.output),
                a0=opamp.a0,
            ))
        ideal.extend(prefix + ref for ref in system.ideal_opamps)

    input_index = remap(0, systems[0].input_index)
    output_index = remap(len(systems) - 1, systems[-1].output_index)
    interfaces = (input_index,) + tuple(remap(k, system.output_index) for k, system in enumerate(systems))
    load_prefix = LOAD_PREFIX + SEPARATOR
    if load_r_ohm is not None:
        g[output_index, output_index] += 1.0 / load_r_ohm
        elements.append(ElementStamp(ref=load_prefix + "R", type="R", nodes=(output_index, -1),
                                     value=load_r_ohm, tol=None))
    if load_c_f is not None and load_c_f > 0:
        c[output_index, output_index] += load_c_f
        elements.append(ElementStamp(ref=load_prefix + "C", type="C", nodes=(output_index, -1),
                                     value=load_c_f, tol=None))

    fingerprint_text = json.dumps(
        {"stages": [[stage_id, system.fingerprint] for stage_id, system in zip(stage_ids, systems, strict=True)],
         "current_drive": current_drive, "load": [load_r_ohm, load_c_f]},
        sort_keys=True, separators=(",", ":"),
    )
    merged = StageSystem(
        g=g,
        c=c,
        unknowns=tuple(unknown_names),
        node_index=node_index,
        input_index=input_index,
        output_index=output_index,
        opamps=tuple(opamps),
        ideal_opamps=tuple(ideal),
        elements=tuple(elements),
        fingerprint=hashlib.sha256(fingerprint_text.encode("utf-8")).hexdigest(),
    )
    return MergedChain(
        system=merged,
        stage_ids=tuple(stage_ids),
        interface_indices=interfaces,
        local_to_merged=tuple(local_to_merged),
        current_drive=current_drive,
        load_r_ohm=load_r_ohm,
        load_c_f=load_c_f,
    )



# -- the cascade of port relations -----------------------------------------------------------


@dataclass(frozen=True, slots=True)
class CascadeSolution:
    """The stacked port relations solved at every frequency (per unit of drive).

    Interface ``j`` is the chain input (``j = 0``), the node after stage ``j``, ..., the chain
    output (``j = K``). ``current`` is the current crossing interface ``j`` towards the
    output (into stage ``j + 1``, or into the load at ``j = K``).

    Attributes
    ----------
    voltage : ndarray, shape (F, K + 1), complex
        Interface voltages per unit drive (V/V for a voltage drive, V/A = Ω for a current drive).
    current : ndarray, shape (F, K + 1), complex
        Interface currents per unit drive (A/V or A/A).
    z_out_ohm : ndarray, shape (F, K + 1), complex
        Impedance looking back from interface ``j`` into the chain up to stage ``j``, the drive
        zeroed (a voltage source shorted, a current source opened); ``inf`` where it is open.
    z_in_ohm : ndarray, shape (F, K + 1), complex
        Impedance looking forward from interface ``j`` into stages ``j + 1 ... K`` and the
        load; ``inf`` where it is open (the last entry is the load itself).
    """

    voltage: NDArray[np.complex128]
    current: NDArray[np.complex128]
    z_out_ohm: NDArray[np.complex128]
    z_in_ohm: NDArray[np.complex128]


_RESCALE_EVERY = 3


def _normalise(*terms: NDArray[np.complex128]) -> tuple[NDArray[np.complex128], ...]:
    # A relation keeps its meaning when scaled; scaling to unit size at each frequency keeps
    # ten stages of products from overflowing. The first two terms are the coefficients.
    # (The tiny floor keeps an all-zero relation, a singular chain reported later, from 0/0.)
    inverse = 1.0 / (np.maximum(np.abs(terms[0]), np.abs(terms[1])) + 1e-300)
    return tuple(term * inverse for term in terms)


def _impedance(numerator: NDArray[np.complex128], denominator: NDArray[np.complex128]) -> NDArray[np.complex128]:
    # A zero denominator is an open circuit: infinite impedance.
    result = np.full(numerator.shape, complex(np.inf, 0.0))
    np.divide(numerator, denominator, out=result, where=denominator != 0)
    return result


def cascade(
    relations: list[NDArray[np.complex128]],
    *,
    current_drive: bool,
    load_admittance_s: NDArray[np.complex128],
    f_hz: NDArray[np.float64],
    stage_ids: tuple[str, ...] = (),
    minors: list[NDArray[np.complex128]] | None = None,
) -> CascadeSolution:
    """Solve the chain of port relations with the drive at the input and the load at the output.

    The stacked system (two rows per stage, ``V_out(k) = V_in(k+1)`` and
    ``I_out(k) = −I_in(k+1)``, one drive row, one load row) is block-bidiagonal. It is solved
    by eliminating it from both ends at once, as the sweeps of a banded solver do: from the
    drive, every interface gets the relation ``α·V + β·J = γ`` of everything before it; from
    the load, the relation ``a·V + b·J = 0`` of everything after it (J is the current crossing
    the interface towards the output). Each interface then solves its own 2 x 2 system, and
    the same relations give Z_out = β/α (drive zeroed) and Z_in = −b/a.

    Eliminating a stage's two port variables on one side from its two rows and the relation
    reaching it leaves one relation on the other side; written with the stage's minors
    m_xy = P[0,x]·P[1,y] − P[0,y]·P[1,x] (x, y among V_in = a, I_in = b, V_out = c,
    I_out = d, with I_out = −J), the steps are 2 x 2 maps::

        from the drive:  α' = m_bc·α − m_ac·β,   β' = m_ad·β − m_bd·α,   γ' = m_ab·γ
        from the load:   a' = m_ad·a + m_ac·b,   b' = m_bd·a + m_bc·b

    All frequencies at once; the loop runs over the stages only.

    Parameters
    ----------
    relations : list of ndarray, each shape (F, 2, 4)
        Port relations of the stages in chain order (see :mod:`stagewise.engine.ports`).
    current_drive : bool
        An ideal current source (True) or voltage source (False) at the chain input.
    load_admittance_s : ndarray, shape (F,), complex
        The load's admittance 1/R + j2πf·C in siemens (zeros for no load).
    f_hz : ndarray, shape (F,)
        The frequencies, for error messages.
    stage_ids : tuple of str
        The stage ids, for error messages.
    minors : list of ndarray, each shape (6, F), optional
        The relations' minors (:func:`stagewise.engine.ports.relation_minors`), when known.

    Returns
    -------
    CascadeSolution

    Raises
    ------
    CircuitError
        Where the chain has no unique solution (for instance a voltage source into an input at
        a virtual ground, or an ideal output into a short), naming the interface and frequency.

    References
    ----------
    G. H. Golub and C. F. Van Loan, *Matrix Computations*, 4th ed., Johns Hopkins, 2013,
    ch. 4 (banded and block tridiagonal systems).
    """
    if minors is None:
        minors = [relation_minors(relation) for relation in relations]
    frequencies = len(f_hz)
    interfaces = len(relations) + 1
    # Rows are interfaces, so that each step writes one contiguous row.
    back_alpha = np.empty((interfaces, frequencies), dtype=complex)
    back_beta = np.empty_like(back_alpha)
    back_gamma = np.empty_like(back_alpha)
    front_a = np.empty_like(back_alpha)
    front_b = np.empty_like(back_alpha)
    ones = np.ones(frequencies, dtype=complex)
    zeros = np.zeros(frequencies, dtype=complex)
    # From the drive: α·V0 + β·J0 = γ (V0 = 1, or J0 = 1 for a current drive).
    alpha, beta, gamma = (zeros, ones, ones) if current_drive else (ones, zeros, ones)
    back_alpha[0], back_beta[0], back_gamma[0] = alpha, beta, gamma
    # Relations are scale-free; rescaling every few steps keeps long chains of small minors
    # far from underflow (each step multiplies by minors of unit-scaled rows).
    for index, m in enumerate(minors, start=1):
        m_ab, m_ac, m_ad, m_bc, m_bd = m[0], m[1], m[2], m[3], m[4]
        alpha, beta, gamma = m_bc * alpha - m_ac * beta, m_ad * beta - m_bd * alpha, m_ab * gamma
        if index % _RESCALE_EVERY == 0:
            alpha, beta, gamma = _normalise(alpha, beta, gamma)
        back_alpha[index], back_beta[index], back_gamma[index] = alpha, beta, gamma
    # From the load: a·VK + b·JK = 0 with JK = Y_load·VK.
    a, b = _normalise(np.asarray(load_admittance_s, dtype=complex), -ones)
    front_a[-1], front_b[-1] = a, b
    for index in range(len(minors) - 1, -1, -1):
        m = minors[index]
        m_ac, m_ad, m_bc, m_bd = m[1], m[2], m[3], m[4]
        a, b = m_ad * a + m_ac * b, m_bd * a + m_bc * b
        if index % _RESCALE_EVERY == 0:
            a, b = _normalise(a, b)
        front_a[index], front_b[index] = a, b

    determinant = back_alpha * front_b - back_beta * front_a
    size = np.abs(back_alpha * front_b) + np.abs(back_beta * front_a)
    singular = ~(np.abs(determinant) > 1e-13 * size)
    if np.any(singular):
        interface, row = (int(index[0]) for index in np.nonzero(singular))
        interface = _conflict_interface(minors, current_drive, row, default=interface)
        raise CircuitError(
            f"the chain cannot be solved at {f_hz[row]:.6g} Hz: at the {_interface_words(interface, stage_ids)}, "
            "what drives the node and what loads it contradict each other (for example a voltage drive or an "
            "ideal op-amp output into an input at a virtual ground, or an ideal output into a short)"
        )
    voltage = back_gamma * front_b / determinant
    current = -back_gamma * front_a / determinant
    return CascadeSolution(
        voltage=voltage.T,
        current=current.T,
        z_out_ohm=_impedance(back_beta, back_alpha).T,
        z_in_ohm=_impedance(-front_b, front_a).T,
    )


def _conflict_interface(minors: list[NDArray[np.complex128]], current_drive: bool, row: int, default: int) -> int:
    """Where a singular chain's conflict sits: the last interface before the drive's relation
    degenerates (a stage whose equations cannot take what reaches it, for example an input at a
    virtual ground fed by a zero-impedance output, or by the voltage drive itself)."""
    alpha, beta = (0j, 1 + 0j) if current_drive else (1 + 0j, 0j)
    for index, m in enumerate(minors):
        m_ac, m_ad, m_bc, m_bd = (complex(m[k, row]) for k in (1, 2, 3, 4))
        new_alpha, new_beta = m_bc * alpha - m_ac * beta, m_ad * beta - m_bd * alpha
        scale = max(abs(m_ac), abs(m_ad), abs(m_bc), abs(m_bd)) * max(abs(alpha), abs(beta))
        if max(abs(new_alpha), abs(new_beta)) <= 1e-12 * scale:
            return index
        size = max(abs(new_alpha), abs(new_beta))
        alpha, beta = new_alpha / size, new_beta / size
    return default


def _interface_words(interface: int, stage_ids: tuple[str, ...]) -> str:
    if interface == 0:
        return "chain input"
    if stage_ids and interface <= len(stage_ids):
        return f'output of stage "{stage_ids[interface - 1]}"'
    return f"interface {interface}"


# -- results ---------------------------------------------------------------------------------

VOLTAGE_UNIT = "V/V"
CURRENT_UNIT = "Ω"
_WHY_VIRTUAL_GROUND = "its input sits at a virtual ground, so V_in ≡ 0 and V_out/V_in is undefined"
_WHY_NO_INPUT_CURRENT = "no current can enter its input (I_in ≡ 0), so V_out/I_in is undefined"


@dataclass(frozen=True, slots=True)
class IsolatedResponse:
    """A stage alone: its own drive (``stage.drive``) at the input, output unloaded.

    Attributes
    ----------
    f_hz : ndarray, shape (F,)
    response : ndarray, shape (F,), complex, or None
        V_out/V_in (V/V) for a voltage drive, V_out/I_in (Ω) for a current drive; ``None``
        when ``why`` says why it cannot be computed.
    unit : str
        ``"V/V"`` or ``"Ω"``.
    why : str or None
    """

    f_hz: NDArray[np.float64]
    response: NDArray[np.complex128] | None
    unit: str
    why: str | None


@dataclass(frozen=True, slots=True)
class StageInChain:
    """One stage as it sits in the chain, against the same stage isolated.

    Attributes
    ----------
    stage_id : str
    position : int
        1 for the first active stage; the stage sits between interfaces ``position - 1`` and
        ``position``.
    unit : str
        Unit of ``isolated`` and ``in_chain``: ``"V/V"`` for a voltage-driven stage,
        ``"Ω"`` for a current-driven one (its own transfer is then V_out/I_in).
    isolated, isolated_why :
        The isolated response (see :class:`IsolatedResponse`), or ``None`` and the reason.
    in_chain_v_per_v, in_chain_v_per_v_why :
        V_out/V_in where it sits (F,), or ``None`` and the reason (its input at a virtual
        ground: V_in ≡ 0).
    in_chain_ohm, in_chain_ohm_why :
        V_out/I_in where it sits (Ω), I_in the current entering its input from the stage
        before (or the drive), or ``None`` and the reason.
    loading_error_db, loading_error_deg : ndarray (F,) or None
        20·log10|in chain / isolated| and the phase of that ratio in degrees (in (−180, 180]),
        comparing the stage's own transfer (``unit``) in chain against isolated.
    loading_error_db_max : float or None
        The largest |loading_error_db| over the frequencies where it is finite (an exact zero
        of one response and not the other, a notch on the grid, gives ±∞ dB there).
    loading_error_db_signed, loading_error_f_hz : float or None
        The loading error with its sign (in chain minus isolated, dB: negative when the load
        pulls the gain down) at the frequency of the largest deviation, and that frequency.
    loading_error_why : str or None
    z_in_ohm : ndarray (F,), complex
        Looking into this stage's input: the stage, the rest of the chain and the load.
    z_out_ohm : ndarray (F,), complex
        Looking back into this stage's output: the stage and everything before it, drive zeroed.
    """

    stage_id: str
    position: int
    unit: str
    isolated: NDArray[np.complex128] | None
    isolated_why: str | None
    in_chain_v_per_v: NDArray[np.complex128] | None
    in_chain_v_per_v_why: str | None
    in_chain_ohm: NDArray[np.complex128] | None
    in_chain_ohm_why: str | None
    loading_error_db: NDArray[np.float64] | None
    loading_error_deg: NDArray[np.float64] | None
    loading_error_db_max: float | None
    loading_error_why: str | None
    z_in_ohm: NDArray[np.complex128]
    z_out_ohm: NDArray[np.complex128]
    loading_error_db_signed: float | None = None
    loading_error_f_hz: float | None = None

    @property
    def in_chain(self) -> NDArray[np.complex128] | None:
        """The stage's own transfer where it sits, in ``unit`` (compare with ``isolated``)."""
        return self.in_chain_ohm if self.unit == CURRENT_UNIT else self.in_chain_v_per_v

    @property
    def in_chain_why(self) -> str | None:
        return self.in_chain_ohm_why if self.unit == CURRENT_UNIT else self.in_chain_v_per_v_why


@dataclass(frozen=True, slots=True)
class ChainResult:
    """The chain with loading at the frequencies ``f_hz``.

    Attributes
    ----------
    f_hz : ndarray, shape (F,)
    stage_ids : tuple of str
        Active stages in chain order (bypassed stages are not in the chain).
    unit : str
        Unit of the interface responses: ``"V/V"`` (voltage drive) or ``"Ω"`` (current drive).
    interface_response : ndarray, shape (F, K + 1), complex
        Voltage at every interface per unit drive: chain input, after stage 1, ..., output.
    interface_current : ndarray, shape (F, K + 1), complex
        Current crossing every interface towards the output, per unit drive (A/V or A/A).
    z_out_ohm, z_in_ohm : ndarray, shape (F, K + 1), complex
        At every interface: looking back into the chain up to it (drive zeroed: a voltage
        source shorted, a current source open) and looking forward into the rest with the
        load. ``inf`` marks an open circuit (for instance Z_out at a current-driven input).
    stages : tuple of StageInChain
    """

    f_hz: NDArray[np.float64]
    stage_ids: tuple[str, ...]
    unit: str
    interface_response: NDArray[np.complex128]
    interface_current: NDArray[np.complex128]
    z_out_ohm: NDArray[np.complex128]
    z_in_ohm: NDArray[np.complex128]
    stages: tuple[StageInChain, ...]

    @property
    def response(self) -> NDArray[np.complex128]:
        """Drive → chain output (F,), in ``unit``."""
        return self.interface_response[:, -1]

    def stage(self, stage_id: str) -> StageInChain:
        """The stage ``stage_id`` in chain.

        Raises
        ------
        KeyError
            When it is not in the chain (unknown, or bypassed), with a one-sentence message.
        """
        for entry in self.stages:
            if entry.stage_id == stage_id:
                return entry
        raise KeyError(f'stage "{stage_id}" is not in the chain (it is bypassed or does not exist)')


def _loading_error(in_chain: NDArray[np.complex128], isolated: NDArray[np.complex128]) -> tuple[
        NDArray[np.float64], NDArray[np.float64]]:
    # A response that underflows (a long ladder far above its corner) makes the ratio overflow:
    # the loading error is then not finite, and the metrics report it as having no value.
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        ratio = in_chain / isolated
        error_db = 20.0 * np.log10(np.abs(ratio))
    return error_db, np.degrees(np.angle(ratio))


def _ratio(numerator: NDArray[np.complex128], denominator: NDArray[np.complex128]) -> NDArray[np.complex128]:
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        result: NDArray[np.complex128] = numerator / denominator
    return result


def isolated_from_system(system: StageSystem, relation: PortRelation, current_drive: bool,
                         f_hz: NDArray[np.float64]) -> IsolatedResponse:
    """The isolated response of an assembled stage (``sweep.drive`` + ``sweep.transfer``).

    ``relation`` (the stage's port relation) tells, before solving, whether the drive can be
    applied at all: a voltage source cannot drive an input held at a virtual
    ground, a current source cannot drive an input that takes no current.
    """
    unit = CURRENT_UNIT if current_drive else VOLTAGE_UNIT
    if current_drive and relation.input_current_zero:
        return IsolatedResponse(f_hz, None, unit, "no current can enter its input (I_in ≡ 0), so a current "
                                "drive cannot be applied; give the stage a voltage drive")
    if not current_drive and relation.input_voltage_zero:
        return IsolatedResponse(f_hz, None, unit, "its input sits at a virtual ground (V_in ≡ 0), so a voltage "
                                "drive cannot be applied; give the stage a current drive")
    drive_pair = (I_IN, I_OUT) if current_drive else (V_IN, I_OUT)
    if relation.imposed == drive_pair and not relation.per_frequency and np.array_equal(relation.f_hz, f_hz):
        # The reduction already solved the stage with exactly this drive imposed (input source,
        # output open): its second row reads V_out = W·(drive) + W'·I_out, so with I_out = 0 the
        # isolated response is one division of that row, the same numbers as a fresh solve.
        source = I_IN if current_drive else V_IN
        with np.errstate(divide="ignore", invalid="ignore"):
            response = -relation.p[:, 1, source] / relation.p[:, 1, V_OUT]
    else:
        try:
            response = transfer(drive(system, current=current_drive), f_hz)
        except np.linalg.LinAlgError:
            return IsolatedResponse(f_hz, None, unit, "with its own drive and the output unloaded its equations "
                                    "are singular at an analysis frequency")
    if not np.all(np.isfinite(response)):
        return IsolatedResponse(f_hz, None, unit, "its response is infinite at an analysis frequency")
    return IsolatedResponse(f_hz, response, unit, None)


# -- the engine with its caches --------------------------------------------------------------


def _frequencies(project: Project, f_hz: NDArray[np.float64] | list[float] | float | None) -> NDArray[np.float64]:
    if f_hz is None:
        return frequency_grid(project.settings)
    values = np.atleast_1d(np.asarray(f_hz, dtype=float))
    if values.ndim != 1 or values.size == 0:
        raise ValueError(f"f_hz must be a non-empty list of frequencies in hertz, got shape {values.shape}")
    if not np.all(np.isfinite(values)) or np.any(values < 0):
        raise ValueError(f"f_hz must hold finite frequencies of 0 Hz or more, got {values.tolist()}")
    return values


class ChainEngine:
    """The chain analysis with its per-stage caches (one per document; not global).

    Port relations, isolated responses and assembled stages are cached by stage fingerprint
    (:func:`stagewise.model.fingerprint.stage_fingerprint`) and frequency grid, so after an
    edit only the edited stage is re-reduced; the cascade itself is cheap and always re-run.
    Safe to call from a background worker thread.

    Parameters
    ----------
    max_entries : int
        Entries kept per cache (least recently used dropped first).

    Examples
    --------
    >>> engine = ChainEngine()                                         # doctest: +SKIP
    >>> result = engine.analyze(project)             # the project's frequency grid
    >>> result.response, result.stage("buf").loading_error_db_max
    >>> engine.analyze(project, [10, 1e3, 2e4])      # any frequencies (hertz)
    >>> engine.reductions                            # port relations computed so far
    """

    def __init__(self, max_entries: int = 512) -> None:
        self._systems: ComputeCache[StageSystem] = ComputeCache(max_entries)
        self._relations: ComputeCache[PortRelation] = ComputeCache(max_entries)
        self._refined: ComputeCache[PortRelation | None] = ComputeCache(max_entries)
        self._isolated: ComputeCache[IsolatedResponse] = ComputeCache(max_entries)
        self._whole: ComputeCache[StageAnalysis] = ComputeCache(max_entries)

    @property
    def reductions(self) -> int:
        """How many stage port relations were computed (cache misses)."""
        return self._relations.computed

    @property
    def refinements(self) -> int:
        """How many stages were re-reduced with terminations suited to their neighbours."""
        return self._refined.computed

    @property
    def isolated_solves(self) -> int:
        """How many isolated stage responses were computed (cache misses)."""
        return self._isolated.computed

    @property
    def assemblies(self) -> int:
        """How many stages were assembled (cache misses)."""
        return self._systems.computed

    def clear(self) -> None:
        """Forget every cached result (counters are kept)."""
        self._systems.clear()
        self._relations.clear()
        self._refined.clear()
        self._isolated.clear()
        self._whole.clear()

    def system(self, stage: Stage, project: Project) -> StageSystem:
        """The stage's assembled pencil, cached by fingerprint."""
        fingerprint = stage_fingerprint(stage, project)
        return self._system(stage, project, fingerprint)

    def _system(self, stage: Stage, project: Project, fingerprint: str) -> StageSystem:
        def build() -> StageSystem:
            try:
                return assemble(stage, project)
            except CircuitError as error:
                raise CircuitError(f'stage "{stage.id}": {error}') from error
        return self._systems.get_or_compute(fingerprint, build)

    def port_relation(self, stage: Stage, project: Project, f_hz: NDArray[np.float64] | list[float] | None = None
                      ) -> PortRelation:
        """The stage's port relation at ``f_hz`` (default: the project grid), cached."""
        grid = _frequencies(project, f_hz)
        fingerprint = stage_fingerprint(stage, project)
        return self._relation(stage, project, fingerprint, grid, grid_key(grid))

    def _relation(self, stage: Stage, project: Project, fingerprint: str, grid: NDArray[np.float64],
                  key: str) -> PortRelation:
        return self._relations.get_or_compute(
            (fingerprint, key),
            lambda: reduce_stage(self._system(stage, project, fingerprint), grid, stage_id=stage.id),
        )

    def _refine(self, stage: Stage, project: Project, fingerprint: str, key: str, relation: PortRelation,
                input_current: NDArray[np.bool_], output_voltage: NDArray[np.bool_]) -> PortRelation:
        # Impose the current at a port where the neighbour's side has the higher impedance
        # (it drives like a current source), the voltage where it has the lower: at the input
        # that is where the chain before is the higher; at the output where the stage is.
        if not retermination(relation, input_current, output_voltage):
            return relation
        mask_key = hashlib.sha256(np.packbits(np.concatenate([input_current, output_voltage])).tobytes()).hexdigest()
        better = self._refined.get_or_compute(
            (fingerprint, key, mask_key),
            lambda: reduce_stage_terminated(self._system(stage, project, fingerprint), relation, input_current,
                                            output_voltage),
        )
        return relation if better is None else better

    def isolated(self, stage: Stage, project: Project, f_hz: NDArray[np.float64] | list[float] | None = None
                 ) -> IsolatedResponse:
        """The stage alone (its own drive, output unloaded) at ``f_hz``, cached.

        Works for bypassed stages too. Never raises for a stage that assembles but cannot be
        driven: ``why`` says why. Raises :class:`CircuitError` when the stage cannot be
        assembled or is not a well-posed two-port.
        """
        grid = _frequencies(project, f_hz)
        fingerprint = stage_fingerprint(stage, project)
        key = grid_key(grid)
        return self._isolated_response(stage, project, fingerprint, grid, key)

    def _isolated_response(self, stage: Stage, project: Project, fingerprint: str, grid: NDArray[np.float64],
                           key: str) -> IsolatedResponse:
        def compute() -> IsolatedResponse:
            relation = self._relation(stage, project, fingerprint, grid, key)
            system = self._system(stage, project, fingerprint)
            return isolated_from_system(system, relation, stage.drive == "current", grid)
        return self._isolated.get_or_compute((fingerprint, key), compute)

    def merged(self, project: Project) -> MergedChain:
        """The merged whole-chain circuit (see :func:`merged_system`), from cached stage pencils."""
        stages = project.active_stages
        if not stages:
            raise CircuitError("the chain has no active stage: every stage is bypassed or there is none")
        r_ohm, c_f = load_admittance(project)
        return merge_systems([stage.id for stage in stages], [self.system(stage, project) for stage in stages],
                             current_drive=project.input.drive == "current", load_r_ohm=r_ohm, load_c_f=c_f)

    def whole_chain(self, project: Project, f_hz: NDArray[np.float64] | list[float] | float | None = None
                    ) -> StageAnalysis:
        """The merged chain, drive → last output, analysed by the stage engine.

        The poles and zeros (from the merged pencil), gain constant and sweep of the whole
        chain, by :func:`stagewise.engine.stage.analyze_system` on :meth:`MergedChain.driven`;
        cached by the merged circuit's fingerprint and the grid. ``why`` says why when the chain
        cannot be analysed (the stage engine never raises for that).
        """
        from stagewise.engine.stage import analyze_system  # noqa: PLC0415 - scipy only when asked

        grid = _frequencies(project, f_hz)
        merged = self.merged(project)
        unit = CURRENT_UNIT if merged.current_drive else VOLTAGE_UNIT
        return self._whole.get_or_compute(
            (merged.system.fingerprint, grid_key(grid)),
            lambda: analyze_system(merged.driven(), grid, unit, "chain", merged.system.fingerprint),
        )

    def step(self, project: Project) -> StepResponse:
        """The whole chain's step response and its metrics, from :meth:`whole_chain`'s minimal model.

        Raises
        ------
        CircuitError
            When the chain has no pole/zero model (the message says why).
        """
        from stagewise.engine.timeresp import step_response  # noqa: PLC0415 - scipy only when asked

        analysis = self.whole_chain(project)
        if analysis.model is None:
            raise CircuitError(f"the chain has no pole/zero model: {analysis.why or analysis.model_why}")
        return step_response(analysis.model)

    def analyze(self, project: Project, f_hz: NDArray[np.float64] | list[float] | float | None = None
                ) -> ChainResult:
        """The chain with loading: chain response, every stage in chain and isolated, impedances.

        Parameters
        ----------
        project : Project
            Its active stages, ``input.drive`` and ``load`` are used.
        f_hz : array_like, optional
            Frequencies in hertz (any, for instance ``[10, 1e3, 2e4]``); default: the
            project's frequency grid (:func:`stagewise.engine.sweep.frequency_grid`).

        Returns
        -------
        ChainResult

        Raises
        ------
        CircuitError
            No active stage, a stage that cannot be assembled or is not a well-posed two-port,
            or a chain without a unique solution (the message names the stage or interface).
        ValueError
            Frequencies that are not finite and non-negative.
        """
        grid = _frequencies(project, f_hz)
        key = grid_key(grid)
        stages = project.active_stages
        if not stages:
            raise CircuitError("the chain has no active stage: every stage is bypassed or there is none")
        fingerprints = [stage_fingerprint(stage, project) for stage in stages]
        relations = [self._relation(stage, project, fingerprint, grid, key)
                     for stage, fingerprint in zip(stages, fingerprints, strict=True)]
        isolated = [self._isolated_response(stage, project, fingerprint, grid, key)
                    for stage, fingerprint in zip(stages, fingerprints, strict=True)]
        r_ohm, c_f = load_admittance(project)
        load_y = np.zeros(len(grid), dtype=complex)
        if r_ohm is not None:
            load_y += 1.0 / r_ohm
        if c_f is not None:
            load_y += 2j * np.pi * grid * c_f
        stage_ids = tuple(stage.id for stage in stages)
        current_drive = project.input.drive == "current"
        solution = cascade([relation.p for relation in relations], current_drive=current_drive,
                           load_admittance_s=load_y, f_hz=grid, stage_ids=stage_ids,
                           minors=[relation.minors for relation in relations])
        # Second pass where a neighbour's impedance calls for other terminations (for instance
        # a current drive, or a high-impedance output, into a stage): see reduce_stage_terminated.
        with np.errstate(invalid="ignore"):
            # Where the side looking back has the higher impedance (column j: interface j).
            back_higher = np.abs(solution.z_out_ohm) > np.abs(solution.z_in_ohm)
        refined = [self._refine(stage, project, fingerprint, key, relation, back_higher[:, position - 1],
                                back_higher[:, position])
                   for position, (stage, fingerprint, relation) in enumerate(
                       zip(stages, fingerprints, relations, strict=True), start=1)]
        if any(item is not relation for item, relation in zip(refined, relations, strict=True)):
            relations = refined
            solution = cascade([relation.p for relation in relations], current_drive=current_drive,
                               load_admittance_s=load_y, f_hz=grid, stage_ids=stage_ids,
                               minors=[relation.minors for relation in relations])
        held_at_zero = [relation.input_voltage_zero for relation in relations[1:]] + [False]
        entries = tuple(
            _stage_in_chain(position, stage, relation, alone, solution, held_at_zero[position - 1])
            for position, (stage, relation, alone) in enumerate(zip(stages, relations, isolated, strict=True),
                                                                start=1)
        )
        return ChainResult(
            f_hz=grid,
            stage_ids=stage_ids,
            unit=CURRENT_UNIT if current_drive else VOLTAGE_UNIT,
            interface_response=solution.voltage,
            interface_current=solution.current,
            z_out_ohm=solution.z_out_ohm,
            z_in_ohm=solution.z_in_ohm,
            stages=entries,
        )


def _stage_in_chain(position: int, stage: Stage, relation: PortRelation, alone: IsolatedResponse,
                    solution: CascadeSolution, output_held_at_zero: bool) -> StageInChain:
    v_in, v_out = solution.voltage[:, position - 1], solution.voltage[:, position]
    if output_held_at_zero:
        # The next stage's input is a virtual ground: V_out ≡ 0 exactly; what the solve
        # leaves there is rounding, not a signal.
        v_out = np.zeros_like(v_out)
    i_in = solution.current[:, position - 1]
    per_volt: NDArray[np.complex128] | None = None
    per_volt_why: str | None = None
    if relation.input_voltage_zero:
        per_volt_why = _WHY_VIRTUAL_GROUND
    elif output_held_at_zero and np.all(np.abs(v_in) <= 1e-12 * np.max(np.abs(solution.voltage), axis=1)):
        per_volt_why = ("its input and output are both held at 0 V by the next stage's virtual-ground input, "
                        "so V_out/V_in is undefined")
    else:
        per_volt = _ratio(v_out, v_in)
    per_amp: NDArray[np.complex128] | None = None
    per_amp_why: str | None = None
    if relation.input_current_zero:
        per_amp_why = _WHY_NO_INPUT_CURRENT
    else:
        per_amp = _ratio(v_out, i_in)
    unit = alone.unit
    own, own_why = (per_amp, per_amp_why) if unit == CURRENT_UNIT else (per_volt, per_volt_why)
    error_db: NDArray[np.float64] | None = None
    error_deg: NDArray[np.float64] | None = None
    error_max: float | None = None
    error_signed: float | None = None
    error_f_hz: float | None = None
    error_why: str | None = None
    if alone.response is None:
        error_why = f"the isolated response cannot be computed: {alone.why}"
    elif own is None:
        error_why = f"the response in chain is undefined: {own_why}"
    elif output_held_at_zero:
        error_why = ("in chain its output is held at 0 V by the next stage's virtual-ground input, so the "
                     "loading error is unbounded (−∞ dB)")
    else:
        error_db, error_deg = _loading_error(own, alone.response)
        finite = np.isfinite(error_db)
        if np.any(finite):
            deviation = np.where(finite, np.abs(error_db), -1.0)
            worst = int(np.argmax(deviation))
            error_max = float(deviation[worst])
            error_signed, error_f_hz = float(error_db[worst]), float(alone.f_hz[worst])
        else:
            error_why = "the ratio of in-chain to isolated response is not finite at any frequency"
    return StageInChain(
        stage_id=stage.id,
        position=position,
        unit=unit,
        isolated=alone.response,
        isolated_why=alone.why,
        in_chain_v_per_v=per_volt,
        in_chain_v_per_v_why=per_volt_why,
        in_chain_ohm=per_amp,
        in_chain_ohm_why=per_amp_why,
        loading_error_db=error_db,
        loading_error_deg=error_deg,
        loading_error_db_max=error_max,
        loading_error_why=error_why,
        z_in_ohm=solution.z_in_ohm[:, position - 1],
        z_out_ohm=solution.z_out_ohm[:, position],
        loading_error_db_signed=error_signed,
        loading_error_f_hz=error_f_hz,
    )


# -- plain functions for one-off use ---------------------------------------------------------


def analyze_chain(project: Project, f_hz: NDArray[np.float64] | list[float] | float | None = None) -> ChainResult:
    """:meth:`ChainEngine.analyze` without keeping a cache (one-off use, command line)."""
    return ChainEngine().analyze(project, f_hz)


def isolated_response(stage: Stage, project: Project,
                      f_hz: NDArray[np.float64] | list[float] | float | None = None) -> IsolatedResponse:
    """:meth:`ChainEngine.isolated` without keeping a cache."""
    return ChainEngine().isolated(stage, project, _frequencies(project, f_hz))


def stage_port_relation(stage: Stage, project: Project,
                        f_hz: NDArray[np.float64] | list[float] | float | None = None) -> PortRelation:
    """:meth:`ChainEngine.port_relation` without keeping a cache."""
    return ChainEngine().port_relation(stage, project, _frequencies(project, f_hz))
