"""Project files: canonical round trip, versions and migration, atomic save, limits."""

from __future__ import annotations

import copy
import json
import os
import stat
from pathlib import Path
from typing import Any

import pytest

from stagewise.files import project_file
from stagewise.files.codec import dumps
from stagewise.files.migrate import migrate
from stagewise.files.project_file import (
    MAX_FILE_BYTES,
    ProjectFileError,
    load_project,
    loads_project,
    save_project,
)
from stagewise.model.project import FORMAT_VERSION
from stagewise.model.values import Quantity

PROJECTS = Path(__file__).resolve().parents[2] / "projects"


def full_featured() -> dict[str, Any]:
    """A canonical document that uses every kind of record, in the codec's key order."""
    signoff = {"name": "Ines Varga", "role": "reviewer", "verdict": "accept", "note": "Checked by hand.",
               "time": "2026-11-30T10:00:00Z", "fingerprint": "0" * 64}
    return {
        "format": "stagewise-project",
        "version": 1,
        "title": "Everything at once",
        "revision": "C",
        "settings": {"f_min_hz": "0.1", "f_max_hz": "2Meg", "points_per_decade": 50, "temperature_c": -20,
                     "ref_hz": "1k", "noise_band_hz": [1, "20k"], "seed": 99, "mc_samples": 2000,
                     "mc_distribution": "normal"},
        "input": {"drive": "current", "amplitude": "2.5u"},
        "converter": {"fs_hz": "192k", "bits": 24, "full_scale_vpp": "5.6"},
        "load": {"r_ohm": "10k", "c_f": "100p"},
        "opamp_models": {
            "m1": {"description": "A model with every parameter", "a0_db": 100, "gbw_hz": "1M", "p2_hz": "5M",
                   "rout_ohm": 100, "rin_ohm": "1G", "cin_diff_f": "1p", "cin_cm_f": "2p", "en_v_rthz": "10n",
                   "en_corner_hz": 100, "in_a_rthz": "1p", "in_corner_hz": 10, "swing_v": [-2.5, "2.5"],
                   "slew_v_per_s": 1e6},
        },
        "stages": [
            {"id": "src", "name": "Sensor", "drive": "current", "ports": {"in": "s", "out": "s"},
             "parts": [{"ref": "C1", "type": "C", "nodes": ["s", "0"], "value": "1n", "tol": 0.1},
                       {"ref": "R1", "type": "R", "nodes": ["s", "0"], "value": "1G"}],
             "checks": [], "signoffs": [], "comments": [], "notes": "A shunt element: input and output are one node."},
            {"id": "amp", "name": "Amplifier", "drive": "voltage", "bypass": True, "ports": {"in": "in", "out": "out"},
             "parts": [
                 {"ref": "R1", "type": "R", "nodes": ["in", "n"], "value": "4k7", "tol": "1%"},
                 {"ref": "E1", "type": "vcvs", "nodes": ["out", "0", "n", "0"], "value": -1000},
                 {"ref": "G1", "type": "vccs", "nodes": ["x", "0", "n", "0"], "value": "1m"},
                 {"ref": "R2", "type": "R", "nodes": ["x", "0"], "value": 1000},
                 {"ref": "H1", "type": "ccvs", "nodes": ["y", "0"], "value": "1k", "control": "R2"},
                 {"ref": "F1", "type": "cccs", "nodes": ["y", "0"], "value": 2, "control": "E1"},
                 {"ref": "L1", "type": "L", "nodes": ["y", "out"], "value": "10m", "tol": "10%"},
                 {"ref": "U1", "type": "opamp", "nodes": ["0", "n", "out"], "model": "m1"},
                 {"ref": "U2", "type": "opamp", "nodes": ["y", "y", "y"], "model": "ideal"},
             ],
             "checks": [
                 {"id": "g", "text": "Gain", "metric": "gain_db", "where": "isolated", "at_hz": "1k", "min": 59,
                  "max": "61", "waiver": {"by": "Ines Varga", "role": "reviewer", "time": "2026-11-30T10:05:00Z",
                                          "justification": "Trimmed in production."}},
                 {"id": "m", "text": "Is the layout guarded?", "answer": {"answer": "yes", "by": "Ola Berg",
                                                                          "time": "2026-11-30T10:06:00Z",
                                                                          "note": "Photo 3."}},
                 {"id": "pm", "text": "Phase margin", "metric": "phase_margin_deg", "where": "in_chain", "min": 45},
             ],
             "signoffs": [signoff],
             "comments": [{"author": "Ola Berg", "time": "2026-11-30T10:07:00Z", "text": "Why 4k7?", "check": "g",
                           "resolved": True},
                          {"author": "Ines Varga", "time": "2026-11-30T10:08:00Z", "text": "See notes.",
                           "resolved": False}],
             "notes": "Ünïcödé ✓ and \"quotes\"."},
            {"id": "blk", "name": "Block", "kind": "block", "zeros_hz": [0, [2000, 0.7]], "poles_hz": ["10", [1000, 2], 50],
             "gain": "-2", "zin": {"r_ohm": None, "c_f": "10p"}, "zout_ohm": "50",
             "checks": [{"id": "n", "text": "Noise", "metric": "noise_out_rms_v", "where": "chain", "max": "10u"}],
             "notes": "Poles: real, complex pair, real."},
        ],
        "audit": [{"seq": 1, "time": "2026-11-30T10:00:00Z", "who": "Ines Varga", "what": "signoff",
                   "detail": {"stage": "amp", "nested": {"list": [1, 2.5, None, True]}}, "prev": "",
                   "hash": "a" * 64}],
    }


def canonical_text(document: dict[str, Any]) -> str:
    # The canonical form of DESIGN section 5: 2-space indent, UTF-8 (not escaped), final newline.
    return json.dumps(document, indent=2, ensure_ascii=False) + "\n"


# -- canonical round trip --------------------------------------------------------------------


@pytest.mark.parametrize("name", ["hydrophone.stagewise.json", "greenhouse.stagewise.json"])
def test_demo_files_are_canonical(name: str) -> None:
    text = (PROJECTS / name).read_text(encoding="utf-8")
    assert dumps(loads_project(text)) == text


def test_full_featured_file_round_trips_byte_for_byte(tmp_path: Path) -> None:
    # Common practice, no source: save(load(x)) == x for a canonical file (DESIGN section 5).
    text = canonical_text(full_featured())
    path = tmp_path / "full.stagewise.json"
    path.write_bytes(text.encode("utf-8"))
    project = load_project(path)
    out = tmp_path / "out.stagewise.json"
    save_project(out, project)
    assert out.read_bytes() == text.encode("utf-8")


def test_values_keep_how_they_were_written() -> None:
    project = loads_project(canonical_text(full_featured()))
    resistor = project.stages[1].parts[0]
    assert resistor.value is not None and resistor.value.raw == "4k7" and resistor.value.si == 4700.0
    assert resistor.tol is not None and resistor.tol.si == pytest.approx(0.01)
    assert project.settings.f_max_hz.raw == "2Meg"
    assert project.stages[2].poles_hz[1] == (Quantity(1000, 1000.0), Quantity(2, 2.0))


def test_design_example_canonicalises_and_is_then_stable() -> None:
    # Source: DESIGN.md section 5, the example file (compact, so not canonical as written).
    first = dumps(loads_project((Path(__file__).parent / "data" / "design_example.json").read_text(encoding="utf-8")))
    assert dumps(loads_project(first)) == first


def test_missing_optional_records_mean_empty() -> None:
    document = full_featured()
    for stage in document["stages"]:
        for key in ("checks", "signoffs", "comments", "notes"):
            stage.pop(key, None)
    del document["audit"]
    document["stages"][1]["checks"] = []
    project = loads_project(json.dumps(document))
    assert all(not stage.signoffs and not stage.comments and stage.notes == "" for stage in project.stages)
    assert project.audit == []


# -- versions --------------------------------------------------------------------------------


def test_newer_version_is_refused_naming_the_version_read() -> None:
    document = full_featured()
    document["version"] = FORMAT_VERSION + 1
    with pytest.raises(ProjectFileError) as caught:
        loads_project(json.dumps(document), "new.stagewise.json")
    message = str(caught.value)
    assert message.startswith("new.stagewise.json: version:")
    assert f"version {FORMAT_VERSION + 1}" in message
    assert f"this program reads (version {FORMAT_VERSION})" in message


def version_0_document() -> dict[str, Any]:
    """A synthetic pre-release file: no "format", stages under "chain", the drive at the top."""
    return {
        "version": 0,
        "title": "Old chain",
        "drive": "current",
        "input": {"amplitude": "1u"},
        "settings": {"f_min_hz": 1, "f_max_hz": "100k", "points_per_decade": 20, "temperature_c": 25,
                     "ref_hz": 100, "noise_band_hz": None, "seed": 3},
        "chain": [
            {"id": "pd", "name": "Photodiode", "drive": "current", "ports": {"in": "a", "out": "a"},
             "parts": [{"ref": "C1", "type": "C", "nodes": ["a", "0"], "value": "100p"}]},
        ],
    }


def test_version_0_is_migrated() -> None:
    original = version_0_document()
    kept = copy.deepcopy(original)
    project = loads_project(json.dumps(original), "old.stagewise.json")
    assert project.input.drive == "current"
    assert project.input.amplitude is not None and project.input.amplitude.si == 1e-6
    assert [stage.id for stage in project.stages] == ["pd"]
    assert original == kept  # the migration touched a copy
    saved = json.loads(dumps(project))
    assert saved["format"] == "stagewise-project" and saved["version"] == FORMAT_VERSION
    assert "chain" not in saved and "drive" not in saved


def test_version_0_oddities_reach_the_decoder_with_their_path() -> None:
    document = version_0_document()
    document["input"] = 5
    with pytest.raises(ProjectFileError) as caught:
        loads_project(json.dumps(document))
    paths = [problem.split(":")[0] for problem in caught.value.problems]
    assert "input" in paths
    document = version_0_document()
    document["stages"] = []
    with pytest.raises(ProjectFileError) as caught:
        loads_project(json.dumps(document))
    assert any('unknown key "chain"' in problem for problem in caught.value.problems)


def test_migrate_leaves_current_and_unusable_versions_to_the_decoder() -> None:
    current = full_featured()
    assert migrate(current) == current
    for odd in ("1", None, 1.5, True, -3):
        document = {"version": odd}
        assert migrate(document) == document


# -- loading limits and errors ---------------------------------------------------------------


def test_file_over_20_mb_is_refused_without_parsing(tmp_path: Path) -> None:
    path = tmp_path / "huge.stagewise.json"
    with path.open("wb") as stream:
        stream.truncate(MAX_FILE_BYTES + 1)  # sparse: no 20 MiB actually written
    with pytest.raises(ProjectFileError, match=r"over 20 MiB \(20,971,520 bytes\) are refused"):
        load_project(path)


def test_file_at_the_limit_is_parsed(tmp_path: Path) -> None:
    path = tmp_path / "edge.stagewise.json"
    text = canonical_text(full_featured())
    # Pad with JSON whitespace up to exactly the limit: read, and refused only for its content.
    path.write_bytes(text.encode("utf-8") + b" " * (MAX_FILE_BYTES - len(text.encode("utf-8"))))
    assert load_project(path).title == "Everything at once"


@pytest.mark.parametrize(
    ("content", "words"),
    [
        (b"", "not valid JSON at line 1, column 1"),
        (b"{", "not valid JSON"),
        (b"\xff\xfe{}", "not UTF-8"),
        (b'{"version": NaN}', "version: NaN is not allowed"),
        (b"[1, 2]", "expected an object"),
        (b"[" * 100000 + b"]" * 100000, "nested too deeply"),
    ],
)
def test_unreadable_content(tmp_path: Path, content: bytes, words: str) -> None:
    path = tmp_path / "bad.stagewise.json"
    path.write_bytes(content)
    with pytest.raises(ProjectFileError) as caught:
        load_project(path)
    assert words in str(caught.value)
    assert str(caught.value).startswith(str(path))


def test_byte_order_mark_is_accepted(tmp_path: Path) -> None:
    path = tmp_path / "bom.stagewise.json"
    path.write_bytes(b"\xef\xbb\xbf" + canonical_text(full_featured()).encode("utf-8"))
    assert load_project(path).revision == "C"


def test_missing_file_folder_and_device(tmp_path: Path) -> None:
    with pytest.raises(ProjectFileError, match="no such file"):
        load_project(tmp_path / "absent.stagewise.json")
    with pytest.raises(ProjectFileError, match="folder"):
        load_project(tmp_path)
    if Path("/dev/null").exists():
        with pytest.raises(ProjectFileError, match="not a regular file"):
            load_project("/dev/null")


def test_loading_never_writes(tmp_path: Path) -> None:
    path = tmp_path / "p.stagewise.json"
    document = full_featured()
    document["stages"][1]["parts"][0]["value"] = "4k7x"
    path.write_text(json.dumps(document), encoding="utf-8")
    before = sorted(os.listdir(tmp_path)), path.read_bytes(), path.stat().st_mtime_ns
    with pytest.raises(ProjectFileError):
        load_project(path)
    assert (sorted(os.listdir(tmp_path)), path.read_bytes(), path.stat().st_mtime_ns) == before


# -- atomic save -----------------------------------------------------------------------------


def _saved_once(tmp_path: Path) -> tuple[Path, bytes]:
    path = tmp_path / "p.stagewise.json"
    text = canonical_text(full_featured())
    path.write_text(text, encoding="utf-8")
    return path, text.encode("utf-8")


def test_save_keeps_the_previous_file_as_bak(tmp_path: Path) -> None:
    path, old = _saved_once(tmp_path)
    project = load_project(path)
    project.title = "Renamed"
    save_project(path, project)
    assert path.with_name(path.name + ".bak").read_bytes() == old
    assert load_project(path).title == "Renamed"
    assert sorted(os.listdir(tmp_path)) == ["p.stagewise.json", "p.stagewise.json.bak"]


def test_save_keeps_the_permission_bits(tmp_path: Path) -> None:
    path, _ = _saved_once(tmp_path)
    path.chmod(0o640)
    save_project(path, load_project(path))
    assert stat.S_IMODE(path.stat().st_mode) == 0o640


@pytest.mark.parametrize("failing", ["fsync", "replace"])
def test_failure_mid_save_leaves_the_old_file_intact(tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                                     failing: str) -> None:
    # Common practice, no source: write-to-temporary, fsync, rename is atomic on POSIX; a crash
    # before the rename must leave the old file as it was.
    path, old = _saved_once(tmp_path)
    project = load_project(path)
    save_project(path, project)  # a first save makes the .bak
    backup = path.with_name(path.name + ".bak")
    backup_before = backup.read_bytes()
    project.title = "Never written"
    real_replace = os.replace

    def broken_fsync(descriptor: int) -> None:
        raise OSError(28, "No space left on device")

    def broken_replace(source: str, target: str | Path) -> None:
        if Path(target) == path:
            raise OSError(5, "Input/output error")
        real_replace(source, target)

    if failing == "fsync":
        monkeypatch.setattr(project_file.os, "fsync", broken_fsync)
    else:
        monkeypatch.setattr(project_file.os, "replace", broken_replace)
    with pytest.raises(OSError):
        save_project(path, project)
    monkeypatch.undo()
    assert path.read_bytes() == old
    assert backup.exists() and backup.read_bytes() in (backup_before, old)
    leftovers = [name for name in os.listdir(tmp_path) if name.endswith(".tmp")]
    assert leftovers == []


def test_save_into_a_missing_folder_raises_oserror(tmp_path: Path) -> None:
    project = loads_project(canonical_text(full_featured()))
    with pytest.raises(OSError):
        save_project(tmp_path / "nope" / "p.stagewise.json", project)
