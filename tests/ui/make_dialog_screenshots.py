"""Render the authoring dialogs on the hydrophone demo into resources/screenshots/ (for the README).

Run from the repository root:
``QT_QPA_PLATFORM=offscreen PYTHONPATH=desktop python tests/ui/make_dialog_screenshots.py``.
Offscreen, so each dialog is grabbed with ``widget.grab()``; nothing is saved to the demo file.
"""

from __future__ import annotations

import os
import shutil
import sys
import tempfile
from pathlib import Path

from PySide6.QtCore import Qt
from PySide6.QtWidgets import QApplication

ROOT = Path(__file__).resolve().parents[2]
OUT = ROOT / "resources" / "screenshots"


def main() -> int:
    os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
    os.environ["STAGEWISE_SETTINGS"] = str(Path(tempfile.mkdtemp()) / "settings.ini")
    app = QApplication.instance() or QApplication(sys.argv)
    from stagewise.files.project_file import load_project
    from stagewise.ui.main_window import MainWindow

    work = Path(tempfile.mkdtemp()) / "hydrophone.stagewise.json"
    shutil.copyfile(ROOT / "projects" / "hydrophone.stagewise.json", work)
    window = MainWindow(load_project(work), work, interactive=False)
    window.resize(1440, 900)
    window.show()
    window.wait_until_idle(120, formula=False)
    shots = []
    shots.append(("dialog-project.png", window.project_dialog()))
    shots.append(("dialog-converter.png", window.converter_dialog()))
    window.document.set_current_stage("adc")
    shots.append(("dialog-block-stage.png", window.block_stage_dialog()))
    window.document.set_current_stage("gain")
    checks = window.check_editor_dialog()
    checks.library_name.setCurrentIndex(checks.library_name.findData("amplifier"))
    checks.library_list.item(0).setCheckState(Qt.CheckState.Checked)
    checks.list.setCurrentRow(0)
    shots.append(("dialog-checks.png", checks))
    shots.append(("dialog-opamp-library.png", window.opamp_dialog("U1")))
    OUT.mkdir(parents=True, exist_ok=True)
    for name, dialog in shots:
        dialog.show()
        app.processEvents()
        dialog.grab().save(str(OUT / name), "PNG")
        dialog.close()
        print(OUT / name)
    window.shutdown()
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
