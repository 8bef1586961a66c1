"""The isolated analysis of one stage: response, poles, zeros and gain constant.

A stage is driven at its input port by an ideal voltage source (response in V/V) or, where the
stage says ``"drive": "current"``, by an ideal current source (response in Ω, a
transimpedance); its output port is unloaded (DESIGN 3.3). Nothing here raises for a stage that
cannot be solved: the analysis carries ``why`` instead, and its numeric fields are ``None``.

Public API
----------
``analyze_stage(stage, project, f_hz=None) -> StageAnalysis``
    The whole isolated analysis; ``f_hz`` defaults to the project's frequency grid.
``analyze_system(driven, f_hz, unit="V/V", label="") -> StageAnalysis``
    The same for any driven pencil (the merged chain uses it).
``response_at(analysis, f_hz) -> ndarray``
    The exact response at any frequencies (an extra batched solve, not interpolation).
``stage_response(stage, project, f_hz) -> ndarray``
    The isolated response only (no poles or zeros): assembly and one batched solve; the
    fastest path for plots. Raises :class:`~stagewise.engine.mna.CircuitError` or
    ``numpy.linalg.LinAlgError``; use ``analyze_stage`` for reasons instead of exceptions.
``isolated_system(stage, project) -> DrivenSystem``
    The assembled and driven pencil (raises :class:`~stagewise.engine.mna.CircuitError`).

The stage engine, module by module
----------------------------------
``engine.mna``          assemble(stage, project) -> StageSystem (G, C, unknown names, op-amp states)
``engine.sweep``        drive(system, current) -> DrivenSystem; frequency_grid(settings); transfer
``engine.stage``        analyze_stage, analyze_system, response_at, stage_response (this module)
``engine.poles``        pole_zero_model(g, c, b, output) -> PoleZeroModel; root_table(roots)
``engine.metrics``      stage_metrics(analysis, settings) -> dict ("M" of DESIGN 6);
                        metric_at(analysis, name, at_hz, settings); frequency_response(_at); bandwidth
``engine.timeresp``     step_response(model) -> StepResponse; impulse_response(model);
                        step_response_of_pencil(g, c, b, output, model) (poles and residues only)
``engine.symbolic``     symbolic_form(stage, project, time_limit_s=5.0) -> SymbolicForm (.as_dict())
``engine.diagnostics``  diagnose(system, current_drive) -> Diagnosis | None

Results are frozen dataclasses holding numpy arrays; nothing is cached here. A caller that
wants to recompute only edited stages keys its cache on ``StageAnalysis.fingerprint``
(the stage fingerprint of DESIGN 4, which covers parts, ports and the op-amp models used).

Example
-------
>>> analysis = analyze_stage(project.stages[0], project)        # doctest: +SKIP
>>> analysis.ok, analysis.unit, analysis.poles_rad_s            # doctest: +SKIP
(True, 'V/V', array([-6283.18...+0.j]))
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from stagewise.engine.diagnostics import diagnose
from stagewise.engine.mna import CircuitError, StageSystem, assemble
from stagewise.engine.poles import (
    PoleZeroModel,
    SingularPencilError,
    pole_zero_model,
    poles_only_model,
    transfer_at,
)
from stagewise.engine.sweep import DrivenSystem, drive, frequency_grid
from stagewise.model.project import Project, Stage

__all__ = [
    "MODEL_MAX_UNKNOWNS",
    "StageAnalysis",
    "analyze_stage",
    "analyze_system",
    "isolated_system",
    "response_at",
    "size_limit_why",
    "stage_response",
]

TWO_PI = 2.0 * math.pi
# Above this many unknowns a system's zeros (a QZ of the (n + 1) Rosenbrock pencil) and step
# response (O(n³ + n²·T)) are not computed, with the reason stated. Far above every demo and a
# 100-section ladder (102 unknowns); a merged 40-stage buffered chain has 121. Every stage of a
# chain has a from-input and an in-chain place as large as (the rest of) the chain, so without a
# limit the whole analysis grows with the fourth power of the chain's length (DEVELOPERS.md, cost
# table).
MODEL_MAX_UNKNOWNS = 120
VOLTAGE_UNIT = "V/V"
CURRENT_UNIT = "Ω"


@dataclass(frozen=True, slots=True)
class StageAnalysis:
    """The isolated analysis of a stage (or of any driven pencil).

    Attributes
    ----------
    f_hz : ndarray
        Analysis frequencies in hertz.
    response : ndarray of complex or None
        Output over input at ``f_hz`` (V/V, or Ω for a current drive); ``None`` when ``why``.
    unit : str
        ``"V/V"`` or ``"Ω"``.
    poles_rad_s, zeros_rad_s : ndarray of complex or None
        Roots of the minimal model (cancelled pairs removed), s in rad/s. The poles are exact;
        the zeros pass a check against the exact solve (``model.fit_error`` below
        ``poles.FIT_TOLERANCE``) except in deep chains, where ``stage_metrics`` reports them as
        ill-conditioned instead of showing them.
    gain_constant : float or None
        K in H(s) = K·∏(s − z)/∏(s − p).
    cancelled : tuple of (pole, zero)
        Pairs removed as cancelling, rad/s.
    why : str or None
        Why the stage could not be analysed; ``None`` when it was.
    label : str
        The stage id (or what the caller named the system).
    driven : DrivenSystem or None
        The driven pencil, for exact evaluations at other frequencies.
    model : PoleZeroModel or None
        The minimal pole/zero model (time responses use it).
    fingerprint : str
        The stage fingerprint it was computed from ("" for other systems); a cache key.
    model_why : str or None
        Why ``model`` is None although the response is known: the system has more unknowns than
        ``MODEL_MAX_UNKNOWNS``, so its zeros, gain constant and step response are not computed
        (the sentence says so, with the sizes). ``None`` when the model was computed.
    poles_model : PoleZeroModel or None
        With ``model_why``: the system's poles alone (``poles.poles_only_model``), when they are
        known (the whole chain, and every stage seen from its input, which shares the chain's
        pencil); the pass-band reference and the corner search read the roots' range from it.
        ``None`` when the poles are not computed either (a stage in chain above the limit).
    """

    f_hz: NDArray[np.float64]
    response: NDArray[np.complex128] | None
    unit: str
    poles_rad_s: NDArray[np.complex128] | None
    zeros_rad_s: NDArray[np.complex128] | None
    gain_constant: float | None
    cancelled: tuple[tuple[complex, complex], ...] = ()
    why: str | None = None
    label: str = ""
    driven: DrivenSystem | None = None
    model: PoleZeroModel | None = None
    fingerprint: str = ""
    model_why: str | None = None
    poles_model: PoleZeroModel | None = None

    @property
    def ok(self) -> bool:
        """True when the analysis has values (``why`` is ``None``)."""
        return self.why is None

    @property
    def roots_model(self) -> PoleZeroModel | None:
        """``model``, or above the size limit ``poles_model`` (the poles alone), else ``None``:
        what the pass-band reference, the corner search and the end slopes read the roots from."""
        return self.model if self.model is not None else self.poles_model


def _failed(f_hz: NDArray[np.float64], unit: str, why: str, label: str, fingerprint: str = "",
            driven: DrivenSystem | None = None) -> StageAnalysis:
    return StageAnalysis(f_hz=f_hz, response=None, unit=unit, poles_rad_s=None, zeros_rad_s=None,
                         gain_constant=None, why=why, label=label, driven=driven, fingerprint=fingerprint)


def isolated_system(stage: Stage, project: Project) -> DrivenSystem:
    """The stage's pencil with its isolated drive attached (output unloaded).

    Raises
    ------
    CircuitError
        A part the engine cannot stamp (named in the message).
    """
    system = assemble(stage, project)
    return drive(system, stage.drive == "current")


def analyze_system(
    driven: DrivenSystem,
    f_hz: NDArray[np.float64],
    unit: str = VOLTAGE_UNIT,
    label: str = "",
    fingerprint: str = "",
    poles: NDArray[np.complex128] | None = None,
    *,
    response: NDArray[np.complex128] | None = None,
    max_unknowns: int = MODEL_MAX_UNKNOWNS,
    find_poles: bool = True,
) -> StageAnalysis:
    """Sweep a driven pencil and compute its minimal pole/zero model.

    Parameters
    ----------
    driven : DrivenSystem
        ``(G + sC)·x = b·u``, ``y = x[output]``.
    f_hz : ndarray
        Frequencies in hertz (one batched solve).
    unit : str
        Unit of the response, for display.
    label : str
        Name carried into messages and results.
    poles : ndarray of complex, optional
        The pencil's finite poles when already known (the same G and C read at another output).
    response : ndarray of complex, optional
        The exact response on ``f_hz`` when the caller already has it (a shared sweep).
    max_unknowns : int
        Above this many unknowns the zeros, gain constant and step response are not computed:
        ``model`` is None and ``model_why`` says why; the poles are still computed when
        ``find_poles`` (else they are None too, and so is the stability they decide).
    find_poles : bool
        Whether to compute the poles of a system above ``max_unknowns`` (they cost O(n³)).

    Returns
    -------
    StageAnalysis
        With ``why`` set (and no values) when the pencil is singular or the output does not
        respond; never raises for those.
    """
    f_hz = np.asarray(f_hz, dtype=float)
    size = int(driven.g.shape[0])
    if size > max_unknowns:
        return _analyze_large(driven, f_hz, unit, label, fingerprint, poles, response, max_unknowns, find_poles)
    try:
        model = pole_zero_model(driven.g, driven.c, driven.b, driven.output, poles=poles)
    except SingularPencilError as error:
        return _failed(f_hz, unit, str(error), label, fingerprint, driven)
    except (np.linalg.LinAlgError, ArithmeticError) as error:
        return _failed(f_hz, unit, f"the poles and zeros could not be computed ({error})", label, fingerprint, driven)
    if response is None:
        swept = _sweep(driven, f_hz, model.poles_rad_s)
        if isinstance(swept, str):
            return _failed(f_hz, unit, swept, label, fingerprint, driven)
        response = swept
    return StageAnalysis(
        f_hz=f_hz,
        response=response,
        unit=unit,
        poles_rad_s=model.poles_rad_s,
        zeros_rad_s=model.zeros_rad_s,
        gain_constant=model.gain,
        cancelled=model.cancelled,
        label=label,
        driven=driven,
        model=model,
        fingerprint=fingerprint,
    )


def _sweep(driven: DrivenSystem, f_hz: NDArray[np.float64],
           poles: NDArray[np.complex128] | None) -> NDArray[np.complex128] | str:
    """The exact response on ``f_hz``, or why it is infinite there (naming a pole on the jω axis)."""
    try:
        return transfer_at(driven.g, driven.c, driven.b, driven.output, 1j * TWO_PI * f_hz)
    except np.linalg.LinAlgError:
        on_axis = [p for p in (() if poles is None else poles) if p.real == 0]
        where = f" (a pole at {abs(on_axis[0]) / TWO_PI:.6g} Hz on the jω axis)" if on_axis else ""
        return f"the response is infinite at an analysis frequency{where}"


def size_limit_why(size: int, max_unknowns: int = MODEL_MAX_UNKNOWNS, poles: bool = False) -> str:
    """The sentence beside a value not computed because the system is above the size limit.

    ``poles``: the poles are not computed either, so the stability is not decided and no
    response figure is given.
    """
    if poles:
        return (f"not computed: the system has {size} unknowns, above the {max_unknowns} of the pole, zero and "
                "step-response analysis, so its stability is not decided and no response figure is given (their "
                "cost grows with the cube of the size; see the cost table in DEVELOPERS.md)")
    return (f"not computed: the system has {size} unknowns, above the {max_unknowns} of the zero and "
            "step-response analysis (their cost grows with the cube of the size; see the cost table in "
            "DEVELOPERS.md)")


def _analyze_large(driven: DrivenSystem, f_hz: NDArray[np.float64], unit: str, label: str, fingerprint: str,
                   poles: NDArray[np.complex128] | None, response: NDArray[np.complex128] | None,
                   max_unknowns: int, find_poles: bool) -> StageAnalysis:
    """A system above the size limit: the exact response, and the poles when known or asked for."""
    size = int(driven.g.shape[0])
    model = None
    if poles is not None or find_poles:
        try:
            model = poles_only_model(driven.g, driven.c, poles)
        except SingularPencilError as error:
            return _failed(f_hz, unit, str(error), label, fingerprint, driven)
        except (np.linalg.LinAlgError, ArithmeticError) as error:
            return _failed(f_hz, unit, f"the poles could not be computed ({error})", label, fingerprint, driven)
    if response is None:
        swept = _sweep(driven, f_hz, None if model is None else model.poles_rad_s)
        if isinstance(swept, str):
            return _failed(f_hz, unit, swept, label, fingerprint, driven)
        response = swept
    if not np.any(np.abs(response) > 0):
        return _failed(f_hz, unit, "the output does not respond to the input (the response is zero at every "
                       "analysed frequency)", label, fingerprint, driven)
    return StageAnalysis(
        f_hz=f_hz,
        response=response,
        unit=unit,
        poles_rad_s=None if model is None else model.poles_rad_s,
        zeros_rad_s=None,
        gain_constant=None,
        label=label,
        driven=driven,
        fingerprint=fingerprint,
        model_why=size_limit_why(size, max_unknowns, poles=model is None),
        poles_model=model,
    )


def analyze_stage(stage: Stage, project: Project, f_hz: NDArray[np.float64] | None = None, *,
                  max_unknowns: int = MODEL_MAX_UNKNOWNS) -> StageAnalysis:
    """The isolated analysis of ``stage`` (DESIGN 3.3).

    Parameters
    ----------
    stage : Stage
        A circuit or block stage of ``project``.
    project : Project
        Supplies op-amp models and the frequency grid.
    f_hz : ndarray, optional
        Frequencies in hertz; default: ``frequency_grid(project.settings)``.
    max_unknowns : int
        The size limit of the zero and step-response analysis (see :func:`analyze_system`).

    Returns
    -------
    StageAnalysis
        ``why`` names the node or part when the stage cannot be solved (floating node, loop of
        voltage-defined branches, ideal op-amp without feedback, input held by a virtual ground).
    """
    grid = frequency_grid(project.settings) if f_hz is None else np.asarray(f_hz, dtype=float)
    current = stage.drive == "current"
    unit = CURRENT_UNIT if current else VOLTAGE_UNIT
    try:
        system: StageSystem = assemble(stage, project)
    except CircuitError as error:
        return _failed(grid, unit, f'stage "{stage.id}": {error}', stage.id)
    except (ArithmeticError, ValueError) as error:  # a value the validation let through
        return _failed(grid, unit, f'stage "{stage.id}" cannot be assembled: {error}', stage.id)
    try:
        diagnosis = diagnose(system, current)
    except np.linalg.LinAlgError as error:
        return _failed(grid, unit, f'stage "{stage.id}": its matrix could not be examined ({error})', stage.id,
                       system.fingerprint)
    if diagnosis is not None:
        return _failed(grid, unit, f'stage "{stage.id}": {diagnosis.why}', stage.id, system.fingerprint)
    analysis = analyze_system(drive(system, current), grid, unit, stage.id, system.fingerprint,
                              max_unknowns=max_unknowns)
    if analysis.why is not None:
        return _failed(grid, unit, f'stage "{stage.id}": {analysis.why}', stage.id, system.fingerprint,
                       analysis.driven)
    return analysis


def response_at(analysis: StageAnalysis, f_hz: NDArray[np.float64] | float) -> NDArray[np.complex128]:
    """The exact response at ``f_hz`` (hertz) by a fresh batched solve, not by interpolation.

    Raises
    ------
    ValueError
        When the analysis has no driven system (it failed: see ``analysis.why``).
    """
    if analysis.driven is None or analysis.why is not None:
        raise ValueError(analysis.why or "the analysis has no system to evaluate")
    driven = analysis.driven
    points = 1j * TWO_PI * np.atleast_1d(np.asarray(f_hz, dtype=float))
    return transfer_at(driven.g, driven.c, driven.b, driven.output, points)


def stage_response(stage: Stage, project: Project, f_hz: NDArray[np.float64]) -> NDArray[np.complex128]:
    """The isolated response of ``stage`` at ``f_hz`` (hertz): V/V, or Ω for a current drive.

    Assembly, drive and one batched solve; no pole/zero work and no diagnosis.

    Raises
    ------
    CircuitError
        A part the engine cannot stamp.
    numpy.linalg.LinAlgError
        When the stage's matrix is singular (see :func:`analyze_stage` for the reason).
    """
    driven = isolated_system(stage, project)
    points = 1j * TWO_PI * np.asarray(f_hz, dtype=float)
    return transfer_at(driven.g, driven.c, driven.b, driven.output, points)
