"""A small bounded, thread-safe cache that counts what it had to compute.

The engine keys its per-stage results on the stage fingerprint (what decides the stage's
behaviour) and on the frequency grid, so editing one part recomputes only its own stage. The
counters let tests and benchmarks see how much work an update really did.
"""

from __future__ import annotations

import hashlib
import threading
from collections import OrderedDict
from collections.abc import Callable, Hashable
from typing import Generic, TypeVar

import numpy as np
from numpy.typing import NDArray

__all__ = ["ComputeCache", "grid_key"]

Value = TypeVar("Value")


def grid_key(f_hz: NDArray[np.float64]) -> str:
    """A key for a frequency grid: SHA-256 of its float64 bytes (same grid, same key)."""
    values = np.ascontiguousarray(np.asarray(f_hz, dtype=np.float64))
    return f"{values.size}:" + hashlib.sha256(values.tobytes()).hexdigest()


class ComputeCache(Generic[Value]):
    """Least-recently-used cache of computed values, with a count of computations.

    Parameters
    ----------
    max_entries : int
        Entries kept; the least recently used is dropped beyond it.
    """

    def __init__(self, max_entries: int = 256) -> None:
        if max_entries < 1:
            raise ValueError(f"max_entries must be at least 1, got {max_entries}")
        self._entries: OrderedDict[Hashable, Value] = OrderedDict()
        self._lock = threading.Lock()
        self._max_entries = max_entries
        self.computed = 0
        self.hits = 0

    def get_or_compute(self, key: Hashable, compute: Callable[[], Value]) -> Value:
        """The cached value for ``key``, computing (outside the lock) and storing it on a miss."""
        with self._lock:
            if key in self._entries:
                self._entries.move_to_end(key)
                self.hits += 1
                return self._entries[key]
        value = compute()
        with self._lock:
            self.computed += 1
            self._entries[key] = value
            self._entries.move_to_end(key)
            while len(self._entries) > self._max_entries:
                self._entries.popitem(last=False)
        return value

    def clear(self) -> None:
        """Forget every entry (the counters are kept)."""
        with self._lock:
            self._entries.clear()

    def __len__(self) -> int:
        with self._lock:
            return len(self._entries)
