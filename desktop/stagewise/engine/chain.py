"""The chain of stages with loading: the merged whole-chain circuit.

The active stages (bypassed ones left out) are joined output to input: stage k's output node
and stage k+1's input node become one node. :func:`merged_system` builds that circuit at the
matrix level, so circuits and behavioural blocks join the same way: the stage pencils are
placed block-diagonally, then the two unknowns of every interface are merged (their columns
added, because the two voltages are one; their rows added, because Kirchhoff's current law of
the joined node is the sum of both stages' current balances). The project's load R ∥ C is
stamped at the last output.

The merged circuit is a :class:`~stagewise.engine.mna.StageSystem` like any stage's, so every
analysis written for a stage (sweeps, poles and zeros, noise, loop gain, tolerances) runs on
the whole chain unchanged. It is also the exact reference that the fast port-relation cascade
(:mod:`stagewise.engine.ports`) is tested against.

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

import numpy as np

from stagewise.engine.mna import CircuitError, ElementStamp, OpampStates, StageSystem, assemble
from stagewise.engine.sweep import DrivenSystem, drive
from stagewise.model.project import Project, Stage

__all__ = [
    "LOAD_PREFIX",
    "MergedChain",
    "active_systems",
    "load_admittance",
    "merged_system",
    "merge_systems",
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
    offsets = np.cumsum([0] + [system.size for system in systems])
    total = int(offsets[-1])
    # Union-find over the block-diagonal unknowns: out(k) and in(k+1) are one node. A stage
    # whose input and output are the same node (a shunt model) lets a join run through it.
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
    size = len(kept)

    # Incidence matrix E (merged x block): G_merged = E·G_block·Eᵀ adds the rows and the
    # columns of joined unknowns; with 0/1 entries the sums are exact.
    incidence = np.zeros((size, total))
    incidence[where, np.arange(total)] = 1.0
    g_block = np.zeros((total, total))
    c_block = np.zeros((total, total))
    for k, system in enumerate(systems):
        start, stop = int(offsets[k]), int(offsets[k + 1])
        g_block[start:stop, start:stop] = system.g
        c_block[start:stop, start:stop] = system.c
    g = incidence @ g_block @ incidence.T
    c = incidence @ c_block @ incidence.T

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

