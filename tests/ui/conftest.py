"""Fixtures for the GUI tests: a main window on a copy of a small sample project, offscreen."""

from __future__ import annotations

import shutil
from collections.abc import Iterator
from pathlib import Path

import pytest

from stagewise.ui.qt_guard import protect_singletons

# PySide6 6.12.0 on Python 3.11 loses a reference to None on every void call (see qt_guard).
protect_singletons()

SAMPLE = Path(__file__).resolve().parent / "sample.stagewise.json"


@pytest.fixture(autouse=True)
def private_settings(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    """Tests never read or write the user's preferences."""
    path = tmp_path / "settings.ini"
    monkeypatch.setenv("STAGEWISE_SETTINGS", str(path))
    return path


@pytest.fixture
def sample_path(tmp_path: Path) -> Path:
    target = tmp_path / "sample.stagewise.json"
    shutil.copyfile(SAMPLE, target)
    return target


def make_window(qtbot, path: Path, interactive: bool = False):  # type: ignore[no-untyped-def]
    from stagewise.files.project_file import load_project
    from stagewise.ui.main_window import MainWindow

    window = MainWindow(load_project(path), path, interactive=interactive)
    qtbot.addWidget(window)
    window.resize(1280, 800)
    window.show()
    assert window.wait_until_idle(60, formula=False), "the first analysis did not finish"
    return window


@pytest.fixture
def window(qtbot, sample_path: Path) -> Iterator[object]:  # type: ignore[no-untyped-def]
    created = make_window(qtbot, sample_path)
    yield created
    created.shutdown()


def type_into(qtbot, field, text: str) -> None:  # type: ignore[no-untyped-def]
    """Select what a line edit holds and type over it, as a user does."""
    from PySide6.QtCore import Qt

    field.setFocus()
    field.selectAll()
    qtbot.keyClick(field, Qt.Key.Key_Backspace)
    if text:
        qtbot.keyClicks(field, text)
