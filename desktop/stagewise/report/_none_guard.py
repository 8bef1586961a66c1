"""Guard against a reference-count defect of PySide6 6.12 on Python 3.11.

Measured on these machines (PySide6-Essentials 6.12.0, CPython 3.11.7): every call of a Qt
method that returns ``void`` (``QFont.setPixelSize``, ``QPainter.setPen``, ``QPainter.drawLine``,
...) takes one reference from ``None`` without giving it back; ``None`` starts with a few
thousand, so painting a packet of a few pages ends in "Fatal Python error: none_dealloc". Methods
returning ``bool`` do the same to ``True`` and ``False`` ("bool_dealloc"). From
Python 3.12 on ``None`` is immortal and the defect is harmless, which is probably why it went
unnoticed. Until a fixed PySide6 is pinned, :func:`keep_none_alive` gives ``None``, ``True`` and
``False`` a reserve of references so large that the missing ones can never exhaust it.
"""

from __future__ import annotations

import ctypes
import sys

__all__ = ["keep_none_alive"]

_RESERVE = 1 << 40
_done = False


def keep_none_alive() -> None:
    """Give ``None``, ``True`` and ``False`` 2**40 references each (CPython before 3.12 only; idempotent)."""
    global _done
    if _done or sys.version_info >= (3, 12) or sys.implementation.name != "cpython":
        return
    # ob_refcnt is the first field of every CPython object (Py_ssize_t, non-debug builds).
    for singleton in (None, True, False):
        counter = ctypes.c_ssize_t.from_address(id(singleton))
        counter.value += _RESERVE
    _done = True
