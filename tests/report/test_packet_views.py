"""The packet's plots are framed like the program's (shared framing in stagewise.present)."""

from __future__ import annotations

import math
from pathlib import Path

import pyqtgraph as pg
import pytest

from stagewise.engine.analysis import ProjectAnalysis
from stagewise.files.project_file import load_project
from stagewise.report.packet import ensure_application
from stagewise.report.plots import pole_zero_caption, pole_zero_plot

ROOT = Path(__file__).resolve().parents[2]


@pytest.mark.parametrize("demo", ["hydrophone", "greenhouse"])
def test_packet_pole_zero_plot_holds_every_pole_below_the_band_top(demo: str) -> None:
    ensure_application()
    project = load_project(ROOT / "projects" / f"{demo}.stagewise.json")
    analysis = ProjectAnalysis(project)
    f_top = project.settings.f_max_hz.si
    for stage in project.stages:
        result = analysis.isolated(stage.id)
        if result.why is not None or len(result.poles_rad_s) == 0:
            continue
        poles = [complex(p) for p in result.poles_rad_s]
        widget = pole_zero_plot(poles, [complex(z) for z in result.zeros_rad_s], f_top)
        plot = widget.ci.getItem(0, 0)
        (x_low, x_high), (y_low, y_high) = plot.getViewBox().viewRange()
        scatters = [item for item in plot.items if isinstance(item, pg.ScatterPlotItem) and item.name() == "poles"]
        (scatter,) = scatters
        x, y = scatter.getData()
        assert len(x) == len(poles)
        for xi, yi, pole in zip(x, y, poles, strict=True):
            assert x_low <= xi <= x_high and y_low <= yi <= y_high
            # Common practice, no source: a pole keeps its direction in the s-plane.
            if abs(pole) > 0 and math.hypot(xi, yi) > 0:
                assert math.isclose(math.atan2(yi, xi), math.atan2(pole.imag, pole.real), abs_tol=1e-9)
        far = sum(1 for pole in poles if abs(pole) / (2 * math.pi) > f_top)
        caption = pole_zero_caption(poles, [], f_top)
        if far:
            assert f"{far}\u00a0pole" in caption
        else:
            assert "edge ring" not in caption
