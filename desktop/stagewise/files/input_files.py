"""Reading a file a user names: a regular file, bounded in size, read without blocking.

One reader for every file Stagewise takes from outside (project files, element cards, bench
measurements), so each refuses the same things in the same words: a missing file, a folder, a
device such as ``/dev/zero``, a pipe or a socket (which could give bytes without end or block
forever), a file over its size limit (refused from its size alone, before reading) or one that
grows past the limit while it is read.
"""

from __future__ import annotations

import os
import stat
from pathlib import Path

__all__ = ["InputFileError", "read_regular_file"]


class InputFileError(ValueError):
    """A file that cannot be read as asked; ``problem`` is the sentence without the file name."""

    def __init__(self, path: str | os.PathLike[str], problem: str) -> None:
        super().__init__(f"{os.fspath(path)}: {problem}")
        self.path = os.fspath(path)
        self.problem = problem


def read_regular_file(path: str | os.PathLike[str], what: str, plural: str, max_bytes: int,
                      limit_text: str | None = None) -> bytes:
    """The bytes of ``path``, a regular file of at most ``max_bytes`` bytes.

    The file is opened without blocking and checked once open (``fstat`` of the open file), so
    a file swapped for a pipe between a check and the read is refused too; the read stops one
    byte past the limit, so a file that grows while it is read is refused as well.

    Parameters
    ----------
    what, plural : str
        What the file should be, with its article, and the plural, for the messages
        ("a project file", "project files").
    max_bytes : int
        The size limit in bytes.
    limit_text : str, optional
        The limit as the user reads it ("20 MiB"); default ``"{max_bytes:,} bytes"``.

    Raises
    ------
    InputFileError
        Missing, permission denied, a folder, not a regular file, too large, or an error while
        reading; ``problem`` says which in one sentence.
    """
    where = Path(path)
    limit = limit_text or f"{max_bytes:,} bytes"
    try:
        descriptor = os.open(where, os.O_RDONLY | getattr(os, "O_NONBLOCK", 0))
    except FileNotFoundError as error:
        raise InputFileError(where, "no such file") from error
    except IsADirectoryError as error:
        raise InputFileError(where, f"this is a folder, not {what}") from error
    except PermissionError as error:
        raise InputFileError(where, "permission denied") from error
    except OSError as error:
        raise InputFileError(where, f"cannot be read ({error.strerror})") from error
    try:
        status = os.fstat(descriptor)
        if stat.S_ISDIR(status.st_mode):
            raise InputFileError(where, f"this is a folder, not {what}")
        if not stat.S_ISREG(status.st_mode):
            raise InputFileError(where, f"not a regular file (a device, a pipe or a socket); give {what}")
        if status.st_size > max_bytes:
            raise InputFileError(where, f"the file is {status.st_size:,} bytes; {plural} over {limit} are refused")
        chunks: list[bytes] = []
        total = 0
        while True:  # bounded even if the file grows while it is read
            chunk = os.read(descriptor, min(1 << 20, max_bytes + 1 - total))
            if not chunk:
                break
            chunks.append(chunk)
            total += len(chunk)
            if total > max_bytes:
                raise InputFileError(where, f"the file grew past {limit} while it was read; {plural} over {limit} "
                                            "are refused")
    except PermissionError as error:
        raise InputFileError(where, "permission denied") from error
    except OSError as error:
        raise InputFileError(where, f"cannot be read ({error.strerror})") from error
    finally:
        os.close(descriptor)
    return b"".join(chunks)
