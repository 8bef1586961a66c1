"""Remembered preferences (QSettings): window layout, recent files, the reviewer's name and role.

``STAGEWISE_SETTINGS`` names an INI file to use instead of the user's settings (tests and
screenshots use it so that they neither read nor change the user's preferences).
"""

from __future__ import annotations

import getpass
import os
from pathlib import Path

from PySide6.QtCore import QSettings

__all__ = ["MAX_RECENT", "add_recent", "app_settings", "recent_files", "remember_reviewer", "reviewer_identity"]

MAX_RECENT = 8


def app_settings() -> QSettings:
    """The program's settings store."""
    override = os.environ.get("STAGEWISE_SETTINGS")
    if override:
        return QSettings(override, QSettings.Format.IniFormat)
    return QSettings("Stagewise", "Stagewise")


def recent_files() -> list[str]:
    """Recently opened project files that still exist, newest first."""
    value = app_settings().value("files/recent", [])
    if isinstance(value, str):
        value = [value]
    return [str(path) for path in (value or []) if Path(str(path)).is_file()][:MAX_RECENT]


def add_recent(path: str | Path) -> list[str]:
    text = str(Path(path).resolve())
    files = [text] + [other for other in recent_files() if other != text]
    app_settings().setValue("files/recent", files[:MAX_RECENT])
    return files[:MAX_RECENT]


def reviewer_identity() -> tuple[str, str]:
    """The name and role last used for a review decision (the login name before the first)."""
    settings = app_settings()
    try:
        default = getpass.getuser()
    except (OSError, KeyError):
        default = ""
    return str(settings.value("review/name", default) or default), str(settings.value("review/role", "") or "")


def remember_reviewer(name: str, role: str) -> None:
    settings = app_settings()
    settings.setValue("review/name", name)
    settings.setValue("review/role", role)
