"""The packet's bench-measurement section, read back with pypdf (an independent PDF reader)."""

from __future__ import annotations

import hashlib
import json
import re
import shutil
from pathlib import Path

import numpy as np
import pytest

pypdf = pytest.importorskip("pypdf")

from stagewise.cli import main  # noqa: E402
from stagewise.engine.analysis import response_points  # noqa: E402
from stagewise.files.project_file import load_project, save_project  # noqa: E402
from stagewise.model.project import Check  # noqa: E402
from stagewise.model.values import Quantity  # noqa: E402

SAMPLE = Path(__file__).resolve().parents[1] / "ui" / "sample.stagewise.json"
F_HZ = np.logspace(1, 5, 31)


def test_each_measurement_has_its_section_with_sha256_checks_and_staleness(tmp_path: Path) -> None:
    path = tmp_path / "sample.stagewise.json"
    shutil.copyfile(SAMPLE, path)
    project = load_project(path)
    # A chain check on a measured metric (on the converter block, where the chain checks live).
    project.stages[-1].checks.append(Check(id="bench", text="Board within the predicted spread",
                                           metric="measured_inside_spread_pct", where="chain",
                                           min=Quantity.of(100)))
    project.stages[0].checks.append(Check(id="bench", text="Filter within 0.1 dB of the prediction",
                                          metric="measured_dev_db_max", where="isolated", max=Quantity.of(0.1)))
    save_project(path, project)
    _, chain, _ = response_points(project, list(F_HZ))
    assert chain is not None
    rows = [f"{float(f)!r},{float(v.real)!r},{float(v.imag)!r}" for f, v in zip(F_HZ, chain, strict=True)]
    chain_file = tmp_path / "board chain.csv"
    chain_file.write_text("f_hz,re,im\n" + "\n".join(rows) + "\n", encoding="utf-8")
    assert main(["measure", str(path), str(chain_file), "--chain", "--by", "Bench Person",
                 "--instrument", "gain-phase analyser GP-1"]) == 0
    _, rc, _ = response_points(project, list(F_HZ), "rc")
    assert rc is not None
    rc_file = tmp_path / "rc.csv"
    rc_file.write_text("Frequency (Hz),Gain (dB),Phase (deg)\n" + "\n".join(
        f"{float(f)!r},{float(20 * np.log10(abs(v)))!r},{float(np.degrees(np.angle(v)))!r}"
        for f, v in zip(F_HZ, rc, strict=True)) + "\n", encoding="utf-8")
    assert main(["measure", str(path), str(rc_file), "--stage", "rc", "--by", "Bench Person"]) == 0
    tau = 3.3e3 * 6.8e-9  # the sample's rc stage
    t_s = np.linspace(-tau, 12 * tau, 3001)
    capture = tmp_path / "rc step.csv"
    capture.write_text("Time (s),CH1 (V)\n" + "\n".join(
        f"{float(t)!r},{float(0.5 * (1 - np.exp(-t / tau)) if t >= 0 else 0.0)!r}" for t in t_s) + "\n",
        encoding="utf-8")
    assert main(["measure", str(path), str(capture), "--stage", "rc", "--by", "Bench Person"]) == 0
    # The amplifier changes after the board was measured: the chain measurement is out of date,
    # the filter's (isolated) is not.
    changed = load_project(path)
    changed.stages[1].parts[1].value = Quantity.of("15k")
    save_project(path, changed)
    output = tmp_path / "packet.pdf"
    assert main(["packet", str(path), "-o", str(output), "--by", "Quality"]) == 0
    text = re.sub(r"\s+", " ", " ".join(page.extract_text() for page in pypdf.PdfReader(str(output)).pages))
    section = text[text.index("Bench measurements"):text.index("Audit trail")]
    # Reference library: hashlib, SHA-256 of each instrument file as written.
    for data in (chain_file, rc_file):
        digest = hashlib.sha256(data.read_bytes()).hexdigest()
        assert digest in section.replace(" ", "")
    assert "Measurement board-chain: the whole chain" in section
    assert "gain-phase analyser GP-1" in section
    chain_part, rc_part = section[:section.index("Measurement rc:")], section[section.index("Measurement rc:"):]
    assert "OUT OF DATE" in chain_part and "OUT OF DATE" not in rc_part
    # The checks on measured metrics at each place, with their states: the stale chain measurement
    # gives no value; the filter equals its prediction (deviation below 1e-9 dB), so it is met.
    assert re.search(r"adc/bench .* no value .*out of date", chain_part), chain_part
    assert re.search(r"rc/bench .* met", rc_part), rc_part
    # The step capture beside the predicted step, both measured by the same code.
    # Source: first-order step, 10–90 % rise time ln(9)·RC ≈ 49.3 µs here (any control text).
    step_part = section[section.index("Measurement rc-step:"):]
    assert "predicted (per unit step)" in step_part
    assert re.search(r"Rise time \(10–90 %\) 49\.[23] ?µs 49\.[23] ?µs", step_part), step_part[:1500]
    document = json.loads(path.read_text(encoding="utf-8"))
    assert [item["id"] for item in document["measurements"]] == ["board-chain", "rc", "rc-step"]
