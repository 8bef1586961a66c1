"""Make the hydrophone demo's bench measurement and attach it (run once, by hand).

    /work/venv/bin/python projects/measurements/make_hydrophone_measurement.py projects/hydrophone.stagewise.json

Invented demo data, no real board: "board A" is the demo's chain with each part moved by an
amount inside its tolerance (the list below), swept by a gain-phase analyser from the hydrophone
input (a signal generator behind a 3.3 nF capacitor standing in for the element, on the same
cable) to the converter's input pins. The analyser's trace noise is modelled as 0.02 dB and
0.15° RMS on every point, plus a floor of 3 µV/V (about −110 dB) of complex noise, seeded so the
file is reproducible. The script writes ``hydrophone_board_A.csv`` beside itself as the analyser
would (six significant digits), adds one chain check ("the board lies within the predicted
spread") to the converter block through the review API (recorded as a part change), and attaches
the file with ``stagewise measure``, so the audit trail records and verifies both. It refuses a
project that already holds a measurement.
"""

from __future__ import annotations

import copy
import sys
from pathlib import Path

import numpy as np

from stagewise.cli import main
from stagewise.engine.analysis import response_points
from stagewise.files.project_file import load_project, save_project
from stagewise.model.project import Check
from stagewise.model.values import Quantity
from stagewise.review import actions
from stagewise.review.audit import unrecorded_decisions, verify_trail

HERE = Path(__file__).resolve().parent
DATA = HERE / "hydrophone_board_A.csv"
LEAD = "Maren Holt"
BENCH = "Tobias Achebe"

# Board A: each part's deviation from nominal, as a fraction (inside its tolerance).
BOARD_DEVIATIONS = {
    ("sensor", "C1"): +0.008,  # the 3.3 nF stand-in capacitor, 1 % part
    ("sensor", "C2"): +0.04,   # cable capacitance
    ("sensor", "R1"): -0.15,
    ("buffer", "R1"): +0.004,
    ("gain", "C1"): -0.06,
    ("gain", "R1"): +0.003,
    ("gain", "R2"): +0.005,
    ("gain", "R3"): -0.004,
    ("aaf1", "R1"): +0.002,
    ("aaf1", "R2"): -0.003,
    ("aaf1", "C1"): +0.025,
    ("aaf1", "C2"): -0.018,
    ("aaf2", "R1"): -0.002,
    ("aaf2", "R2"): +0.004,
    ("aaf2", "C1"): -0.03,
    ("aaf2", "C2"): +0.035,
    ("driver", "R1"): +0.006,
    ("driver", "C1"): +0.02,
}
F_HZ = np.logspace(np.log10(2.0), np.log10(200e3), 101)  # 20 points per decade
SEED = 20261203


def board_response(project_path: Path) -> np.ndarray:
    board = copy.deepcopy(load_project(project_path))
    for (stage_id, ref), deviation in BOARD_DEVIATIONS.items():
        stage = board.stage(stage_id)
        part = None if stage is None else stage.part(ref)
        if part is None or part.value is None:
            raise SystemExit(f"the demo has no part {stage_id}/{ref}")
        part.value = Quantity.of(part.value.si * (1.0 + deviation))
    _, response, why = response_points(board, list(F_HZ))
    if response is None:
        raise SystemExit(f"the board's response cannot be computed: {why}")
    generator = np.random.default_rng(SEED)
    noisy = response * 10 ** (generator.normal(0.0, 0.02, F_HZ.size) / 20.0) \
        * np.exp(1j * np.radians(generator.normal(0.0, 0.15, F_HZ.size)))
    floor = 3e-6 * (generator.normal(size=F_HZ.size) + 1j * generator.normal(size=F_HZ.size)) / np.sqrt(2.0)
    return np.asarray(noisy + floor)


def write_csv(response: np.ndarray) -> None:
    lines = [
        "# Gain-phase analyser export (invented demo data): hydrophone front-end, board A",
        "# Source 10 mV rms through a 3.3 nF capacitor on the hydrophone cable; probe at the ADC input pins",
        "Frequency (Hz),Gain (dB),Phase (deg)",
    ]
    for f_hz, value in zip(F_HZ, response, strict=True):
        lines.append(f"{f_hz:.6g},{20.0 * np.log10(abs(value)):.6g},{np.degrees(np.angle(value)):.6g}")
    DATA.write_text("\n".join(lines) + "\n", encoding="utf-8")


def main_script(project_path: Path) -> int:
    project = load_project(project_path)
    if project.measurements:
        raise SystemExit(f"{project_path} already holds a measurement; this script runs once")
    before = copy.deepcopy(project)
    converter = project.stages[-1]
    converter.checks.append(Check(
        id="bench", text="Board A, measured from the hydrophone input to the ADC pins, lies within the predicted "
                         "spread over tolerances at every measured frequency.",
        metric="measured_inside_spread_pct", where="chain", min=Quantity.of(100)))
    actions.record_part_changes(before, project, LEAD)
    save_project(project_path, project)
    write_csv(board_response(project_path))
    status = main(["measure", str(project_path), str(DATA), "--chain", "--id", "board-A", "--by", BENCH,
                   "--instrument", "gain-phase analyser, 10 Hz RBW, 8 averages",
                   "--setup", "10 mV rms source behind a 3.3 nF 1 % capacitor on the 10 m hydrophone cable; "
                              "10 MΩ probe at the ADC input pins; board A, bench at 21 °C",
                   "--note", "first article, hand-assembled"])
    saved = load_project(project_path)
    assert verify_trail(saved.audit).intact and not unrecorded_decisions(saved)
    return status


if __name__ == "__main__":
    if len(sys.argv) != 2:
        raise SystemExit(__doc__)
    sys.exit(main_script(Path(sys.argv[1])))
