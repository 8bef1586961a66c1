"""The PDF review packet (DESIGN section 8): Qt's QPdfWriter/QPainter, pyqtgraph plots as vectors.

Public entry points live in :mod:`stagewise.report.packet`: ``build_packet`` (PDF file) and
``print_packet`` (QPrinter).
"""

from stagewise.ui.qt_guard import protect_singletons

protect_singletons()
