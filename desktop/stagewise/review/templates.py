"""Check templates: checklists a new stage can start from (``resources/checks/*.json``).

Each file is a JSON list of checks in the project format (DESIGN section 5), named after the
kind of stage it suits (``amplifier``, ``filter``, ``sensor_interface``, ``converter_driver``), or
``bench`` (checks of a bench measurement against the prediction: the "measured within the predicted
spread" check).
Numeric checks in templates carry only limits that hold for most designs (phase margin, loading
error, headroom); limits that belong to one design (gain, corner frequency, settling time)
appear as manual questions reminding the reviewer to add them.

The resources folder is looked up in this order: the ``STAGEWISE_RESOURCES`` environment
variable, ``resources/`` next to ``desktop/`` in a source checkout, then
``<prefix>/share/stagewise/resources`` of an installation.
"""

from __future__ import annotations

import json
import os
import sys
from pathlib import Path
from typing import Any, Final

from stagewise.files.codec import ProjectFileError, decode
from stagewise.model.project import FORMAT_NAME, FORMAT_VERSION, Check
from stagewise.review.metrics import METRICS, WHERE_VALUES

__all__ = ["CheckTemplateError", "check_templates", "check_templates_folder"]

MAX_TEMPLATE_BYTES: Final = 1024 * 1024


class CheckTemplateError(ValueError):
    """A check template that cannot be read; the message names the file and the problem."""


def check_templates_folder() -> Path:
    """The folder holding the check templates.

    Raises
    ------
    CheckTemplateError
        No candidate folder exists.
    """
    candidates: list[Path] = []
    override = os.environ.get("STAGEWISE_RESOURCES")
    if override:
        candidates.append(Path(override) / "checks")
    # desktop/stagewise/review/templates.py -> the checkout's root is three folders above the package.
    candidates.append(Path(__file__).resolve().parents[3] / "resources" / "checks")
    candidates.append(Path(sys.prefix) / "share" / "stagewise" / "resources" / "checks")
    for folder in candidates:
        if folder.is_dir():
            return folder
    tried = ", ".join(str(folder) for folder in candidates)
    raise CheckTemplateError(f"no check templates folder found (looked in {tried})")


def _read(path: Path) -> Any:
    try:
        if path.stat().st_size > MAX_TEMPLATE_BYTES:
            raise CheckTemplateError(f"{path}: too large for a check template")
        return json.loads(path.read_text(encoding="utf-8"))
    except UnicodeDecodeError as error:
        raise CheckTemplateError(f"{path}: not UTF-8 text") from error
    except json.JSONDecodeError as error:
        raise CheckTemplateError(f"{path}: not valid JSON at line {error.lineno}, column {error.colno}") from error
    except OSError as error:
        raise CheckTemplateError(f"{path}: cannot be read ({error.strerror})") from error


def _checks_from(path: Path, data: Any) -> list[Check]:
    if not isinstance(data, list):
        raise CheckTemplateError(f"{path}: a check template is a JSON list of checks")
    # Decode through the project reader, so templates obey exactly the project file's rules.
    document = {"format": FORMAT_NAME, "version": FORMAT_VERSION, "title": path.stem,
                "stages": [{"id": "template", "name": path.stem, "checks": data}]}
    try:
        project = decode(document, str(path))
    except ProjectFileError as error:
        raise CheckTemplateError(str(error).replace("stages[0].", "")) from error
    checks = project.stages[0].checks
    problems: list[str] = []
    seen: set[str] = set()
    for index, check in enumerate(checks):
        where = f"{path}: checks[{index}]"
        if check.id in seen:
            problems.append(f'{where}.id: "{check.id}" is used twice')
        seen.add(check.id)
        if check.metric is None:
            continue
        entry = METRICS.get(check.metric)
        if entry is None:
            problems.append(f'{where}.metric: "{check.metric}" is not a metric Stagewise computes')
            continue
        if check.where not in entry.where or check.where not in WHERE_VALUES:
            problems.append(f'{where}.where: {entry.label.lower()} is not taken "{check.where}"')
        if entry.needs_hz and check.at_hz is None:
            problems.append(f"{where}.at_hz: {entry.label.lower()} needs a frequency")
        if check.min is None and check.max is None:
            problems.append(f"{where}: a numeric check needs min, max or both")
    if problems:
        raise CheckTemplateError("; ".join(problems))
    return checks


def check_templates(folder: Path | None = None) -> dict[str, list[Check]]:
    """Every check template, keyed by its file name without ``.json``, in name order.

    Each call returns fresh :class:`Check` objects, so a caller may add them to a stage as
    they are.

    Raises
    ------
    CheckTemplateError
        The folder is missing or a template is malformed; the message names the file.
    """
    folder = check_templates_folder() if folder is None else folder
    return {path.stem: _checks_from(path, _read(path)) for path in sorted(folder.glob("*.json"))}
