"""Stage fingerprints: SHA-256 of the canonical JSON of what decides a stage's behaviour.

Parts (type, nodes, values by what they mean, tolerances, control, model), ports, drive, the
parameters of the op-amp models the stage uses, and the limits of its numeric checks. Not
names, notes, comments, manual answers or waivers, not the order parts and checks are listed in,
and not how a value was typed: ``"4k7"`` and ``4700`` are the same resistor. Sign-offs store this fingerprint and are shown out of date when it changes;
the engine keys its caches on it.
"""

from __future__ import annotations

import hashlib
import json
from typing import Any

from stagewise.model.project import IDEAL_OPAMP, OpampModel, Part, Project, Stage
from stagewise.model.values import Quantity

__all__ = ["behaviour_document", "measurement_fingerprint", "stage_fingerprint"]


def _si(quantity: Quantity | tuple[Quantity, Quantity] | None) -> Any:
    if quantity is None:
        return None
    if isinstance(quantity, tuple):
        return [quantity[0].si, quantity[1].si]
    return quantity.si


_MODEL_FIELDS = ("a0_db", "gbw_hz", "p2_hz", "rout_ohm", "rin_ohm", "cin_diff_f", "cin_cm_f", "en_v_rthz",
                 "en_corner_hz", "in_a_rthz", "in_corner_hz", "swing_v", "slew_v_per_s")


# DC budget parameters: in the document only where given, so that adding them to the format
# left every earlier fingerprint (and the sign-offs bound to it) as it was.
_DC_MODEL_FIELDS = ("vos_v", "vos_drift_v_per_c", "ib_a", "ios_a", "cmrr_db", "psrr_db")


def _model_document(model: OpampModel) -> dict[str, Any]:
    document = {name: _si(getattr(model, name)) for name in _MODEL_FIELDS}
    for name in _DC_MODEL_FIELDS:
        if getattr(model, name) is not None:
            document[name] = _si(getattr(model, name))
    if model.input_type is not None:
        document["input_type"] = model.input_type
    return document


def _part_document(part: Part) -> dict[str, Any]:
    document = {"ref": part.ref, "type": part.type, "nodes": list(part.nodes), "value": _si(part.value),
                "tol": _si(part.tol), "control": part.control, "model": part.model}
    if part.tc_ppm_per_c is not None:
        document["tc_ppm_per_c"] = _si(part.tc_ppm_per_c)
    return document


def behaviour_document(stage: Stage, project: Project | None) -> dict[str, Any]:
    """What decides a stage's behaviour, as plain JSON data in SI values."""
    document: dict[str, Any] = {"kind": stage.kind, "drive": stage.drive}
    if stage.is_block:
        document["block"] = {
            "gain": _si(stage.gain),
            "zeros_hz": [_si(root) for root in stage.zeros_hz],
            "poles_hz": [_si(root) for root in stage.poles_hz],
            "zin": [_si(stage.zin_r_ohm), _si(stage.zin_c_f)],
            "zout_ohm": _si(stage.zout_ohm),
        }
        for key in ("offset_v", "gain_error"):
            if getattr(stage, key) is not None:
                document["block"][key] = _si(getattr(stage, key))
    else:
        document["ports"] = [stage.ports.get("in"), stage.ports.get("out")]
        # Sorted by ref: the order parts are listed in does not change the circuit.
        document["parts"] = [_part_document(part) for part in sorted(stage.parts, key=lambda item: item.ref)]
        if project is not None:
            used = sorted({part.model for part in stage.parts
                           if part.type == "opamp" and part.model not in (None, IDEAL_OPAMP)})
            document["opamp_models"] = {
                name: _model_document(project.opamp_models[name]) for name in used if name in project.opamp_models
            }
    document["checks"] = [
        {"id": check.id, "metric": check.metric, "where": check.where, "at_hz": _si(check.at_hz),
         "min": _si(check.min), "max": _si(check.max)}
        for check in sorted(stage.checks, key=lambda item: item.id)
        if check.metric is not None
    ]
    return document


def stage_fingerprint(stage: Stage, project: Project | None) -> str:
    """SHA-256 (hex) of the canonical JSON (sorted keys, no spaces) of :func:`behaviour_document`."""
    text = json.dumps(behaviour_document(stage, project), sort_keys=True, separators=(",", ":"), ensure_ascii=False)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


_SMALL_SIGNAL_PART_KEYS = ("ref", "type", "nodes", "value", "tol", "control", "model")
_SMALL_SIGNAL_BLOCK_KEYS = ("gain", "zeros_hz", "poles_hz", "zin", "zout_ohm")


def measurement_fingerprint(project: Project, where: str, stage_id: str | None) -> str:
    """SHA-256 (hex) of what a measured response depends on, in the canonical JSON of
    :func:`stage_fingerprint` but without check limits (a new limit does not change the board)
    and without the DC-only keys (offsets, drifts, temperature coefficients).

    ``isolated``: the stage alone. ``in_chain``: the stage and every active stage after it, and
    the load (V_out/V_in where it sits does not depend on what drives it). ``chain``: the drive
    and every active stage, and the load.

    Raises
    ------
    ValueError
        ``stage_id`` names no stage (for ``isolated`` and ``in_chain``).
    """
    def circuit(stage: Stage) -> dict[str, Any]:
        # The small-signal response and its tolerances only: DC-only keys (offsets, drifts,
        # tempcos) and check limits do not change what a frequency response or step measures.
        document = behaviour_document(stage, project)
        document.pop("checks", None)
        if "block" in document:
            document["block"] = {key: document["block"][key] for key in _SMALL_SIGNAL_BLOCK_KEYS}
        document["parts"] = [{key: part[key] for key in _SMALL_SIGNAL_PART_KEYS} for part in document.get("parts", [])]
        document["opamp_models"] = {name: {key: model[key] for key in _MODEL_FIELDS}
                                    for name, model in document.get("opamp_models", {}).items()}
        return document

    def load() -> list[Any]:
        return [_si(project.load.r_ohm), _si(project.load.c_f)]

    if where == "chain":
        document: dict[str, Any] = {"drive": project.input.drive, "load": load(),
                                    "stages": [circuit(stage) for stage in project.active_stages]}
    else:
        stage = project.stage(stage_id or "")
        if stage is None:
            raise ValueError(f'there is no stage "{stage_id}"')
        if where == "isolated":
            document = {"stages": [circuit(stage)]}
        else:
            active = project.active_stages
            ids = [item.id for item in active]
            rest = active[ids.index(stage.id):] if stage.id in ids else [stage]
            document = {"load": load(), "stages": [circuit(item) for item in rest]}
    text = json.dumps(document, sort_keys=True, separators=(",", ":"), ensure_ascii=False)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()
