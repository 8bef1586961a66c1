"""Widget subscriptions to model signals that can be switched off when the widget closes.

Widgets stop listening when they close. We do not call ``Signal.disconnect`` for that: with
PySide6 6.12 a thousand connect/disconnect pairs abort the interpreter ("deallocating True or
False: refcount error", measured on this machine). Each slot is connected through a guard that
does nothing once :meth:`Subscriptions.close` ran; the connections themselves go away with the
document, which the window owns.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

__all__ = ["Subscriptions"]


class Subscriptions:
    """A widget's connections to signals of the document, worker and overlay selection."""

    def __init__(self) -> None:
        self.active = True
        self.count = 0

    def connect(self, signal: Any, slot: Callable[..., Any]) -> None:
        def guarded(*arguments: Any) -> None:
            if self.active:
                slot(*arguments)

        signal.connect(guarded)
        self.count += 1

    def connect_all(self, pairs: list[tuple[Any, Callable[..., Any]]]) -> None:
        for signal, slot in pairs:
            self.connect(signal, slot)

    def close(self) -> None:
        """Stop listening: every guarded slot ignores its signal from now on."""
        self.active = False
