"""Reading and writing project files (``NAME.stagewise.json``).

Loading reads the bytes, refuses oversized files, parses JSON, migrates older format versions,
decodes and validates, and reports every problem with its JSON path. Nothing is written while
loading. Saving is atomic: a temporary file in the same folder, flushed and fsynced, then
renamed over the target, with the previous version kept as ``NAME.stagewise.json.bak``. What
is saved is first loaded back through this module's own loader: a project that would not load
again is never written.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import stat
from pathlib import Path
from typing import Any

from stagewise.files.atomic import remove_leftover_temporaries, write_temporary
from stagewise.files.codec import JsonObject, ProjectFileError, decode, dumps, encode
from stagewise.files.input_files import InputFileError, read_regular_file
from stagewise.files.lock import lock_path, real_path
from stagewise.files.migrate import migrate
from stagewise.model.project import FORMAT_VERSION, Project
from stagewise.model.validate import validate
from stagewise.review.metrics import register_known_metrics

__all__ = ["MAX_DEPTH", "MAX_FILE_BYTES", "ProjectFileError", "SaveRefused", "backup_path", "file_sha256",
           "encode_checked", "is_project_or_companion", "load_project", "loads_project", "save_project"]

MAX_FILE_BYTES = 20 * 1024 * 1024
# MAX_FILE_BYTES in words: binary megabytes (MiB, 2**20 bytes), as everywhere the limit is shown.
MAX_FILE_TEXT = f"20 MiB ({MAX_FILE_BYTES:,} bytes)"
# Deeper than any project file is (about 6 levels); bounds the loader's walks and the migration.
MAX_DEPTH = 64
# Integers longer than this are refused by the parser (the largest finite double has 309 digits).
MAX_INTEGER_DIGITS = 300
SUFFIX = ".stagewise.json"


class SaveRefused(ProjectFileError):
    """What a save would write does not load again; nothing was written."""


def backup_path(project_path: str | os.PathLike[str]) -> Path:
    """``NAME.stagewise.json.bak`` beside the real file of ``project_path``."""
    path = real_path(project_path)
    return path.with_name(path.name + ".bak")


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
    if isinstance(text, str):
        try:
            text = text.encode("utf-8")
        except UnicodeEncodeError:
            pass  # a lone surrogate: kept as text, so that the walk below names its path
    if len(text) > MAX_FILE_BYTES:
        raise ProjectFileError([f"the document is over {MAX_FILE_TEXT}; project files over {MAX_FILE_TEXT} "
                                "are refused"], source)
    if isinstance(text, bytes):
        try:
            # A byte-order mark (some editors write one) is accepted and dropped.
            text = text.decode("utf-8-sig")
        except UnicodeDecodeError as error:
            raise ProjectFileError([f"the file is not UTF-8 text (byte {error.start})"], source) from error
    try:
        document: Any = json.loads(text.removeprefix("\ufeff"), parse_constant=_NonFinite,
                                   parse_float=_parse_float, parse_int=_parse_int,
                                   object_pairs_hook=JsonObject.from_pairs)
    except json.JSONDecodeError as error:
        raise ProjectFileError([f"not valid JSON at line {error.lineno}, column {error.colno}: {error.msg}"],
                               source) from error
    except RecursionError as error:
        raise ProjectFileError([f"the JSON is nested too deeply (a project file is at most {MAX_DEPTH} levels deep)"], source) from error
    unreadable = _unreadable_values(document)
    if unreadable:
        raise ProjectFileError(unreadable, source)
    document = migrate(document, source)
    project = decode(document, source)
    problems = validate(project)
    if problems:
        raise ProjectFileError(problems, source)
    return project


# Loading validates metric names against the review layer's table: make sure it is registered.
register_known_metrics()


class _NonFinite:
    """Stands where the JSON held a number that is not a finite double (NaN, Infinity, 1e400, an
    integer of thousands of digits), so that the loader can name its path."""

    def __init__(self, name: str, why: str = "is not allowed in a project file; write a finite number") -> None:
        self.name = name
        self.why = why


def _parse_float(text: str) -> float | _NonFinite:
    value = float(text)
    if math.isfinite(value):
        return value
    shown = text if len(text) <= 40 else text[:37] + "…"
    return _NonFinite(shown, "is beyond the range of a double (about ±1.8e308); write a finite number")


def _parse_int(text: str) -> int | _NonFinite:
    digits = len(text.lstrip("-"))
    if digits > MAX_INTEGER_DIGITS:
        return _NonFinite(f"an integer of {digits} digits", f"is too large; write at most "
                          f"{MAX_INTEGER_DIGITS} digits")
    return int(text)


def _describe_path(path: list[str | int]) -> str:
    text = ""
    for piece in path:
        text += f"[{piece}]" if isinstance(piece, int) else (f".{piece}" if text else str(piece))
    return text or "(document)"


def _surrogate(text: str) -> str | None:
    """The first lone surrogate of ``text`` as ``\\udXXX``, or None (a str from JSON may hold one)."""
    for character in text:
        if "\ud800" <= character <= "\udfff":
            return f"\\u{ord(character):04x}"
    return None


def _non_finite_paths(document: Any) -> list[str]:
    """The JSON paths of the non-finite floats in a document about to be written."""
    found: list[str] = []
    stack: list[tuple[Any, list[str | int]]] = [(document, [])]
    while stack:
        node, path = stack.pop()
        if isinstance(node, float) and not math.isfinite(node):
            found.append(_describe_path(path))
        elif isinstance(node, dict):
            stack.extend((value, [*path, key]) for key, value in node.items())
        elif isinstance(node, list | tuple):
            stack.extend((value, [*path, index]) for index, value in enumerate(node))
    return sorted(found)


def _unreadable_values(document: Any) -> list[str]:
    """A problem, with its JSON path, for everything in a parsed document that no project holds:
    non-finite or overflowing numbers, lone surrogates in text and keys, nesting past
    :data:`MAX_DEPTH`. Walks without recursion, so any depth the parser accepted is safe."""
    problems: list[str] = []
    stack: list[tuple[Any, list[str | int]]] = [(document, [])]
    while stack:
        node, path = stack.pop()
        if len(path) > MAX_DEPTH:
            shown = _describe_path(path[:8]) + "…"
            problems.append(f"{shown}: nested too deeply (a project file is at most {MAX_DEPTH} levels deep)")
            continue
        if isinstance(node, _NonFinite):
            problems.append(f"{_describe_path(path)}: {node.name} {node.why}")
        elif isinstance(node, str):
            bad = _surrogate(node)
            if bad is not None:
                problems.append(f"{_describe_path(path)}: the text holds {bad}, half of a character pair "
                                "(a lone surrogate), which is not text; remove it")
        elif isinstance(node, dict):
            for key, value in reversed(list(node.items())):
                bad = _surrogate(key)
                if bad is not None:
                    problems.append(f"{_describe_path(path)}: a key holds {bad}, half of a character pair "
                                    "(a lone surrogate), which is not text; remove it")
                    continue
                stack.append((value, [*path, key]))
        elif isinstance(node, list):
            stack.extend((value, [*path, index]) for index, value in reversed(list(enumerate(node))))
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
        return read_regular_file(path, "a project file", "project files", MAX_FILE_BYTES, MAX_FILE_TEXT)
    except InputFileError as error:
        raise ProjectFileError([error.problem], source) from error


def save_project(path: str | os.PathLike[str], project: Project) -> None:
    """Save atomically, keeping the previous file as ``NAME.stagewise.json.bak``.

    The exact bytes to be written are first loaded back with :func:`loads_project` (the
    loader's own path: size limit, JSON, migration, decoding, validation); if they would not
    load, nothing is written and :class:`SaveRefused` says why in one sentence. Then the text
    is written to a temporary file in the same folder, flushed and fsynced; the previous file
    is copied to the ``.bak`` the same way (temporary file, fsync, rename); only then is the
    temporary file renamed over the target. A failure at any point leaves the old file as it
    was (and the previous ``.bak`` intact or replaced whole). The new file keeps the old one's
    permission bits. A ``path`` that is a symbolic link is written through: the real file is
    replaced and its ``.bak`` lies beside it; the link stays. Temporary files of this project
    left by a killed save are removed (see :mod:`stagewise.files.atomic`).

    Raises
    ------
    SaveRefused
        The project would be written as a file that does not load again (a name over the
        length limit, a file over the size limit, ...); nothing was written.
    OSError
        The folder is missing or not writable, the disk is full, ...; nothing was replaced.
    """
    source = str(path)
    path = real_path(path)
    data = encode_checked(project, source)
    folder = path.parent
    backup = backup_path(path)
    for target in (path, backup):
        remove_leftover_temporaries(target)
    mode = _mode_for(path)
    temporary = write_temporary(folder, path.name, data, mode)
    try:
        if path.exists():
            backup_temporary = write_temporary(folder, backup.name, path.read_bytes(), mode)
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


def encode_checked(project: Project, source: str = "") -> bytes:
    """The bytes :func:`save_project` writes for ``project``, after loading them back.

    Raises
    ------
    SaveRefused
        One sentence naming the file and what would not load again.
    """
    try:
        data = dumps(project).encode("utf-8")
    except UnicodeEncodeError as error:
        raise SaveRefused([f"not saved: a text holds {error.object[error.start:error.end]!r}, half of a "
                           "character pair, which cannot be written; the file on disk is unchanged"],
                          source) from error
    except ValueError as error:  # a non-finite number: JSON has none, the encoder never writes one
        where = ", ".join(_non_finite_paths(encode(project))) or "(document)"
        raise SaveRefused([f"not saved: {where}: a number that is not finite (NaN or infinity) cannot be "
                           "written to a project file; the file on disk is unchanged"], source) from error
    try:
        loads_project(data, source)
    except ProjectFileError as error:
        problems = "; ".join(error.problems)
        raise SaveRefused([f"not saved, because the file would not load again: {problems}; the file on disk "
                           "is unchanged"], source) from error
    return data


def is_project_or_companion(candidate: str | os.PathLike[str], project_path: str | os.PathLike[str]) -> bool:
    """Whether ``candidate`` is the project file, its ``.bak`` or its lock (links resolved)."""
    target = real_path(candidate)
    project = real_path(project_path)
    if target in (project, backup_path(project), lock_path(project)):
        return True
    try:
        return os.path.samefile(target, project)
    except OSError:
        return False


def _mode_for(path: Path) -> int:
    """The permission bits for the saved file: the old file's, else the umask's default."""
    try:
        return stat.S_IMODE(path.stat().st_mode)
    except OSError:
        umask = os.umask(0)
        os.umask(umask)
        return 0o666 & ~umask


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
