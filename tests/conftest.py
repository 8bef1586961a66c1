"""Shared test set-up: Qt runs offscreen, and paths to the demo projects and resources."""

from __future__ import annotations

import os
from pathlib import Path

import pytest

# Before anything imports Qt: tests never need a display.
os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

ROOT = Path(__file__).resolve().parent.parent
PROJECTS = ROOT / "projects"
RESOURCES = ROOT / "resources"


@pytest.fixture
def root_path() -> Path:
    return ROOT
