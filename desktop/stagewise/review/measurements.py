"""Attaching a bench measurement to a project: the record and its audit event, in one place.

The command line (``stagewise measure``) and the desktop program both call
:func:`attach_measurement`; saving is the caller's business (as for every recorded decision).
"""

from __future__ import annotations

import re

from stagewise.files.measurements import MeasurementData
from stagewise.model.fingerprint import measurement_fingerprint
from stagewise.model.project import Measurement, Project
from stagewise.review.audit import append_event, now_utc

__all__ = ["attach_measurement", "measurement_id_for"]


def measurement_id_for(project: Project, file_name: str) -> str:
    """An id from the data file's name (``board3.s2p`` → ``board3``), unique in the project."""
    stem = file_name.split(".")[0] or "measurement"
    base = re.sub(r"[^A-Za-z0-9_-]+", "-", stem).strip("-") or "measurement"
    taken = {item.id for item in project.measurements}
    candidate, number = base, 2
    while candidate in taken:
        candidate, number = f"{base}-{number}", number + 1
    return candidate


def attach_measurement(project: Project, data: MeasurementData, where: str, stage_id: str | None, who: str, *,
                       measurement_id: str | None = None, instrument: str = "", setup: str = "", note: str = "",
                       time: str | None = None) -> Measurement:
    """Append a measurement read from a file, and the audit event ``measurement`` that records it.

    Parameters
    ----------
    where : {"isolated", "in_chain", "chain"}
        The place measured; ``stage_id`` is None for the chain.
    who : str
        Who attaches it (not empty).

    Raises
    ------
    ValueError
        One sentence: an unknown stage, a bypassed stage in chain, an id already used, no name.
        Nothing is changed then.
    """
    if not who.strip():
        raise ValueError("a measurement needs the name of who attaches it")
    if where not in ("isolated", "in_chain", "chain"):
        raise ValueError(f'"{where}" is not a place: isolated, in_chain or chain')
    if where == "chain":
        stage_id = None
    else:
        stage = project.stage(stage_id or "")
        if stage is None:
            known = ", ".join(item.id for item in project.stages)
            raise ValueError(f'there is no stage "{stage_id}" (stages: {known})')
        if where == "in_chain" and stage.bypass:
            raise ValueError(f'stage "{stage_id}" is bypassed, so it has no place in the chain to measure')
    if measurement_id is None:
        measurement_id = measurement_id_for(project, data.file)
    elif not measurement_id.strip():
        raise ValueError("the measurement id must not be empty")
    elif any(item.id == measurement_id for item in project.measurements):
        raise ValueError(f'a measurement "{measurement_id}" is already attached; choose another id')
    stamp = time or now_utc()
    measurement = Measurement(
        id=measurement_id, kind=data.kind, where=where, stage=stage_id, file=data.file, sha256=data.sha256,
        by=who, time=stamp, fingerprint=measurement_fingerprint(project, where, stage_id), source=data.source,
        instrument=instrument, setup=setup, note=note,
    )
    if data.kind == "response":
        measurement.f_hz = [float(value) for value in data.f_hz]
        measurement.re = [float(value) for value in data.response.real]
        measurement.im = [float(value) for value in data.response.imag]
    else:
        measurement.t_s = [float(value) for value in data.t_s]
        measurement.v = [float(value) for value in data.v]
    detail = {"measurement": measurement.id, "kind": measurement.kind, "where": where, "stage": stage_id,
              "file": measurement.file, "sha256": measurement.sha256, "points": data.points,
              "fingerprint": measurement.fingerprint}
    project.measurements.append(measurement)
    try:
        append_event(project, who, "measurement", detail, time=stamp)
    except ValueError:
        project.measurements.pop()
        raise
    return measurement
