"""`stagewise [FILE]` and `stagewise gui FILE [--screenshot PNG [--size WxH]]`: the desktop program.

Without a display (no DISPLAY or WAYLAND_DISPLAY on Linux, and Qt not told to run offscreen)
it says so in one sentence and names the headless commands, with exit status 2, instead of
letting Qt abort. ``--screenshot`` always renders offscreen.
"""

from __future__ import annotations

import argparse
import os
import re
import sys
from pathlib import Path

from stagewise.cli import CommandError

HEADLESS_HINT = ("no display is available for the desktop program; use the headless commands "
                 "'stagewise packet', 'stagewise check' or 'stagewise analyze' instead, or set "
                 "QT_QPA_PLATFORM=offscreen")
MIN_SIZE = (1280, 800)


def display_available(environ: dict[str, str] | None = None, platform: str | None = None) -> bool:
    """Whether Qt can open a window: always on Windows and macOS; on Linux a display or offscreen."""
    environ = dict(os.environ) if environ is None else environ
    platform = sys.platform if platform is None else platform
    if not platform.startswith("linux") and not platform.startswith("freebsd"):
        return True
    if environ.get("QT_QPA_PLATFORM", "").split(":")[0] in ("offscreen", "minimal", "vnc", "eglfs", "linuxfb"):
        return True
    return bool(environ.get("DISPLAY") or environ.get("WAYLAND_DISPLAY"))


def parse_size(text: str) -> tuple[int, int]:
    match = re.fullmatch(r"\s*(\d{3,5})\s*[xX×]\s*(\d{3,5})\s*", text or "")
    if match is None:
        raise CommandError(f'--size "{text}" is not WIDTHxHEIGHT (for instance 1440x900)')
    width, height = int(match[1]), int(match[2])
    if width < MIN_SIZE[0] or height < MIN_SIZE[1]:
        raise CommandError(f"--size {width}x{height} is too small; the window needs at least "
                           f"{MIN_SIZE[0]}x{MIN_SIZE[1]}")
    return width, height


def run(args: argparse.Namespace) -> int:
    from stagewise.commands.common import load

    screenshot = getattr(args, "screenshot", None)
    if screenshot:
        size = parse_size(getattr(args, "size", "1440x900"))
        if not display_available():
            os.environ["QT_QPA_PLATFORM"] = "offscreen"
        os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
    elif not display_available():
        raise CommandError(HEADLESS_HINT)
    if args.file:
        path = Path(args.file)
    else:
        from stagewise.ui.main_window import demo_path

        path = demo_path()
        if not path.is_file():
            raise CommandError(f"the bundled demo {path} is missing; give a project FILE")
    project = load(str(path))
    if screenshot:
        from stagewise.ui.app import screenshot as render

        problem = render(project, path.resolve(), Path(screenshot), *size)
        if problem:
            raise CommandError(problem)
        return 0
    from stagewise.ui.app import run as run_window

    return run_window(project, path.resolve())
