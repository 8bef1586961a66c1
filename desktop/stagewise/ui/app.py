"""Starting the desktop program: the application object, the window, screenshots, timing.

``STAGEWISE_FIRST_PAINT=1`` makes the program print ``first-paint <unix time>`` once the main
window has painted, and quit (the start-up benchmark uses it).
"""

from __future__ import annotations

import os
import sys
import time
from pathlib import Path

from PySide6.QtCore import QTimer, QtMsgType, qInstallMessageHandler
from PySide6.QtWidgets import QApplication

from stagewise import __version__
from stagewise.model.project import Project

__all__ = ["application", "open_window", "run", "screenshot"]


_previous_handler = None


def _quiet_offscreen(kind: QtMsgType, context: object, message: str) -> None:
    # The offscreen platform warns on every window it cannot resize natively; that is expected.
    if "propagateSizeHints" in message:
        return
    if _previous_handler is not None:
        _previous_handler(kind, context, message)
    else:
        sys.stderr.write(message + "\n")


def application() -> QApplication:
    """The QApplication (created once)."""
    global _previous_handler
    existing = QApplication.instance()
    if isinstance(existing, QApplication):
        return existing
    import warnings

    from stagewise.ui.qt_guard import protect_singletons

    protect_singletons()
    # pyqtgraph's log axes compute 10**range before the first autorange and may overflow; that
    # is harmless (the range is replaced at once) and must not reach the user's terminal.
    warnings.filterwarnings("ignore", category=RuntimeWarning, module=r"pyqtgraph\.")
    _previous_handler = qInstallMessageHandler(_quiet_offscreen)
    app = QApplication(sys.argv[:1])
    app.setApplicationName("Stagewise")
    app.setOrganizationName("Stagewise")
    app.setApplicationVersion(__version__)
    return app


def open_window(project: Project, path: Path | None, *, interactive: bool = True):  # type: ignore[no-untyped-def]
    """A main window on ``project`` (lock taken and recovery offered when interactive)."""
    from stagewise.ui.main_window import MainWindow

    window = MainWindow(project, path, interactive=interactive)
    if path is not None and interactive:
        window.attach_file(path)
    return window


def run(project: Project, path: Path | None) -> int:
    """Show the main window and run the event loop; returns the exit status."""
    app = application()
    window = open_window(project, path, interactive=True)
    if os.environ.get("STAGEWISE_FIRST_PAINT"):
        def report() -> None:
            sys.stdout.write(f"first-paint {time.time():.6f}\n")
            sys.stdout.flush()
            # Timing run: leave at once, without waiting for the analysis threads; release the
            # lock first so that nothing is left behind.
            window._release_lock()  # noqa: SLF001
            os._exit(0)

        window.first_paint.painted.connect(lambda: QTimer.singleShot(0, report))
    window.resize(1440, 900)
    window.show()
    return int(app.exec())


def screenshot(project: Project, path: Path | None, png: Path, width: int, height: int,
               timeout_s: float = 90.0) -> str | None:
    """Render the main window offscreen at ``width``×``height`` once its views are computed.

    Returns ``None`` on success or a sentence saying what went wrong.
    """
    from stagewise.ui.main_window import MainWindow

    app = application()
    window = MainWindow(project, path, interactive=False)
    window.resize(width, height)
    window.show()
    app.processEvents()
    finished = window.wait_until_idle(timeout_s)
    window._default_sizes()  # noqa: SLF001 - the default arrangement at the final size
    app.processEvents()
    # Put the cursor read-out somewhere meaningful: the reference frequency or the middle.
    reference = project.settings.ref_hz.si if project.settings.ref_hz is not None else (
        (project.settings.f_min_hz.si * project.settings.f_max_hz.si) ** 0.5)
    window.response_view.show_cursor(reference)
    app.processEvents()
    image = window.grab()
    window.shutdown()
    window.deleteLater()
    app.processEvents()
    if not finished:
        return "the analysis did not finish in time; the screenshot was not written"
    png.parent.mkdir(parents=True, exist_ok=True)
    if not image.save(str(png), "PNG"):
        return f"{png}: the image could not be written"
    return None
