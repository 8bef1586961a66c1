"""What goes into a review packet, gathered without Qt: analysis document, curves and review states.

Every number printed in the packet comes from one ``engine.analysis.ProjectAnalysis``: its
``document()`` is the ``analyze --json`` document, and the same object is the metric provider
the checks are evaluated with, so the packet, ``analyze --json`` and ``check`` agree by
construction. Curves (which that document does not hold) come from the same object's chain
result and pole/zero models. Where a piece of the analysis is missing from this build, the
packet says so rather than showing a number it cannot stand behind.
"""

from __future__ import annotations

import importlib
import os
import re
from collections import OrderedDict
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from stagewise.engine.mna import assemble
from stagewise.engine.sweep import drive, frequency_grid, transfer
from stagewise.files.project_file import file_sha256
from stagewise.model.fingerprint import stage_fingerprint
from stagewise.model.project import Project, Stage

__all__ = ["Curve", "PacketContent", "clear_symbolic_cache", "gather", "resolve_source"]

NOT_IN_BUILD = "not available in this build"
_SHA256 = re.compile(r"[0-9a-f]{64}")


@dataclass
class Curve:
    """A complex response over frequency, or the reason it could not be computed."""

    f_hz: NDArray[np.float64] | None = None
    response: NDArray[np.complex128] | None = None
    why: str | None = None


@dataclass
class Step:
    """A unit-step response over time, or the reason there is none."""

    t_s: NDArray[np.float64] | None = None
    y: NDArray[np.float64] | None = None
    why: str | None = None


@dataclass
class StageCurves:
    isolated: Curve = field(default_factory=Curve)
    in_chain: Curve = field(default_factory=Curve)
    # The chain's drive to this stage's output, in the chain's unit (``from_input_unit``).
    from_input: Curve = field(default_factory=lambda: Curve(why="not computed in this build"))
    from_input_unit: str = "V/V"
    step_isolated: Step = field(default_factory=lambda: Step(why=f"the step response is {NOT_IN_BUILD}"))
    step_in_chain: Step = field(default_factory=lambda: Step(why=f"the step response is {NOT_IN_BUILD}"))
    # Loop gain of each finite op-amp, alone then in chain (engine/loops.py ``LoopResult``s).
    loops: list[tuple[str, Any]] = field(default_factory=list)


@dataclass
class PacketContent:
    """Everything a packet shows, computed once and shared by the PDF and the printer paths."""

    project: Project
    sha256: str
    source_name: str
    analysis: dict[str, Any] | None
    analysis_why: str | None
    chain: Curve
    stages: dict[str, StageCurves]
    symbolic: dict[str, dict[str, Any]]
    provider: Any = None  # the review layer's MetricProvider (the same analysis object), if any

    def stage_analysis(self, stage_id: str) -> dict[str, Any] | None:
        """The ``stages[]`` entry of the analysis document for ``stage_id``, if any."""
        if self.analysis is None:
            return None
        for entry in self.analysis.get("stages", []):
            if entry.get("id") == stage_id:
                return dict(entry)
        return None


def resolve_source(path_or_sha: str | os.PathLike[str]) -> tuple[str, str, str | None]:
    """``(sha256, shown name, path or None)`` from a project file path or a 64-digit SHA-256.

    The GUI passes the SHA-256 of the file as last saved when it prints; the command line passes
    the file's path.
    """
    text = os.fspath(path_or_sha)
    if _SHA256.fullmatch(text) and not Path(text).exists():
        return text, "(not saved to a file)", None
    return file_sha256(text), Path(text).name, text


def _optional(module: str, name: str) -> Callable[..., Any] | None:
    """A function of an engine module that may not be in this build yet (``None`` when absent)."""
    try:
        loaded = importlib.import_module(module)
    except ImportError:
        return None
    found = getattr(loaded, name, None)
    return found if callable(found) else None


def _analysis(project: Project, path: str | None, sha: str,
              analysis: Any = None) -> tuple[Any, dict[str, Any] | None, str | None]:
    """``(analysis object, analyze --json document, why)`` from engine/analysis.py when present."""
    if analysis is None:
        analysis_class = _optional("stagewise.engine.analysis", "ProjectAnalysis")
        if analysis_class is None:
            return None, None, f"the analysis engine is {NOT_IN_BUILD}"
        analysis = analysis_class(project)
    try:
        return analysis, dict(analysis.document(path, sha)), None
    except (ValueError, ArithmeticError, np.linalg.LinAlgError) as error:
        return None, None, f"the analysis failed: {error}"


def _curves_from_analysis(analysis: Any, project: Project) -> tuple[Curve, dict[str, StageCurves]]:
    """Chain, isolated and in-chain responses from the analysis object (the same numbers).

    Isolated: the stage analysis's response (or its reason). In chain and the whole chain: the
    port-relation cascade (or the reason it failed).
    """
    result = analysis.chain
    chain_ok = hasattr(result, "stage")
    chain_why = None if chain_ok else str(getattr(result, "why", "the chain cannot be analysed"))
    f_hz = np.asarray(analysis.f_hz)
    stages: dict[str, StageCurves] = {}
    for stage in project.stages:
        alone = analysis.isolated(stage.id)
        isolated = (Curve(np.asarray(alone.f_hz), np.asarray(alone.response)) if alone.response is not None
                    else Curve(why=alone.why or "no isolated response"))
        if stage.bypass:
            in_chain = Curve(why="the stage is bypassed: it is not in the chain")
        elif not chain_ok:
            in_chain = Curve(why=chain_why)
        else:
            entry = result.stage(stage.id)
            in_chain = (Curve(f_hz, np.asarray(entry.in_chain)) if entry.in_chain is not None
                        else Curve(why=entry.in_chain_why or "no response in chain"))
        if stage.bypass or not chain_ok:
            from_input = Curve(why=in_chain.why)
        else:
            position = result.stage_ids.index(stage.id) + 1
            from_input = Curve(f_hz, np.asarray(result.interface_response[:, position]))
        stages[stage.id] = StageCurves(isolated, in_chain, from_input,
                                       str(getattr(result, "unit", "V/V")) if chain_ok else "V/V")
    chain = Curve(f_hz, np.asarray(result.response)) if chain_ok else Curve(why=chain_why)
    return chain, stages


def _step(stage_analysis: Any) -> Step:
    """The step response of a stage analysis's minimal pole/zero model (engine/timeresp.py)."""
    respond = _optional("stagewise.engine.timeresp", "step_response")
    if respond is None:
        return Step(why=f"the step response is {NOT_IN_BUILD}")
    model = getattr(stage_analysis, "model", None)
    if model is None:
        return Step(why=getattr(stage_analysis, "why", None) or getattr(stage_analysis, "model_why", None)
                    or "no pole/zero model")
    try:
        result = respond(model)
    except (ValueError, ArithmeticError, np.linalg.LinAlgError) as error:
        return Step(why=f"the step response failed: {error}")
    return Step(np.asarray(result.t_s, dtype=float), np.asarray(result.y, dtype=float))


def _steps(analysis: Any, stage: Stage) -> tuple[Step, Step]:
    isolated = _step(analysis.isolated(stage.id))
    if stage.bypass:
        return isolated, Step(why="the stage is bypassed: it is not in the chain")
    in_chain = analysis.in_chain(stage.id)
    if getattr(in_chain, "model", None) is None:
        return isolated, Step(why=getattr(in_chain, "why", None) or getattr(in_chain, "model_why", None)
                              or "no response in chain")
    return isolated, _step(in_chain)


def _loops(analysis: Any, stage: Stage) -> list[tuple[str, Any]]:
    """``(label, LoopResult)`` of each finite op-amp of the stage: "U1 alone", then "U1 in chain"
    (labels as the program's loop-gain view gives them). Ideal op-amps have no curve to draw."""
    alone = getattr(analysis, "isolated_loop_results", {}).get(stage.id, ())
    found = [(f"{result.ref} alone", result) for result in alone if len(result.loop_gain)]
    chain = getattr(analysis, "chain_loop_results", ())
    if not stage.bypass and isinstance(chain, tuple):
        prefix = f"{stage.id}:"
        found += [(f"{result.ref[len(prefix):]} in chain", result) for result in chain
                  if str(result.ref).startswith(prefix) and len(result.loop_gain)]
    return found


def _isolated_curve(stage: Stage, project: Project, f_hz: NDArray[np.float64]) -> Curve:
    try:
        system = assemble(stage, project)
        response = transfer(drive(system, stage.drive == "current"), f_hz)
    except (ValueError, np.linalg.LinAlgError) as error:
        return Curve(why=f"the stage cannot be solved: {error}")
    return Curve(f_hz, response)


def _chain_curves(project: Project, f_hz: NDArray[np.float64]) -> tuple[Curve, dict[str, Curve]]:
    """The chain's response and each active stage's response where it sits (engine/chain.py)."""
    engine_class = _optional("stagewise.engine.chain", "ChainEngine")
    if engine_class is None:
        why = f"the chain engine is {NOT_IN_BUILD}"
        return Curve(why=why), {stage.id: Curve(why=why) for stage in project.stages}
    try:
        result = engine_class().analyze(project, f_hz)
    except (ValueError, np.linalg.LinAlgError) as error:
        why = f"the chain cannot be solved: {error}"
        return Curve(why=why), {stage.id: Curve(why=why) for stage in project.stages}
    in_chain: dict[str, Curve] = {}
    for stage in project.stages:
        if stage.bypass or stage.id not in result.stage_ids:
            in_chain[stage.id] = Curve(why="the stage is bypassed: it is not in the chain")
            continue
        entry = result.stage(stage.id)
        if entry.in_chain is None:
            in_chain[stage.id] = Curve(why=entry.in_chain_why or "no response in chain")
        else:
            in_chain[stage.id] = Curve(f_hz, np.asarray(entry.in_chain))
    return Curve(f_hz, np.asarray(result.response)), in_chain


# Symbolic forms as display strings, keyed by stage fingerprint (what decides the stage's
# behaviour, models included): exporting and then printing, or printing again after an edit of
# one stage, recomputes only what changed. Bounded; clear_symbolic_cache() empties it.
_SYMBOLIC_CACHE: OrderedDict[str, dict[str, Any]] = OrderedDict()
_SYMBOLIC_CACHE_SIZE = 256


def clear_symbolic_cache() -> None:
    """Forget every cached symbolic form (benchmarks time the packet without it)."""
    _SYMBOLIC_CACHE.clear()


def _symbolic(stage: Stage, project: Project, formulas: dict[Any, Any] | None = None) -> dict[str, Any]:
    """The stage's symbolic form as display strings (``SymbolicForm.as_dict``), or why there is none.

    ``formulas`` is the packet's memo of derived formulas: a stage with the same topology and
    part refs as one already derived (two equal filter sections) reuses its formula.
    """
    key = stage_fingerprint(stage, project)
    if key in _SYMBOLIC_CACHE:
        _SYMBOLIC_CACHE.move_to_end(key)
        return _SYMBOLIC_CACHE[key]
    form = _optional("stagewise.engine.symbolic", "symbolic_form")
    finite_form = _optional("stagewise.engine.symbolic", "finite_gain_form")
    if form is None:
        return {"why": f"the symbolic form is {NOT_IN_BUILD}"}
    try:
        # A stage with finite op-amps: its ideal-op-amp form and the finite-gain factor with its
        # numbers, not the coefficient soup of the models' numbers (and much faster to derive).
        finite = finite_form(stage, project, formulas=formulas) if finite_form is not None else None
        if finite is not None and finite["ideal"].get("denominator"):
            found: dict[str, Any] = {"form": finite["ideal"], "finite": finite}
        else:
            result = form(stage, project, formulas=formulas)
            found = {"form": result.as_dict()} if result.ok else {"why": result.why or "no formula for this stage"}
    except (ValueError, ArithmeticError, TimeoutError) as error:
        return {"why": f"no symbolic form: {error}"}
    # A form that fell back to numbers because the clock ran out depends on the machine's load:
    # it is not kept, so the next packet tries again.
    if "took longer than" not in str(found.get("form", {}).get("why") or ""):
        _SYMBOLIC_CACHE[key] = found
        while len(_SYMBOLIC_CACHE) > _SYMBOLIC_CACHE_SIZE:
            _SYMBOLIC_CACHE.popitem(last=False)
    return found


def gather(project: Project, path_or_sha: str | os.PathLike[str],
           step: Callable[[str], bool] | None = None, analysis: Any = None) -> PacketContent | None:
    """Compute what the packet shows; ``None`` when ``step`` (called before each piece) says stop.

    ``analysis`` may be an ``engine.analysis.ProjectAnalysis`` of this very project that the
    caller already holds (the GUI's), so nothing is computed twice.
    """

    def go_on(label: str) -> bool:
        return step is None or step(label)

    sha, name, path = resolve_source(path_or_sha)
    if not go_on("analysing the project"):
        return None
    analysis, document, why = _analysis(project, path, sha, analysis)
    f_hz = frequency_grid(project.settings)
    if not go_on("computing the chain response"):
        return None
    if analysis is not None:
        chain, stage_curves = _curves_from_analysis(analysis, project)
    else:
        chain, in_chain = _chain_curves(project, f_hz)
        stage_curves = {stage.id: StageCurves(_isolated_curve(stage, project, f_hz), in_chain[stage.id])
                        for stage in project.stages}
    symbolic: dict[str, dict[str, Any]] = {}
    formulas: dict[Any, Any] = {}
    for stage in project.stages:
        if not go_on(f"stage {stage.name}"):
            return None
        if analysis is not None:
            stage_curves[stage.id].step_isolated, stage_curves[stage.id].step_in_chain = _steps(analysis, stage)
            stage_curves[stage.id].loops = _loops(analysis, stage)
        symbolic[stage.id] = _symbolic(stage, project, formulas) if not stage.is_block else {}
    return PacketContent(project, sha, name, document, why, chain, stage_curves, symbolic, analysis)
