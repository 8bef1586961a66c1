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
import stat
import tempfile
from pathlib import Path
from typing import Any

from stagewise.files.codec import JsonObject, ProjectFileError, decode, dumps
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
    if len(text) > MAX_FILE_BYTES:
        raise ProjectFileError([f"the document is over {MAX_FILE_BYTES // (1024 * 1024)} MB; project files over "
                                f"{MAX_FILE_BYTES // (1024 * 1024)} MB are refused"], source)
    if isinstance(text, bytes):
        try:
            # A byte-order mark (some editors write one) is accepted and dropped.
            text = text.decode("utf-8-sig")
        except UnicodeDecodeError as error:
            raise ProjectFileError([f"the file is not UTF-8 text (byte {error.start})"], source) from error
    try:
        document: Any = json.loads(text.removeprefix("\ufeff"), parse_constant=_NonFinite,
                                   object_pairs_hook=JsonObject.from_pairs)
        non_finite = _non_finite_problems(document)
    except json.JSONDecodeError as error:
        raise ProjectFileError([f"not valid JSON at line {error.lineno}, column {error.colno}: {error.msg}"],
                               source) from error
    except RecursionError as error:
        raise ProjectFileError(["the JSON is nested too deeply"], source) from error
    except ValueError as error:
        raise ProjectFileError([str(error)], source) from error
    if non_finite:
        raise ProjectFileError(non_finite, source)
    document = migrate(document, source)
    project = decode(document, source)
    problems = validate(project)
    if problems:
        raise ProjectFileError(problems, source)
    return project


# Loading validates metric names against the review layer's table: make sure it is registered.
register_known_metrics()


class _NonFinite:
    """Stands where the JSON held NaN, Infinity or -Infinity, so the loader can name the path."""

    def __init__(self, name: str) -> None:
        self.name = name


def _non_finite_problems(node: Any, path: str = "") -> list[str]:
    """A problem, with its JSON path, for every NaN or Infinity in a parsed document."""
    if isinstance(node, _NonFinite):
        return [f"{path or '(document)'}: {node.name} is not allowed in a project file; write a finite number"]
    problems: list[str] = []
    if isinstance(node, dict):
        for key, value in node.items():
            problems.extend(_non_finite_problems(value, f"{path}.{key}" if path else str(key)))
    elif isinstance(node, list):
        for index, value in enumerate(node):
            problems.extend(_non_finite_problems(value, f"{path}[{index}]"))
    return problems


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
    data = _read_bounded(path, source)
    return loads_project(data, source)


def _read_bounded(path: Path, source: str) -> bytes:
    """The bytes of a regular file no larger than :data:`MAX_FILE_BYTES`."""
    try:
        status = path.stat()
    except FileNotFoundError as error:
        raise ProjectFileError(["no such file"], source) from error
    except PermissionError as error:
        raise ProjectFileError(["permission denied"], source) from error
    except OSError as error:
        raise ProjectFileError([f"cannot be read ({error.strerror})"], source) from error
    if stat.S_ISDIR(status.st_mode):
        raise ProjectFileError(["this is a folder, not a project file"], source)
    if not stat.S_ISREG(status.st_mode):
        raise ProjectFileError(["not a regular file (a device, a pipe or a socket)"], source)
    if status.st_size > MAX_FILE_BYTES:
        raise ProjectFileError([f"the file is {status.st_size / 1e6:.1f} MB; project files over "
                                f"{MAX_FILE_BYTES // (1024 * 1024)} MB are refused"], source)
    try:
        with path.open("rb") as stream:
            # Read one byte past the limit: a file that grew since stat() is still refused.
            data = stream.read(MAX_FILE_BYTES + 1)
    except PermissionError as error:
        raise ProjectFileError(["permission denied"], source) from error
    except OSError as error:
        raise ProjectFileError([f"cannot be read ({error.strerror})"], source) from error
    if len(data) > MAX_FILE_BYTES:
        raise ProjectFileError([f"the file is over {MAX_FILE_BYTES // (1024 * 1024)} MB; project files over "
                                f"{MAX_FILE_BYTES // (1024 * 1024)} MB are refused"], source)
    return data


def save_project(path: str | os.PathLike[str], project: Project) -> None:
    """Save atomically, keeping the previous file as ``NAME.stagewise.json.bak``.

    The text is written to a temporary file in the same folder, flushed and fsynced; the
    previous file is copied to the ``.bak`` the same way (temporary file, fsync, rename); only
    then is the temporary file renamed over the target. A failure at any point leaves the old
    file as it was (and the previous ``.bak`` intact or replaced whole). The new file keeps the
    old one's permission bits. The project is not validated here: callers that must not write
    an invalid project call :func:`stagewise.model.validate.validate` first.

    Raises
    ------
    OSError
        The folder is missing or not writable, the disk is full, ...; nothing was replaced.
    """
    path = Path(path)
    text = dumps(project)
    folder = path.parent if str(path.parent) else Path(".")
    mode = _mode_for(path)
    temporary = _write_temporary(folder, path.name, text.encode("utf-8"), mode)
    try:
        if path.exists():
            backup = path.with_name(path.name + ".bak")
            backup_temporary = _write_temporary(folder, backup.name, path.read_bytes(), mode)
            try:
                os.replace(backup_temporary, backup)
            except BaseException:
                _remove(backup_temporary)
                raise
        os.replace(temporary, path)
    except BaseException:
        _remove(temporary)
        raise
    _fsync_folder(folder)


def _mode_for(path: Path) -> int:
    """The permission bits for the saved file: the old file's, else the umask's default."""
    try:
        return stat.S_IMODE(path.stat().st_mode)
    except OSError:
        umask = os.umask(0)
        os.umask(umask)
        return 0o666 & ~umask


def _write_temporary(folder: Path, name: str, data: bytes, mode: int) -> str:
    handle, temporary = tempfile.mkstemp(prefix=f".{name}.", suffix=".tmp", dir=folder)
    try:
        with os.fdopen(handle, "wb") as stream:
            stream.write(data)
            stream.flush()
            os.fsync(stream.fileno())
        os.chmod(temporary, mode)
    except BaseException:
        _remove(temporary)
        raise
    return temporary


def _remove(temporary: str) -> None:
    try:
        os.unlink(temporary)
    except FileNotFoundError:
        pass


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
