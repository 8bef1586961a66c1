"""The "DC accuracy" view: the budget at the converter input as bars and a table, largest first."""

from __future__ import annotations

import shutil
from pathlib import Path

from conftest import make_window

GREENHOUSE = Path(__file__).resolve().parents[2] / "projects" / "greenhouse.stagewise.json"


def test_dc_view_lists_the_budget_largest_first_with_units(qtbot, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    path = tmp_path / "greenhouse.stagewise.json"
    shutil.copyfile(GREENHOUSE, path)
    window = make_window(qtbot, path)
    try:
        view = window.dc_view
        table = view.table
        assert table.rowCount() > 5
        headers = [table.horizontalHeaderItem(column).text() for column in range(table.columnCount())]
        assert headers[3] == "At the converter (mV)" and headers[4] == "Gain error (%)"
        values = [abs(float(table.item(row, 3).text())) for row in range(table.rowCount())
                  if table.item(row, 3).text() != "—"]
        assert values == sorted(values, reverse=True)
        # The bars carry the same magnitudes, largest at the top.
        widths = list(view.bars.opts["width"])
        assert widths == sorted(widths, reverse=True) and abs(widths[0] - max(values)) < 1e-3 * max(values)
        # Source: S. Franco, 3rd ed., sec. 5.1-5.2 (value from memory): the gain stage's bias current
        # through its 20 kΩ feedback resistor, 600 nA × 20 kΩ = 12.0 mV, passed to the converter by the
        # unity-gain low-pass (its finite loop gain leaves ~1e-5 of difference).
        rows = {(table.item(r, 1).text(), table.item(r, 0).text()): table.item(r, 3).text()
                for r in range(table.rowCount())}
        assert abs(float(rows[("gain", "U1 Ib")]) - 12.0) < 0.01
        summary = view.summary.text()
        assert "over 0 to 60 °C" in summary and "LSB" in summary and "% of full scale" in summary
        # The user picks the selected stage's output in chain and selects the gain stage.
        window.document.set_current_stage("gain")
        view.place.setCurrentIndex(1)
        headers = [table.horizontalHeaderItem(column).text() for column in range(table.columnCount())]
        assert headers[3] == "At the output (mV)"
        stages = {table.item(row, 1).text() for row in range(table.rowCount())}
        assert stages == {"gain"}
        rows = {table.item(r, 0).text(): table.item(r, 3).text() for r in range(table.rowCount())}
        # Source: Franco, 3rd ed., sec. 5.1-5.2 (value from memory): Vos·(1 + R2/R1) = 0.8 mV × 3.
        assert abs(float(rows["U1 Vos"]) - 2.4) < 1e-3
        assert "the output of gain, in chain" in view.summary.text()
        # Every stage up to the gain stage: the photodiode's and the transimpedance stage's terms appear too.
        view.place.setCurrentIndex(2)
        stages = {table.item(row, 1).text() for row in range(table.rowCount())}
        assert stages == {"diode", "tia", "gain"}
    finally:
        window.shutdown()
