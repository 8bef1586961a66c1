"""Protection against a reference-count defect of PySide6 6.12.0 on Python 3.11.

Measured on these machines (PySide6 6.12.0, Python 3.11.7): every call of a Qt method that
returns nothing lowers the reference count of ``None`` by one (``QObject.setObjectName``:
−1.0 per call over 1000 calls), and ``Signal.disconnect`` does the same to ``True``/``False``.
After some tens of thousands of calls, a few seconds of normal use of a window, the interpreter
aborts with "deallocating None". Python 3.12 made these objects immortal, which hides the
defect there; we give them the same protection on 3.11 by adding a large constant to their
counts once, before Qt starts. Nothing else is touched.

pyproject.toml keeps 6.12 out of installs (6.11.3 measured clean: 0.0 per call); this guard
only acts where PySide6 6.12 is present anyway, for instance from a system package.
"""

from __future__ import annotations

import ctypes
import sys

__all__ = ["protect_singletons"]

_MARGIN = 1 << 48
AFFECTED_SERIES = (6, 12)
_done = False


def protect_singletons() -> None:
    """Make ``None``, ``True`` and ``False`` effectively immortal (CPython before 3.12 only)."""
    global _done
    if _done or sys.implementation.name != "cpython" or sys.version_info >= (3, 12):
        return
    import PySide6  # noqa: PLC0415  (the package itself is light: no Qt library loads)

    if tuple(PySide6.__version_info__[:2]) != AFFECTED_SERIES:
        return
    for singleton in (None, True, False):
        ctypes.c_ssize_t.from_address(id(singleton)).value += _MARGIN
    _done = True
