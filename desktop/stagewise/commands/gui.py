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
MAX_SIDE_PX = 16384


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
    """WIDTHxHEIGHT in pixels, each from 1 to 16384.

    Any size is taken: a window that cannot be that small is rendered at the smallest size its
    contents allow, and the command prints the size it wrote.
    """
    match = re.fullmatch(r"\s*(\d{1,5})\s*[xX×]\s*(\d{1,5})\s*", text or "")
    if match is None:
        raise CommandError(f'--size "{text}" is not WIDTHxHEIGHT (for instance 1440x900)')
    width, height = int(match[1]), int(match[2])
    if not (1 <= width <= MAX_SIDE_PX and 1 <= height <= MAX_SIDE_PX):
        raise CommandError(f"--size {width}x{height}: each side must be from 1 to {MAX_SIDE_PX} pixels")
    return width, height


def png_size(path: Path) -> tuple[int, int]:
    """Width and height written in a PNG's header chunk."""
    with path.open("rb") as stream:
        header = stream.read(24)
    return int.from_bytes(header[16:20], "big"), int.from_bytes(header[20:24], "big")


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
        written = png_size(Path(screenshot))
        if written != size:
            print(f"{screenshot}: {written[0]}x{written[1]} pixels (the window cannot be {size[0]}x{size[1]}; "
                  f"this is the nearest size its contents allow)")
        else:
            print(f"{screenshot}: {written[0]}x{written[1]} pixels")
        return 0
    from stagewise.ui.app import run as run_window

    return run_window(project, path.resolve())
