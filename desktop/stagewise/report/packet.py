"""The PDF review packet: one document for ``stagewise packet``, File → Export and File → Print.

:func:`build_packet` writes the PDF through ``QPdfWriter`` (A4 portrait, 96 dpi so that
pyqtgraph plots stay vector with their tick labels in place); :func:`print_packet` sends the
same pages to a ``QPrinter``. Both compute the content once, lay out every page before painting
(so each footer can say "page N of M"), report progress and stop when asked.

Recording: the packet is not an edit of the project. Whoever prints it records the event
with :func:`stagewise.review.actions.record_packet` (the packet's own SHA-256, from
:attr:`PacketResult.sha256`) and saves the project; the command line does both, atomically,
after the PDF is complete.
"""

from __future__ import annotations

import hashlib
import os
import tempfile
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import cast

from PySide6.QtCore import QMarginsF
from PySide6.QtGui import QPagedPaintDevice, QPageLayout, QPageSize, QPainter, QPdfWriter

from stagewise import __version__
from stagewise.files.atomic import remove_leftover_temporaries
from stagewise.model.project import Project
from stagewise.report.content import PacketContent, gather
from stagewise.report.layout import LOGICAL_DPI, Page, PageFrame, paginate, paint_pages
from stagewise.report.plots import using_canvas
from stagewise.report.sections import build_blocks
from stagewise.review.checks import CheckResult, MetricProvider, UnavailableProvider, evaluate_project

__all__ = ["PacketCancelled", "PacketResult", "Progress", "build_packet", "ensure_application", "print_packet"]

Progress = Callable[[int, int, str], bool]
"""``progress(done, total, label) -> continue?``: called between steps; return False to cancel."""

_APPLICATION: object | None = None


class PacketCancelled(Exception):  # noqa: N818 (it is an outcome, not an error)
    """The progress callback asked to stop; nothing was written."""


@dataclass(frozen=True)
class PacketResult:
    """A finished packet: where it is, its own SHA-256, and how many pages it has."""

    path: str | None
    sha256: str | None
    pages: int
    file_sha256: str


def ensure_application() -> None:
    """Make sure a QApplication exists (pyqtgraph plots are widgets); offscreen without a display."""
    global _APPLICATION
    from PySide6.QtWidgets import QApplication

    existing = QApplication.instance()
    if existing is not None:
        if not isinstance(existing, QApplication):
            raise RuntimeError("the review packet draws its plots with widgets, which need a QApplication; "
                               "this process runs a QGuiApplication")
        return
    if not os.environ.get("DISPLAY") and not os.environ.get("WAYLAND_DISPLAY"):
        os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
    _APPLICATION = QApplication(["stagewise"])


def _metric_provider(content: PacketContent) -> MetricProvider:
    """The analysis object that made the packet's numbers, so checks read the very same values."""
    if content.provider is not None:
        return cast(MetricProvider, content.provider)
    return UnavailableProvider(content.analysis_why or "the analysis engine is not available in this build")


class _Steps:
    """Turns the content and painting steps into ``progress(done, total, label)`` calls."""

    def __init__(self, project: Project, progress: Progress | None) -> None:
        self.progress = progress
        self.done = 0
        # analysis, chain, each stage, checks, layout, painting
        self.total = len(project.stages) + 5

    def step(self, label: str) -> bool:
        if self.progress is None:
            return True
        go_on = bool(self.progress(self.done, self.total, label))
        self.done += 1
        return go_on

    def page(self, number: int, pages: int) -> bool:
        if self.progress is None:
            return True
        return bool(self.progress(self.done, self.total, f"page {number} of {pages}"))


def _prepare(project: Project, path_or_sha: str | os.PathLike[str], steps: _Steps, printed_utc: str | None,
             analysis: object = None) -> tuple[PacketContent, list[CheckResult], PageFrame, list[Page]]:
    ensure_application()
    content = gather(project, path_or_sha, steps.step, analysis)
    if content is None or not steps.step("evaluating the checks"):
        raise PacketCancelled
    results = evaluate_project(project, _metric_provider(content))
    from stagewise.review.signoff import signoff_states

    states = signoff_states(project)
    if not steps.step("laying out the pages"):
        raise PacketCancelled
    blocks = build_blocks(content, results, states, printed_utc)
    frame = PageFrame(title=project.title, revision=project.revision, short_sha=content.sha256[:12],
                      footer_left=f"Stagewise {__version__} · review packet · {content.source_name}")
    pages = paginate(blocks, frame)
    return content, results, frame, pages


def _setup_device(device: QPagedPaintDevice) -> None:
    device.setPageSize(QPageSize(QPageSize.PageSizeId.A4))
    device.setPageOrientation(QPageLayout.Orientation.Portrait)
    # Margins are drawn by the layout itself, so header and footer sit where it puts them.
    device.setPageMargins(QMarginsF(0, 0, 0, 0), QPageLayout.Unit.Millimeter)


def _paint(device: QPagedPaintDevice, frame: PageFrame, pages: list[Page], steps: _Steps) -> bool:
    painter = QPainter()
    if not painter.begin(device):
        raise OSError("the packet cannot be written: the output device did not open")
    try:
        scale = device.logicalDpiX() / LOGICAL_DPI
        if abs(scale - 1.0) > 1e-9:
            painter.scale(scale, scale)
        painter.setRenderHint(QPainter.RenderHint.Antialiasing, True)
        painter.setRenderHint(QPainter.RenderHint.TextAntialiasing, True)
        steps.step("painting the pages")
        with using_canvas():  # the plots share their frames from figure to figure
            return paint_pages(device, painter, pages, frame, steps.page)
    finally:
        painter.end()


def _write_pdf(file_name: str, project: Project, frame: PageFrame, pages: list[Page], steps: _Steps) -> bytes | None:
    """Paint the pages into ``file_name``; its bytes, or ``None`` when cancelled."""
    writer = QPdfWriter(file_name)
    writer.setResolution(LOGICAL_DPI)
    writer.setTitle(f"{project.title}, revision {project.revision}: review packet")
    writer.setCreator(f"Stagewise {__version__}")
    _setup_device(writer)
    finished = _paint(writer, frame, pages, steps)
    del writer  # the PDF is complete once the writer is gone
    if not finished:
        return None
    data = Path(file_name).read_bytes()
    if not data.startswith(b"%PDF"):
        raise OSError(f"{file_name}: the PDF could not be written")
    return data


def build_packet(project: Project, path_or_sha: str | os.PathLike[str], output: str | os.PathLike[str],
                 progress: Progress | None = None, printed_utc: str | None = None,
                 analysis: object = None) -> PacketResult:
    """Write the review packet of ``project`` as a PDF.

    Parameters
    ----------
    project : Project
        The project as loaded (or as the GUI holds it).
    path_or_sha : str or PathLike
        The project file's path (its SHA-256 goes on the cover and its path to the analysis), or
        the 64-digit SHA-256 of the file as last saved when there is no path to read.
    output : str or PathLike
        The PDF to write. It is written to a temporary file beside it and renamed into place
        only when complete, so a cancelled or failed run leaves no partial file.
    progress : callable, optional
        ``progress(done, total, label) -> bool``; return False to cancel.
    printed_utc : str, optional
        The printing time shown on the cover (ISO 8601 UTC); now when omitted.
    analysis : engine.analysis.ProjectAnalysis, optional
        An analysis of this very project the caller already holds (the GUI's), reused as is;
        a new one is computed when omitted.

    Returns
    -------
    PacketResult
        With the PDF's own SHA-256, to record with ``review.actions.record_packet``.

    Raises
    ------
    PacketCancelled
        ``progress`` returned False; nothing was written.
    OSError
        The output cannot be written.
    """
    steps = _Steps(project, progress)
    content, _, frame, pages = _prepare(project, path_or_sha, steps, printed_utc, analysis)
    target = Path(output)
    folder = target.parent if str(target.parent) else Path(".")
    remove_leftover_temporaries(target)  # what a killed packet left (files.atomic: ours, old, named so)
    handle, temporary = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=folder)
    os.close(handle)
    try:
        data = _write_pdf(temporary, project, frame, pages, steps)
        if data is None:
            raise PacketCancelled  # noqa: TRY301 (the temporary file is removed below)
        # mkstemp makes the file readable by its owner only (0600); a packet is a document like
        # any other the user writes: the mode an ordinary new file gets under their umask.
        os.chmod(temporary, 0o666 & ~_umask())
        os.replace(temporary, target)
    except BaseException:
        Path(temporary).unlink(missing_ok=True)
        raise
    return PacketResult(str(target), hashlib.sha256(data).hexdigest(), len(pages), content.sha256)


def _umask() -> int:
    """The process's file-creation mask (read by setting it and setting it straight back)."""
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def print_packet(project: Project, path_or_sha: str | os.PathLike[str], printer: object,
                 progress: Progress | None = None, printed_utc: str | None = None,
                 analysis: object = None, resolution_dpi: int | None = LOGICAL_DPI) -> PacketResult:
    """Send the same pages to a ``QPrinter`` (set up by the caller, e.g. with ``QPrintDialog``).

    The printer is asked for A4 portrait at ``resolution_dpi`` (96 by default: plot lines are
    drawn 1.6 device pixels wide, which reads well at 96 dpi); with ``None`` it keeps its own
    resolution. At any resolution the pages are scaled to the same layout. Raises :class:`PacketCancelled` when ``progress``
    asks to stop (the printer may have received some pages by then).
    """
    from PySide6.QtPrintSupport import QPrinter

    if not isinstance(printer, QPrinter):
        raise TypeError("print_packet needs a QPrinter")
    steps = _Steps(project, progress)
    content, _, frame, pages = _prepare(project, path_or_sha, steps, printed_utc, analysis)
    if resolution_dpi is not None:
        printer.setResolution(resolution_dpi)
    printer.setFullPage(True)
    _setup_device(printer)
    printer.setDocName(f"{project.title} review packet")
    printer.setCreator(f"Stagewise {__version__}")
    if not _paint(printer, frame, pages, steps):
        printer.abort()
        raise PacketCancelled
    return PacketResult(printer.outputFileName() or None, None, len(pages), content.sha256)
