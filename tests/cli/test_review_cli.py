"""`stagewise check`, `verify` and `diff` through the command line (DESIGN section 6)."""

from __future__ import annotations

import copy
import json
import math
import subprocess
import sys
from pathlib import Path
from typing import Any

import pytest

from stagewise.cli import main
from stagewise.files.project_file import load_project, save_project
from stagewise.model.project import Project
from stagewise.model.values import Quantity
from stagewise.review import actions

T = "2026-11-04T09:00:00Z"

# A passive RC low-pass and a manual check; values of our own.
DOCUMENT: dict[str, Any] = {
    "format": "stagewise-project", "version": 1, "title": "CLI review test", "revision": "1",
    "stages": [
        {"id": "rc", "name": "RC", "ports": {"in": "in", "out": "out"},
         "parts": [{"ref": "R1", "type": "R", "nodes": ["in", "out"], "value": "2k2"},
                   {"ref": "C1", "type": "C", "nodes": ["out", "0"], "value": "10n"}],
         "checks": [
             {"id": "corner", "text": "Corner between 6 and 8 kHz", "metric": "f_high_3db_hz",
              "where": "isolated", "min": "6k", "max": "8k"},
             {"id": "fit", "text": "Does C1 fit the footprint?"},
         ]},
    ],
}


class ClosedFormProvider:
    """f_c = 1/(2πRC) of the RC stage.

    Source: first-order RC low-pass corner, any circuits text (Nilsson & Riedel, *Electric Circuits*).
    """

    def __init__(self, project: Project) -> None:
        stage = project.stage("rc")
        assert stage is not None
        r1, c1 = stage.part("R1"), stage.part("C1")
        assert r1 is not None and r1.value is not None and c1 is not None and c1.value is not None
        self.corner_hz = 1 / (2 * math.pi * r1.value.si * c1.value.si)

    def metric_value(self, metric: str, where: str, stage_id: str,
                     at_hz: float | None) -> tuple[float | None, str | None]:
        if metric == "f_high_3db_hz":
            return self.corner_hz, None
        return None, "not in this test provider"


@pytest.fixture
def closed_form(monkeypatch: pytest.MonkeyPatch) -> None:
    import stagewise.commands.check as check_command

    monkeypatch.setattr(check_command, "metric_provider_for", ClosedFormProvider)


def _write(tmp_path: Path, document: dict[str, Any], name: str = "p.stagewise.json") -> Path:
    path = tmp_path / name
    path.write_text(json.dumps(document, indent=2), encoding="utf-8")
    return path


def _run(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[int, str, str]:
    status = main(list(argv))
    captured = capsys.readouterr()
    return status, captured.out, captured.err


def test_check_exit_0_when_met_or_answered(tmp_path: Path, capsys: pytest.CaptureFixture[str], closed_form: None) -> None:
    document = copy.deepcopy(DOCUMENT)
    path = _write(tmp_path, document)
    _record(path, lambda project: actions.answer(project, "rc", "fit", "yes", "Ana", time=T))
    # 2k2 and 10n: f_c = 1/(2π·2200·1e-8) ≈ 7.23 kHz, inside 6…8 kHz.
    status, out, err = _run(capsys, "check", str(path))
    assert status == 0, out + err
    assert "met" in out and "7.234 kHz" in out
    assert "2 checks: 2 met, 0 not met" in out


def test_check_exit_1_when_not_met_open_or_answered_no(tmp_path: Path, capsys: pytest.CaptureFixture[str],
                                                      closed_form: None) -> None:
    # Manual check still open.
    status, out, _ = _run(capsys, "check", str(_write(tmp_path, DOCUMENT)))
    assert status == 1 and "open" in out
    # Corner not met: 10n -> 22n gives f_c ≈ 3.29 kHz.
    document = copy.deepcopy(DOCUMENT)
    document["stages"][0]["parts"][1]["value"] = "22n"
    path = _write(tmp_path, document)
    _record(path, lambda project: actions.answer(project, "rc", "fit", "yes", "Ana", time=T))
    status, out, _ = _run(capsys, "check", str(path))
    assert status == 1 and "not met" in out and "below the minimum" in out
    # The same not-met check waived passes.
    _record(path, lambda project: actions.waive(project, "rc", "corner", "Ben", "", "accepted lower band", time=T))
    status, out, _ = _run(capsys, "check", str(path))
    assert status == 0 and "waived" in out
    # A manual check answered no fails.
    _record(path, lambda project: actions.answer(project, "rc", "fit", "no", "Ana", time=T))
    status, _, _ = _run(capsys, "check", str(path))
    assert status == 1


def test_check_exit_1_without_value(tmp_path: Path, capsys: pytest.CaptureFixture[str], closed_form: None) -> None:
    document = copy.deepcopy(DOCUMENT)
    document["stages"][0]["checks"][0]["metric"] = "rise_s"
    document["stages"][0]["checks"][0]["min"] = 0
    document["stages"][0]["checks"][0]["max"] = "1m"
    document["stages"][0]["checks"][1]["answer"] = {"answer": "n/a", "by": "Ana", "time": T}
    status, out, _ = _run(capsys, "check", str(_write(tmp_path, document)))
    assert status == 1 and "no value" in out and "not in this test provider" in out


def test_check_json(tmp_path: Path, capsys: pytest.CaptureFixture[str], closed_form: None) -> None:
    status, out, _ = _run(capsys, "check", str(_write(tmp_path, DOCUMENT)), "--json")
    report = json.loads(out)
    assert status == 1
    assert [(c["id"], c["state"]) for c in report["checks"]] == [("corner", "met"), ("fit", "open")]
    assert report["checks"][0]["value"] == pytest.approx(1 / (2 * math.pi * 2200 * 10e-9))
    assert report["totals"]["open"] == 1 and len(report["sha256"]) == 64


@pytest.mark.parametrize("content", [b"{not json", b'{"format": "stagewise-project", "version": 1}',
                                     json.dumps({**DOCUMENT, "stages": [{**DOCUMENT["stages"][0], "checks": [
                                         {"id": "x", "text": "y", "metric": "no_such_metric", "max": 1}]}]}).encode()])
def test_check_verify_exit_2_when_the_file_cannot_be_read(tmp_path: Path, capsys: pytest.CaptureFixture[str],
                                                          content: bytes) -> None:
    path = tmp_path / "bad.stagewise.json"
    path.write_bytes(content)
    for command in ("check", "verify"):
        status, out, err = _run(capsys, command, str(path))
        assert status == 2 and out == ""
        assert err.startswith("stagewise: ") and len(err.strip().splitlines()) == 1
    status, _, err = _run(capsys, "check", str(tmp_path / "missing.stagewise.json"))
    assert status == 2 and "no such file" in err


def _record(path: Path, action: Any) -> None:
    project = load_project(path)
    action(project)
    save_project(path, project)


def _reviewed(tmp_path: Path) -> Path:
    path = _write(tmp_path, DOCUMENT)
    project = load_project(path)
    actions.sign(project, "rc", "Ana Ruiz", "design lead", "accept", time=T)
    actions.comment(project, "rc", "Ben Okafor", "Is 10n available in C0G?", check_id="fit", time=T)
    actions.answer(project, "rc", "fit", "yes", "Ben Okafor", time=T)
    save_project(path, project)
    return path


def test_verify_intact_and_every_kind_of_hand_edit(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = _reviewed(tmp_path)
    status, out, _ = _run(capsys, "verify", str(path))
    assert status == 0 and "intact: 3 events" in out
    original = json.loads(path.read_text(encoding="utf-8"))

    def edited(change: Any) -> tuple[int, str]:
        document = copy.deepcopy(original)
        change(document)
        status, out, _ = _run(capsys, "verify", str(_write(tmp_path, document, "edited.stagewise.json")))
        return status, out

    # An event's detail edited by hand.
    status, out = edited(lambda d: d["audit"][1]["detail"].update(text="Is 10n available?"))
    assert status == 1 and "(seq 2)" in out and "does not match its hash" in out
    # An event deleted.
    status, out = edited(lambda d: d["audit"].pop(1))
    assert status == 1 and "(seq 3)" in out
    # Two events swapped.
    status, out = edited(lambda d: d["audit"].reverse())
    assert status == 1 and "event 1 of 3 (seq 3)" in out
    # A sign-off pasted in by hand, with no event: the chain is intact, the record is not.
    def paste(document: dict[str, Any]) -> None:
        signoff = dict(document["stages"][0]["signoffs"][0], name="Someone Else")
        document["stages"][0]["signoffs"].append(signoff)
    status, out = edited(paste)
    assert status == 1 and "intact" in out and "sign-off 2 (accepted by Someone Else) has no matching audit event" in out


def test_verify_names_a_signoff_refreshed_by_hand(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = _reviewed(tmp_path)
    project = load_project(path)
    stage = project.stage("rc")
    assert stage is not None
    stage.parts[0].value = Quantity.of("2k4")
    # Someone "refreshes" the stale sign-off by pasting the new fingerprint into it.
    from stagewise.model.fingerprint import stage_fingerprint

    stage.signoffs[0].fingerprint = stage_fingerprint(stage, project)
    save_project(path, project)
    status, out, _ = _run(capsys, "verify", str(path))
    assert status == 1 and "sign-off 1" in out


def test_diff_names_the_change_and_the_stale_signoff(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    old_path = _reviewed(tmp_path)
    project = load_project(old_path)
    saved = copy.deepcopy(project)
    stage = project.stage("rc")
    assert stage is not None
    stage.parts[1].value = Quantity.of("12n")
    actions.record_part_changes(saved, project, "Ana Ruiz", time=T)
    new_path = tmp_path / "new.stagewise.json"
    save_project(new_path, project)
    status, out, _ = _run(capsys, "diff", str(old_path), str(new_path))
    assert status == 1
    assert "stage rc, part C1: value changed 10n → 12n" in out
    assert "out of date: stage rc, accepted by Ana Ruiz, design lead" in out
    status, out, _ = _run(capsys, "diff", str(old_path), str(old_path))
    assert status == 0 and "no differences" in out
    status, _, err = _run(capsys, "diff", str(old_path), str(tmp_path / "missing.json"))
    assert status == 2 and "no such file" in err
    # The new file's trail, with the part-change event, verifies.
    assert _run(capsys, "verify", str(new_path))[0] == 0


def test_commands_run_as_a_program(tmp_path: Path) -> None:
    path = _reviewed(tmp_path)
    completed = subprocess.run([sys.executable, "-m", "stagewise", "verify", str(path)],
                               capture_output=True, text=True, timeout=60, check=False)
    assert completed.returncode == 0, completed.stderr
    assert "intact" in completed.stdout


def test_verify_is_blind_to_reformatting(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # The hash is over the canonical form of the parsed event, not over the file's bytes.
    path = _reviewed(tmp_path)
    document = json.loads(path.read_text(encoding="utf-8"))
    path.write_text(json.dumps(document, indent=5, sort_keys=True, ensure_ascii=True), encoding="utf-8")
    status, out, _ = _run(capsys, "verify", str(path))
    assert status == 0 and "intact" in out


def test_check_with_an_unsolvable_stage_reports_no_value_and_exit_1(tmp_path: Path,
                                                                    capsys: pytest.CaptureFixture[str]) -> None:
    pytest.importorskip("stagewise.engine.analysis")
    # Two ideal voltage sources driving one node: the branch currents are undetermined
    # (Source: modified nodal analysis has no solution for a loop of voltage sources; any circuits text).
    document = {"format": "stagewise-project", "version": 1, "title": "Singular", "stages": [
        {"id": "bad", "name": "Two sources on one node", "ports": {"in": "in", "out": "out"},
         "parts": [{"ref": "R1", "type": "R", "nodes": ["in", "0"], "value": "1k"},
                   {"ref": "E1", "type": "vcvs", "nodes": ["out", "0", "in", "0"], "value": 2},
                   {"ref": "E2", "type": "vcvs", "nodes": ["out", "0", "in", "0"], "value": 3}],
         "checks": [{"id": "g", "text": "Gain", "metric": "gain_db", "where": "isolated", "at_hz": 1000, "min": 0}]}]}
    status, out, err = _run(capsys, "check", str(_write(tmp_path, document)))
    assert status == 1 and err == ""
    assert "no value" in out and "E1" in out and "E2" in out


DEMO = Path(__file__).resolve().parents[2] / "projects" / "hydrophone.stagewise.json"


def _divider_db(f_hz: float, r_bias_ohm: float) -> float:
    # Source: impedances R and 1/(sC) in a voltage divider (Nilsson & Riedel, Electric Circuits).
    # Sensor: C1 3n3 ∥ R1 10G in series, C2 150p to node 0; the follower's input adds its bias
    # resistor and its 3 pF common-mode capacitance (its differential 4 pF is bootstrapped by
    # the loop and left out, a few millidecibels at 20 Hz).
    s = 2j * math.pi * f_hz
    series = 1 / (s * 3.3e-9 + 1 / 10e9)
    shunt = 1 / (s * (150e-12 + 3e-12) + 1 / r_bias_ohm)
    return 20 * math.log10(abs(shunt / (series + shunt)))


def test_diff_tells_the_check_that_moves_and_the_rework_it_answers(tmp_path: Path,
                                                                   capsys: pytest.CaptureFixture[str]) -> None:
    # Regression: raising the buffer's bias resistor moved the sensor's 20 Hz check from not met
    # to met, and diff listed only the part change.
    old = tmp_path / "old.stagewise.json"
    old.write_bytes(DEMO.read_bytes())
    project = load_project(old)
    buffer = project.stage("buffer")
    assert buffer is not None
    buffer.parts[0].value = Quantity.of("10M")
    new = tmp_path / "new.stagewise.json"
    save_project(new, project)
    status, out, _ = _run(capsys, "diff", str(old), str(new))
    assert status == 1
    assert "stage buffer, part R1: value changed 2M2 → 10M" in out
    line = next(line for line in out.splitlines() if "check lf-20hz" in line)
    assert "not met" in line and "→ met" in line and "returned for rework by Tobias Achebe" in line
    status, out, _ = _run(capsys, "diff", str(old), str(new), "--json")
    assert status == 1
    document = json.loads(out)
    assert {"parts", "settings", "checks", "signoffs_stale", "records_added", "records_removed"} <= set(document)
    assert [(c["subject"], c["old"], c["new"]) for c in document["parts"]] == [("part R1", "2M2", "10M")]
    move = next(c for c in document["checks"] if c["check"] == "lf-20hz")
    assert (move["old_state"], move["new_state"]) == ("not met", "met")
    assert move["old_value"] == pytest.approx(_divider_db(20, 2.2e6), abs=0.05)
    assert move["new_value"] == pytest.approx(_divider_db(20, 10e6), abs=0.05)
    assert move["rework_signoffs"] and move["rework_signoffs"][0].startswith("Tobias Achebe")


def test_diff_reports_removed_records_and_is_silent_on_no_change(tmp_path: Path,
                                                                 capsys: pytest.CaptureFixture[str]) -> None:
    # Regression: deleting a "returned for rework" sign-off, an answer or a waiver from the file
    # made diff say "no differences".
    old = tmp_path / "old.stagewise.json"
    old.write_bytes(DEMO.read_bytes())
    status, out, _ = _run(capsys, "diff", str(old), str(old))
    assert status == 0 and "no differences" in out
    document = json.loads(DEMO.read_text(encoding="utf-8"))
    for stage in document["stages"]:
        if stage["id"] == "sensor":
            stage["signoffs"] = []
        if stage["id"] == "driver":
            del stage["checks"][3]["waiver"]
    new = _write(tmp_path, document, "new.stagewise.json")
    status, out, _ = _run(capsys, "diff", str(old), str(new), "--json")
    assert status == 1
    removed = json.loads(out)["records_removed"]
    assert {(r["kind"], r["stage"], r["who"]) for r in removed} == {("sign-off", "sensor", "Tobias Achebe"),
                                                                    ("waiver", "driver", "Tobias Achebe")}
    assert json.loads(out)["records_added"] == []
