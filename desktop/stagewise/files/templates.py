"""Stage templates and the generic op-amp library shipped in ``resources/``.

A template is one JSON file in ``resources/templates/``: an object with ``name``, ``description``,
``stage`` (a stage in the project-file format, DESIGN section 5) and ``opamp_models`` (the models
its op-amps use, as in a project). The op-amp library ``resources/opamps.json`` maps each model's
name to its parameters (DESIGN 3.2). Both are read with the project codec's own readers, so a
template is exactly as strict as a project file.

:func:`instantiate_template` copies a template's stage into a project, together with the op-amp
models it uses (renamed when the project already has a different model of the same name), under
a stage id that is unique in the project. The desktop program's "add stage from template" and the
sizing assistant (:mod:`stagewise.engine.sizing`) both go through it.
"""

from __future__ import annotations

import copy
import json
import re
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import stagewise
from stagewise.files.codec import _decode_opamp, _decode_stage, _Reader, encode_opamp, encode_stage
from stagewise.model.project import IDEAL_OPAMP, PART_TYPES, OpampModel, Project, Stage
from stagewise.model.validate import validate_stage
from stagewise.model.values import Quantity, format_value

__all__ = [
    "Template",
    "TemplateError",
    "instantiate_template",
    "load_opamp_library",
    "load_template",
    "load_templates",
    "resources_path",
    "template_document",
    "template_ids",
    "value_text",
]

_TEMPLATE_KEYS = ("name", "description", "stage", "opamp_models")
MAX_RESOURCE_BYTES = 1024 * 1024


class TemplateError(ValueError):
    """A template or library file that is missing or cannot be read; the message names it."""


@dataclass(frozen=True, slots=True)
class Template:
    """One stage template.

    Attributes
    ----------
    id : str
        The file's stem (``sallen_key_lowpass``); the key the sizing assistant uses.
    name, description : str
        Shown to the user.
    stage : Stage
        The stage with its default values. Treat as read-only: :func:`instantiate_template`
        copies it.
    opamp_models : dict
        The op-amp models the stage uses, by name.
    """

    id: str
    name: str
    description: str
    stage: Stage
    opamp_models: dict[str, OpampModel]


def resources_path() -> Path:
    """The ``resources/`` folder of the source tree (next to ``desktop/``).

    Raises
    ------
    TemplateError
        When the folder is not there (for instance an installation without the resources).
    """
    folder = Path(stagewise.__file__).resolve().parents[2] / "resources"
    if not folder.is_dir():
        raise TemplateError(f"the resources folder {folder} is missing; stage templates and op-amp models "
                            f"ship with the source tree, run Stagewise from a full checkout")
    return folder


def _read_json(path: Path) -> Any:
    try:
        size = path.stat().st_size
        if size > MAX_RESOURCE_BYTES:
            raise TemplateError(f"{path}: {size} bytes is too large for a template or library file")
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError as error:
        raise TemplateError(f"{path}: no such file") from error
    except UnicodeDecodeError as error:
        raise TemplateError(f"{path}: not UTF-8 text") from error
    except OSError as error:
        raise TemplateError(f"{path}: cannot be read ({error.strerror})") from error
    try:
        return json.loads(text)
    except json.JSONDecodeError as error:
        raise TemplateError(f"{path}: not valid JSON at line {error.lineno}, column {error.colno}: "
                            f"{error.msg}") from error


def _read_models(reader: _Reader, data: object) -> dict[str, OpampModel]:
    models: dict[str, OpampModel] = {}
    if not isinstance(data, dict):
        reader.problem("expected an object mapping model names to parameters")
        return models
    for name, parameters in data.items():
        with reader.at(name):
            if name == IDEAL_OPAMP:
                reader.problem(f'"{IDEAL_OPAMP}" is reserved for the ideal op-amp')
                continue
            model = _decode_opamp(reader, parameters)
            if model is not None:
                models[name] = model
    return models


def load_opamp_library(path: Path | None = None) -> dict[str, OpampModel]:
    """The generic op-amp models of ``resources/opamps.json``, by name.

    Raises
    ------
    TemplateError
        The file is missing or a model does not decode (every problem named).
    """
    path = path or resources_path() / "opamps.json"
    reader = _Reader()
    models = _read_models(reader, _read_json(path))
    if reader.problems:
        raise TemplateError(f"{path}: " + "; ".join(reader.problems))
    return models


def template_ids(folder: Path | None = None) -> list[str]:
    """The ids (file stems) of every template, sorted."""
    folder = folder or resources_path() / "templates"
    return sorted(path.name.removesuffix(".json") for path in folder.glob("*.json"))


def load_template(template_id: str, folder: Path | None = None) -> Template:
    """Read and validate one template.

    Raises
    ------
    TemplateError
        Unknown id, unreadable file, or a stage that does not decode or validate; the message
        names the file and every problem with its JSON path.
    """
    folder = folder or resources_path() / "templates"
    if not re.fullmatch(r"[A-Za-z0-9_\-]+", template_id):
        raise TemplateError(f'"{template_id}" is not a template id')
    path = folder / f"{template_id}.json"
    if not path.is_file():
        raise TemplateError(f'"{template_id}" is not a stage template; available: {", ".join(template_ids(folder))}')
    document = _read_json(path)
    reader = _Reader()
    fields = reader.object(document, _TEMPLATE_KEYS, _TEMPLATE_KEYS)
    if fields is None or reader.problems:
        raise TemplateError(f"{path}: " + "; ".join(reader.problems))
    name = fields["name"]
    description = fields["description"]
    for key, value in (("name", name), ("description", description)):
        if not isinstance(value, str) or not value.strip():
            with reader.at(key):
                reader.problem("expected non-empty text")
    with reader.at("opamp_models"):
        models = _read_models(reader, fields["opamp_models"])
    with reader.at("stage"):
        stage = _decode_stage(reader, fields["stage"])
    if reader.problems or stage is None:
        raise TemplateError(f"{path}: " + "; ".join(reader.problems))
    probe = Project(title="template check", opamp_models=dict(models), stages=[stage])
    problems = validate_stage(stage, probe, "stage")
    used = {part.model for part in stage.parts if part.type == "opamp" and part.model != IDEAL_OPAMP}
    problems += [f'opamp_models: "{unused}" is not used by the stage' for unused in sorted(set(models) - used)]
    if problems:
        raise TemplateError(f"{path}: " + "; ".join(problems))
    return Template(id=template_id, name=str(name), description=str(description), stage=stage, opamp_models=models)


def load_templates(folder: Path | None = None) -> dict[str, Template]:
    """Every template, by id (sorted). Raises :class:`TemplateError` on the first bad file."""
    return {template_id: load_template(template_id, folder) for template_id in template_ids(folder)}


def value_text(value_si: float) -> str:
    """A value as compact engineering text that parses back (``4.99k``, ``2.2n``, ``100``)."""
    return format_value(value_si, digits=4).replace(" ", "").replace("µ", "u")


def _unique(candidate: str, taken: set[str]) -> str:
    if candidate not in taken:
        return candidate
    number = 2
    while f"{candidate}-{number}" in taken:
        number += 1
    return f"{candidate}-{number}"


def instantiate_template(
    project: Project,
    template: Template,
    stage_id: str | None = None,
    name: str | None = None,
    values: Mapping[str, float] | None = None,
) -> Stage:
    """Append a copy of ``template``'s stage to ``project`` and return it.

    The op-amp models the stage uses are copied into ``project.opamp_models``: a model already
    present with identical parameters is shared, a different model of the same name is added as
    ``"NAME (2)"`` (and the copied parts renamed to match), so the project stays self-contained.

    Parameters
    ----------
    project : Project
        Changed in place: one stage appended, op-amp models added when needed.
    template : Template
        From :func:`load_template`; not changed.
    stage_id : str, optional
        The new stage's id; the template id by default. Made unique with ``-2``, ``-3``...
    name : str, optional
        The new stage's name; the template's name by default.
    values : mapping of str to float, optional
        Part values in SI units by ref (for instance ``SizedStage.values_si()``), replacing the
        template's defaults; written as engineering text with 4 significant digits (preferred
        values are exact). Every ref must be a valued part of the template.

    Raises
    ------
    TemplateError
        A ref in ``values`` that the template does not have, or a value that is not positive.
    """
    stage = copy.deepcopy(template.stage)
    for ref, value_si in (values or {}).items():
        part = stage.part(ref)
        if part is None or part.type == "opamp":
            raise TemplateError(f'template "{template.id}" has no valued part "{ref}"')
        if part.type in ("R", "C", "L") and not value_si > 0:
            unit = PART_TYPES[part.type][2]
            raise TemplateError(f"{ref}: {format_value(value_si, unit)} must be greater than zero")
        part.value = Quantity.of(value_text(value_si))
    renames: dict[str, str] = {}
    for model_name, model in template.opamp_models.items():
        wanted = encode_opamp(model)
        target, number = model_name, 1
        # Walk "NAME", "NAME (2)", "NAME (3)"...: share an identical model, else take a free name.
        while target in project.opamp_models and encode_opamp(project.opamp_models[target]) != wanted:
            number += 1
            target = f"{model_name} ({number})"
        if target not in project.opamp_models:
            project.opamp_models[target] = copy.deepcopy(model)
        if target != model_name:
            renames[model_name] = target
    for part in stage.parts:
        if part.model in renames:
            part.model = renames[part.model]
    stage.id = _unique(stage_id or template.id, {other.id for other in project.stages})
    stage.name = name or template.name
    project.stages.append(stage)
    return stage


def template_document(template: Template) -> dict[str, Any]:
    """A template as a JSON-ready dict (for writing a user's own template next to the shipped ones)."""
    return {
        "name": template.name,
        "description": template.description,
        "stage": encode_stage(template.stage),
        "opamp_models": {name: encode_opamp(model) for name, model in template.opamp_models.items()},
    }
