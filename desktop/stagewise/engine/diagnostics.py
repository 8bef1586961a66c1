"""Why a stage cannot be solved, in one sentence that names the node or the part.

A stage's matrix ``G + sC`` (with its isolated drive) is singular for every s when the circuit
does not determine its unknowns. The cases met in practice, each recognised from the null
vectors of the matrix at a generic complex frequency:

- an ideal op-amp without feedback: nothing brings its output back to its inputs, so its output
  current (and voltage) is free while its input condition v+ = v− fights another constraint;
- a loop of voltage-defined branches (voltage-output sources, op-amp outputs, the drive): the
  current around the loop is free;
- a floating node: nothing ties its voltage to node ``0`` (only op-amp or controlled-source
  inputs, or nothing, connect there);
- an input port the stage itself holds at a fixed voltage (a virtual ground: the port is the
  inverting input of an ideal op-amp whose non-inverting input is grounded): a voltage drive
  there is meaningless, a current drive is not.

Public API
----------
``diagnose(system, current_drive) -> Diagnosis | None``
    ``None`` when the driven stage is solvable.
``Diagnosis``
    ``why`` (the sentence), ``nodes`` and ``parts`` it names.

References
----------
J. Vlach and K. Singhal, *Computer Methods for Circuit Analysis and Design*, 2nd ed., Van
Nostrand Reinhold, 1994 (modified nodal analysis and when its equations have a unique solution).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from stagewise.engine.mna import StageSystem
from stagewise.engine.sweep import drive

__all__ = ["FINDING_KINDS", "Diagnosis", "Finding", "diagnose", "is_singular"]

# Generic evaluation points, in units of the pencil's own frequency scale: irrational, complex,
# so that no pole or zero of a real circuit lands on them.
_PROBES = (complex(0.2113, 1.3247), complex(0.0731, 0.5772))
SINGULAR_RTOL = 1e-12
COMPONENT_SHARE = 0.05


# What an automatic finding can be (the words shown for each are in ``review.checks``).
FINDING_KINDS = ("unstable", "over_range", "swing", "slew", "not_analysed")


@dataclass(frozen=True, slots=True)
class Finding:
    """Something that fails a design whether or not a check asks about it.

    Attributes
    ----------
    kind : str
        One of :data:`FINDING_KINDS`: ``unstable`` (a pole on or right of the jω axis),
        ``over_range`` (the converter input exceeds full scale for the declared input), ``swing``
        (an op-amp output needs more than its swing), ``slew`` (more than its slew rate),
        ``not_analysed`` (the chain's equations cannot be solved, so nothing about it holds).
    stage_id : str or None
        The stage it belongs to (``None`` for the chain and the converter).
    where : str
        ``isolated``, ``in_chain``, ``from_input`` or ``chain``: where it was found.
    ref : str or None
        The op-amp (``stage:U1``) for swing and slew.
    sentence : str
        One sentence saying what and how much.
    """

    kind: str
    stage_id: str | None
    where: str
    ref: str | None
    sentence: str


@dataclass(frozen=True, slots=True)
class Diagnosis:
    """Why a stage cannot be solved: one sentence, and the nodes and parts it names."""

    why: str
    nodes: tuple[str, ...] = ()
    parts: tuple[str, ...] = ()


def _scale(g: NDArray[np.float64], c: NDArray[np.float64]) -> float:
    g_norm, c_norm = float(np.linalg.norm(g)), float(np.linalg.norm(c))
    return g_norm / c_norm if g_norm > 0 and c_norm > 0 else 1.0


def _balanced(matrix: NDArray[np.complex128]) -> NDArray[np.complex128]:
    """Row and column scaling (powers of two) so that the SVD judges rank fairly."""
    scaled = matrix.copy()
    for _ in range(6):
        size = np.abs(scaled).max(axis=1)
        size[size == 0] = 1.0
        factor = np.exp2(-np.round(np.log2(size)))
        scaled *= factor[:, None]
        size = np.abs(scaled).max(axis=0)
        size[size == 0] = 1.0
        factor = np.exp2(-np.round(np.log2(size)))
        scaled *= factor[None, :]
    return scaled


def _null_vectors(
    g: NDArray[np.float64], c: NDArray[np.float64]
) -> tuple[NDArray[np.complex128], NDArray[np.complex128]] | None:
    """Right and left null vectors of G + s·C at generic s, or ``None`` when it is regular.

    The matrix is singular for every s only if it is singular at every probe.
    """
    scale = _scale(g, c)
    found: tuple[NDArray[np.complex128], NDArray[np.complex128]] | None = None
    for probe in _PROBES:
        matrix = g + probe * scale * c
        scaled = _balanced(matrix.astype(complex))
        u, singular, vh = np.linalg.svd(scaled)
        deficient = singular <= SINGULAR_RTOL * singular[0] if singular.size else np.array([], dtype=bool)
        if not deficient.any():
            return None
        # Kept in the balanced coordinates: there every unknown and every row weigh alike, so
        # "involved" does not depend on units (a volt against a milliampere).
        found = (vh.conj().T[:, deficient], u[:, deficient])
    return found


def is_singular(g: NDArray[np.float64], c: NDArray[np.float64]) -> bool:
    """True when ``G + sC`` is singular for every s (checked at generic complex points)."""
    return _null_vectors(g, c) is not None


def _involved(vectors: NDArray[np.complex128]) -> list[int]:
    weight = np.sqrt(np.sum(np.abs(vectors) ** 2, axis=1))
    if weight.size == 0 or weight.max() == 0:
        return []
    return [int(i) for i in np.nonzero(weight > COMPONENT_SHARE * weight.max())[0]]


def _name(unknown: str) -> tuple[str, str]:
    """Split ``v(node)`` / ``i(ref)`` into its kind letter and its name."""
    kind, _, rest = unknown.partition("(")
    return kind, rest[:-1] if rest.endswith(")") else rest


def _quoted(names: list[str]) -> str:
    return ", ".join(f'"{name}"' for name in names)


def diagnose(system: StageSystem, current_drive: bool) -> Diagnosis | None:
    """Why the isolated, driven stage has no unique solution; ``None`` when it has one.

    Parameters
    ----------
    system : StageSystem
        The assembled stage.
    current_drive : bool
        True when the stage is driven by an ideal current source (``"drive": "current"``).

    Returns
    -------
    Diagnosis or None
    """
    driven = drive(system, current_drive)
    found = _null_vectors(driven.g, driven.c)
    if found is None:
        return None
    unknowns = list(system.unknowns) + ([] if current_drive else ["i(the input drive)"])
    input_node = _name(system.unknowns[system.input_index])[1]
    constraint_parts = {name for kind, name in map(_name, system.unknowns) if kind == "i"}
    ideal = set(system.ideal_opamps)
    if not current_drive and _null_vectors(system.g, system.c) is None:
        # The stage alone is solvable; only the voltage drive breaks it: the stage itself fixes
        # the input port's voltage. Name what holds it (the rows that contradict the drive).
        _, left = found
        holders = [_name(unknowns[row])[1] for row in _involved(left)
                   if row < system.size and _name(unknowns[row])[0] == "i" and _name(unknowns[row])[1] in constraint_parts]
        opamps = [ref for ref in holders if ref in ideal]
        if opamps:
            what = f"the virtual ground of ideal op-amp {_quoted(opamps)}"
        elif holders:
            what = f"the voltage-defined branch {_quoted(holders)}"
        else:
            what = "the stage itself"
        return Diagnosis(
            why=(f'the input port "{input_node}" is held at a fixed voltage by {what}, so a voltage drive there '
                 'is meaningless; drive the stage with a current ("drive": "current") or move its input port'),
            nodes=(input_node,),
            parts=tuple(holders),
        )
    right, _ = found
    free = [unknowns[i] for i in _involved(right)]
    free_opamps = [name for kind, name in map(_name, free) if kind == "i" and name in ideal]
    if free_opamps:
        return Diagnosis(
            why=(f"ideal op-amp {_quoted(free_opamps)} has no feedback: nothing brings its output back to its "
                 "inputs, so its output is undetermined; add a feedback path or use a finite op-amp model"),
            parts=tuple(free_opamps),
        )
    free_branches = [name for kind, name in map(_name, free) if kind == "i"]
    if free_branches:
        return Diagnosis(
            why=(f"the voltage-defined branches {_quoted(free_branches)} form a loop (or sit in parallel), so the "
                 "current around it is undetermined; break the loop with a resistance"),
            parts=tuple(name for name in free_branches if name != "the input drive"),
        )
    free_nodes = [name for kind, name in map(_name, free) if kind == "v"]
    # Name the cause, not its consequences: a node whose row is empty has nothing carrying
    # current into it; the nodes that follow it (through sources) are free only because of it.
    empty = [name for name in free_nodes
             if not np.any(system.g[system.node_index[name]]) and not np.any(system.c[system.node_index[name]])]
    if empty:
        free_nodes = empty
    if free_nodes:
        plural = len(free_nodes) > 1
        return Diagnosis(
            why=(f"node{'s' if plural else ''} {_quoted(free_nodes)} float{'' if plural else 's'}: nothing ties "
                 f"{'their' if plural else 'its'} voltage to node 0 (only op-amp or controlled-source inputs connect "
                 "there); add a path to node 0"),
            nodes=tuple(free_nodes),
        )
    states = [name for _, name in map(_name, free)]
    return Diagnosis(why=f"the stage has no unique solution (undetermined: {_quoted(states)})", parts=tuple(states))

