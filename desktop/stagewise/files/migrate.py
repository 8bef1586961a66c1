"""Migration of older project-file versions to the current one.

Each step takes a document of version N and returns one of version N + 1, touching nothing in
place. A newer version than this program reads is refused with a message that says so.

Version 0 (the pre-release format) differed from version 1 in three ways: the chain's drive
was a top-level ``"drive"`` string (now ``input.drive``), stages were under ``"chain"`` (now
``"stages"``), and ``"format"`` was absent.
"""

from __future__ import annotations

import copy
from typing import Any

from stagewise.files.codec import ProjectFileError
from stagewise.model.project import FORMAT_NAME, FORMAT_VERSION

__all__ = ["migrate"]


def _from_version_0(document: dict[str, Any]) -> dict[str, Any]:
    result: dict[str, Any] = {"format": FORMAT_NAME, "version": 1}
    for key, value in document.items():
        if key in ("version", "format"):
            continue
        if key == "chain":
            result["stages"] = value
        elif key == "drive":
            result.setdefault("input", {})["drive"] = value
        elif key == "input" and isinstance(value, dict):
            result.setdefault("input", {}).update(value)
        else:
            result[key] = value
    return result


_STEPS = {0: _from_version_0}


def migrate(document: Any, source: str = "") -> Any:
    """Bring ``document`` to the current format version.

    Documents that are not objects, or carry no usable ``version``, are passed on unchanged so
    that the decoder reports the problem with its path.
    """
    if not isinstance(document, dict):
        return document
    version = document.get("version")
    if isinstance(version, bool) or not isinstance(version, int):
        return document
    if version > FORMAT_VERSION:
        raise ProjectFileError(
            [f"version: the file is format version {version}, newer than this program reads "
             f"(version {FORMAT_VERSION}); open it with a newer Stagewise"],
            source,
        )
    if version < 0:
        return document
    migrated = copy.deepcopy(document)
    while migrated["version"] < FORMAT_VERSION:
        migrated = _STEPS[migrated["version"]](migrated)
    return migrated
