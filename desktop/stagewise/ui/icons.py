"""Our own icons (simple SVGs in resources/icons), loaded once and cached."""

from __future__ import annotations

from functools import cache
from pathlib import Path

from PySide6.QtGui import QIcon

__all__ = ["ICON_FOLDER", "icon"]

ICON_FOLDER = Path(__file__).resolve().parents[3] / "resources" / "icons"


@cache
def icon(name: str) -> QIcon:
    """The icon ``resources/icons/<name>.svg``; an empty icon when the file is missing."""
    path = ICON_FOLDER / f"{name}.svg"
    return QIcon(str(path)) if path.is_file() else QIcon()
