"""Page layout of the packet: nothing runs past the margins, tables split between rows in order.

Common practice, no source: a printed review document keeps every line inside the page's
margins, never leaves a heading alone at the foot of a page, and repeats a table's header
where the table continues.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from stagewise.report.packet import ensure_application

PROJECTS = Path(__file__).resolve().parents[2] / "projects"


@pytest.fixture(autouse=True)
def _qt() -> None:
    ensure_application()


def _frame():  # type: ignore[no-untyped-def]
    from stagewise.report.layout import PageFrame

    return PageFrame(title="Layout test", revision="L", short_sha="0" * 12, footer_left="layout test")


def _check_fits(pages, frame) -> None:  # type: ignore[no-untyped-def]
    from stagewise.report.layout import Heading, Table

    body = frame.body
    for number, page in enumerate(pages, start=1):
        assert page.placed, f"page {number} is empty"
        for block, top in page.placed:
            height = block.height(body.width())
            # A block taller than a whole page may run over (none of ours is); all else fits.
            if height <= body.height():
                assert top + height <= body.height() + 0.01, (number, type(block).__name__, top, height)
            if isinstance(block, Table):
                assert sum(block._column_widths(body.width())) <= body.width() + 0.01
        last = page.placed[-1][0]
        if number < len(pages):
            assert not isinstance(last, Heading), f"page {number} ends with a heading: {last.text}"


def test_long_table_splits_between_rows_in_order() -> None:
    from stagewise.report.layout import Column, Heading, Paragraph, Table, paginate

    rows = [[str(index), f"row {index} " + "words " * (index % 7)] for index in range(160)]
    blocks = [Heading("A long table", 1), Paragraph("Before the table. " * 30), Table([Column("n", "right"),
                                                                                     Column("text")], rows)]
    frame = _frame()
    pages = paginate(blocks, frame)
    assert len(pages) > 2
    _check_fits(pages, frame)
    pieces = [block for page in pages for block, _ in page.placed if isinstance(block, Table)]
    assert len(pieces) == len(pages)
    assert [row for piece in pieces for row in piece.rows] == rows  # every row once, in order
    assert all(piece.header for piece in pieces)  # each continuation repeats the header


def test_long_paragraph_splits_between_lines_without_losing_words() -> None:
    from PySide6.QtGui import QFontMetricsF

    from stagewise.report.layout import Paragraph, paginate, wrap_text

    text = " ".join(f"word{index}" for index in range(4000))
    frame = _frame()
    pages = paginate([Paragraph(text)], frame)
    assert len(pages) > 1
    _check_fits(pages, frame)
    lines = [line for page in pages for block, _ in page.placed for line in block._lines(frame.body.width())]
    assert " ".join(lines).split() == text.split()
    metrics = QFontMetricsF(Paragraph(text)._font())
    assert all(metrics.horizontalAdvance(line) <= frame.body.width() for line in lines)
    assert wrap_text("a" * 500, metrics, 100.0)[0] != "a" * 500  # an unbroken word is cut to the width


@pytest.mark.parametrize("name", ["hydrophone", "greenhouse"])
def test_demo_packets_fit_their_pages(name: str) -> None:
    from stagewise.files.project_file import load_project
    from stagewise.report.content import gather
    from stagewise.report.layout import PageFrame, paginate
    from stagewise.report.sections import build_blocks
    from stagewise.review.checks import UnavailableProvider, evaluate_project
    from stagewise.review.signoff import signoff_states

    path = PROJECTS / f"{name}.stagewise.json"
    project = load_project(path)
    content = gather(project, path)
    assert content is not None
    provider = content.provider or UnavailableProvider("no analysis")
    blocks = build_blocks(content, evaluate_project(project, provider), signoff_states(project),
                          "2026-12-01T00:00:00Z")
    frame = PageFrame(title=project.title, revision=project.revision, short_sha=content.sha256[:12],
                      footer_left="layout test")
    _check_fits(paginate(blocks, frame), frame)
