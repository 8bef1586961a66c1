"""Reading and writing project files (``NAME.stagewise.json``).

Loading reads the bytes, refuses oversized files, parses JSON, migrates older format versions,
decodes and validates, and reports every problem with its JSON path. Nothing is written while
loading. Saving is atomic: a temporary file in the same folder, flushed and fsynced, then
renamed over the target, with the previous version kept as ``NAME.stagewise.json.bak``.
"""

from __future__ import annotations

import hashlib
import json
import os
import tempfile
from pathlib import Path
from typing import Any

from stagewise.files.codec import ProjectFileError, decode, dumps
from stagewise.files.migrate import migrate
from stagewise.model.project import FORMAT_VERSION, Project
from stagewise.model.validate import validate
from stagewise.review.metrics import register_known_metrics

__all__ = ["MAX_FILE_BYTES", "ProjectFileError", "file_sha256", "load_project", "loads_project", "save_project"]

MAX_FILE_BYTES = 20 * 1024 * 1024
SUFFIX = ".stagewise.json"


def file_sha256(path: str | os.PathLike[str]) -> str:
    """SHA-256 (hex) of a file's bytes, as printed on packets and by ``analyze``."""
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def loads_project(text: str | bytes, source: str = "") -> Project:
    """Parse, migrate, decode and validate a project document given as text.

    Raises
    ------
    ProjectFileError
        With every problem found, each naming its JSON path.
    """
    if isinstance(text, bytes):
        try:
            text = text.decode("utf-8")
        except UnicodeDecodeError as error:
            raise ProjectFileError([f"the file is not UTF-8 text (byte {error.start})"], source) from error
    try:
        document: Any = json.loads(text, parse_constant=_refuse_constant)
    except json.JSONDecodeError as error:
        raise ProjectFileError([f"not valid JSON at line {error.lineno}, column {error.colno}: {error.msg}"],
                               source) from error
    except RecursionError as error:
        raise ProjectFileError(["the JSON is nested too deeply"], source) from error
    except ValueError as error:
        raise ProjectFileError([str(error)], source) from error
    document = migrate(document, source)
    project = decode(document, source)
    problems = validate(project)
    if problems:
        raise ProjectFileError(problems, source)
    return project


# Loading validates metric names against the review layer's table: make sure it is registered.
register_known_metrics()


def _refuse_constant(name: str) -> Any:
    raise ValueError(f"{name} is not allowed in a project file; write numbers as finite values")


def load_project(path: str | os.PathLike[str]) -> Project:
    """Load and validate a project file.

    Raises
    ------
    ProjectFileError
        The file is missing, too large, not JSON, of a newer version, or invalid; the message
        names the file and every problem with its JSON path.
    """
    path = Path(path)
    source = str(path)
    try:
        size = path.stat().st_size
        if size > MAX_FILE_BYTES:
            raise ProjectFileError([f"the file is {size / 1e6:.1f} MB; project files over "
                                    f"{MAX_FILE_BYTES // (1024 * 1024)} MB are refused"], source)
        data = path.read_bytes()
    except FileNotFoundError as error:
        raise ProjectFileError(["no such file"], source) from error
    except IsADirectoryError as error:
        raise ProjectFileError(["this is a folder, not a project file"], source) from error
    except PermissionError as error:
        raise ProjectFileError(["permission denied"], source) from error
    except OSError as error:
        raise ProjectFileError([f"cannot be read ({error.strerror})"], source) from error
    return loads_project(data, source)


def save_project(path: str | os.PathLike[str], project: Project) -> None:
    """Save atomically, keeping the previous file as ``NAME.stagewise.json.bak``.

    The text is written to a temporary file in the same folder, flushed and fsynced, and only
    then renamed over the target; a failure at any point leaves the old file as it was.
    """
    path = Path(path)
    text = dumps(project)
    folder = path.parent if str(path.parent) else Path(".")
    handle, temporary = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=folder)
    try:
        with os.fdopen(handle, "w", encoding="utf-8", newline="\n") as stream:
            stream.write(text)
            stream.flush()
            os.fsync(stream.fileno())
        if path.exists():
            backup = path.with_name(path.name + ".bak")
            data = path.read_bytes()
            backup.write_bytes(data)
        os.replace(temporary, path)
    except BaseException:
        try:
            os.unlink(temporary)
        except FileNotFoundError:
            pass
        raise
    _fsync_folder(folder)


def _fsync_folder(folder: Path) -> None:
    try:
        descriptor = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(descriptor)
    except OSError:
        pass
    finally:
        os.close(descriptor)


assert FORMAT_VERSION == 1
