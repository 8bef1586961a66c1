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
    """Version 0 -> 1: ``chain`` becomes ``stages``, the top-level ``drive`` moves into ``input``.

    Anything else is carried over untouched; what does not fit version 1 is left for the
    decoder to report with its path (a ``chain`` beside a ``stages``, an ``input`` that is not
    an object).
    """
    result: dict[str, Any] = {"format": FORMAT_NAME, "version": 1}
    for key, value in document.items():
        if key in ("version", "format", "drive"):
            continue
        if key == "chain" and "stages" not in document:
            result["stages"] = value
        else:
            result[key] = value
    if "drive" in document:
        section = document.get("input", {})
        if isinstance(section, dict):
            # An explicit input.drive (a file half-edited by hand) wins over the old key.
            result["input"] = {"drive": document["drive"], **section}
        else:
            result["drive"] = document["drive"]
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
