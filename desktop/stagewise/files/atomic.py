"""Temporary files for atomic writes, and the clean-up of those a killed write left behind.

Every file Stagewise writes atomically (the project, its ``.bak``, its lock) is first written
to a temporary file in the same folder named ``.NAME.XXXXXXXX.tmp`` (``NAME`` the target's
name, eight characters from :func:`tempfile.mkstemp`), then renamed or linked into place. A
write killed between the two leaves that file behind. :func:`remove_leftover_temporaries`
removes such files for one target, but only those that are recognisably ours: named exactly
so, a regular file (not a link), owned by this user and older than
:data:`LEFTOVER_AGE_S` (a write in progress takes seconds, so an hour-old one is dead).
"""

from __future__ import annotations

import contextlib
import os
import re
import stat
import tempfile
import time
from pathlib import Path
from typing import Final

__all__ = ["LEFTOVER_AGE_S", "remove_leftover_temporaries", "write_temporary"]

LEFTOVER_AGE_S: Final = 3600.0
_RANDOM_PART: Final = r"[A-Za-z0-9_]{8}"


def write_temporary(folder: Path, name: str, data: bytes, mode: int) -> str:
    """Write ``data`` to a new temporary file for target ``name`` in ``folder``: flushed, fsynced,
    with permission bits ``mode``. Returns its path; removes it again on any failure."""
    handle, temporary = tempfile.mkstemp(prefix=f".{name}.", suffix=".tmp", dir=folder)
    try:
        with os.fdopen(handle, "wb") as stream:
            stream.write(data)
            stream.flush()
            os.fsync(stream.fileno())
        os.chmod(temporary, mode)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(temporary)
        raise
    return temporary


def remove_leftover_temporaries(target: Path, older_than_s: float = LEFTOVER_AGE_S) -> list[Path]:
    """Remove temporary files of ``target`` left by a killed write (see the module docstring).

    Never raises: a file that cannot be examined or removed is left alone. Returns the removed
    paths.
    """
    folder = target.parent if str(target.parent) else Path(".")
    pattern = re.compile(rf"\.{re.escape(target.name)}\.{_RANDOM_PART}\.tmp")
    removed: list[Path] = []
    try:
        names = [entry.name for entry in os.scandir(folder) if entry.name.startswith(f".{target.name}.")]
    except OSError:
        return removed
    now = time.time()
    user = os.getuid() if hasattr(os, "getuid") else None
    for name in names:
        if not pattern.fullmatch(name):
            continue
        candidate = folder / name
        try:
            status = candidate.lstat()
            if (not stat.S_ISREG(status.st_mode) or (user is not None and status.st_uid != user)
                    or now - status.st_mtime < older_than_s):
                continue
            candidate.unlink()
        except OSError:
            continue
        removed.append(candidate)
    return removed
