"""The DC budget keys of the file format: optional, round-trip byte for byte, validated with their path."""

from __future__ import annotations

import copy
import json
from typing import Any

import pytest

from stagewise.files.codec import ProjectFileError, dumps
from stagewise.files.project_file import loads_project
from stagewise.model.fingerprint import stage_fingerprint

BASE: dict[str, Any] = {
    "format": "stagewise-project", "version": 1, "title": "dc keys", "revision": "A",
    "settings": {"f_min_hz": 1, "f_max_hz": "1M", "points_per_decade": 20, "temperature_c": 25, "ref_hz": 1000,
                 "noise_band_hz": None, "seed": 1, "temp_range_c": [-40, 85], "supply_variation_v": "0.25"},
    "input": {"drive": "voltage", "amplitude": None},
    "converter": {"fs_hz": None, "bits": 16, "full_scale_vpp": 5},
    "load": {"r_ohm": None, "c_f": None},
    "opamp_models": {"op": {"a0_db": 110, "gbw_hz": "3M", "input_type": "jfet", "vos_v": "250u",
                            "vos_drift_v_per_c": "3u", "ib_a": "20p", "ios_a": "5p", "cmrr_db": 96,
                            "psrr_db": 100}},
    "stages": [
        {"id": "amp", "name": "Amplifier", "drive": "voltage", "ports": {"in": "in", "out": "out"},
         "parts": [{"ref": "R1", "type": "R", "nodes": ["n", "0"], "value": "2k2", "tol": "0.1%",
                    "tc_ppm_per_c": 25},
                   {"ref": "R2", "type": "R", "nodes": ["n", "out"], "value": "22k", "tol": "0.1%"},
                   {"ref": "U1", "type": "opamp", "nodes": ["in", "n", "out"], "model": "op"}],
         "checks": [{"id": "off", "text": "Offset", "metric": "offset_out_v", "where": "isolated", "max": "5m"}],
         "signoffs": [], "comments": [], "notes": ""},
        {"id": "adc", "name": "Converter input", "kind": "block", "zeros_hz": [], "poles_hz": [1e6], "gain": 1,
         "zin": {"r_ohm": "10k", "c_f": None}, "zout_ohm": 0, "offset_v": "1m", "gain_error": "0.05%"},
    ],
    "audit": [],
}


def test_dc_keys_round_trip_byte_for_byte() -> None:
    # Common practice, no source: a canonical writer and its reader are inverse on valid data.
    text = json.dumps(BASE, indent=2, ensure_ascii=False) + "\n"
    project = loads_project(text)
    assert dumps(project) == text
    model = project.opamp_models["op"]
    assert (model.input_type, model.vos_v.si, model.ib_a.si, model.cmrr_db.si) == ("jfet", 250e-6, 20e-12, 96)
    assert project.stages[0].parts[0].tc_ppm_per_c.si == 25
    assert project.settings.temp_range_c[0].si == -40
    assert project.stages[1].gain_error.si == pytest.approx(5e-4)


def test_fingerprint_without_dc_keys_is_unchanged_and_with_them_it_moves() -> None:
    # Common practice, no source: a sign-off must stay current when nothing that decides behaviour changes.
    plain = copy.deepcopy(BASE)
    for key in ("input_type", "vos_v", "vos_drift_v_per_c", "ib_a", "ios_a", "cmrr_db", "psrr_db"):
        del plain["opamp_models"]["op"][key]
    del plain["stages"][0]["parts"][0]["tc_ppm_per_c"]
    project = loads_project(json.dumps(plain))
    stage = project.stages[0]
    before = stage_fingerprint(stage, project)
    # The fingerprint of a model without DC keys is that of the format before them: no new keys.
    from stagewise.model.fingerprint import behaviour_document  # noqa: PLC0415

    document = behaviour_document(stage, project)
    assert "vos_v" not in document["opamp_models"]["op"] and "tc_ppm_per_c" not in document["parts"][0]
    with_dc = loads_project(json.dumps(BASE))
    assert stage_fingerprint(with_dc.stages[0], with_dc) != before


@pytest.mark.parametrize(("path", "value", "words"), [
    (("opamp_models", "op", "vos_v"), "-1m", "must not be negative"),
    (("opamp_models", "op", "input_type"), "mosfet", "is not one of cmos, jfet, bipolar"),
    (("opamp_models", "op", "cmrr_db"), 0, "must be greater than zero"),
    (("settings", "supply_variation_v"), "-1", "must not be negative"),
    (("stages", 0, "parts", 0, "tc_ppm_per_c"), "-5", "must not be negative"),
    (("stages", 1, "gain_error"), "150%", "is not a tolerance"),
])
def test_bad_dc_values_name_their_json_path(path: tuple[Any, ...], value: Any, words: str) -> None:
    document = copy.deepcopy(BASE)
    target = document
    for piece in path[:-1]:
        target = target[piece]
    target[path[-1]] = value
    with pytest.raises(ProjectFileError) as caught:
        loads_project(json.dumps(document))
    joined = ".".join(f"[{p}]" if isinstance(p, int) else p for p in path).replace(".[", "[")
    assert any(problem.startswith(joined + ":") and words in problem for problem in caught.value.problems), \
        caught.value.problems


def test_temperature_range_must_rise() -> None:
    document = copy.deepcopy(BASE)
    document["settings"]["temp_range_c"] = [85, -40]
    with pytest.raises(ProjectFileError, match=r"settings\.temp_range_c: the low end"):
        loads_project(json.dumps(document))


def test_circuit_stage_refuses_block_dc_keys() -> None:
    document = copy.deepcopy(BASE)
    document["stages"][0]["offset_v"] = "1m"
    with pytest.raises(ProjectFileError, match=r"stages\[0\]\.offset_v: a circuit stage takes no"):
        loads_project(json.dumps(document))


def test_diff_names_a_change_of_the_dc_keys() -> None:
    from stagewise.review.diff import diff_projects  # noqa: PLC0415

    old = loads_project(json.dumps(BASE))
    changed = copy.deepcopy(BASE)
    changed["stages"][0]["parts"][0]["tc_ppm_per_c"] = 50
    changed["stages"][1]["offset_v"] = "2m"
    changed["settings"]["temp_range_c"] = [-20, 70]
    changed["opamp_models"]["op"]["ib_a"] = "40p"
    new = loads_project(json.dumps(changed))
    # Common practice, no source: a review diff names every change that decides behaviour.
    fields = {(change.stage_id, change.field) for change in diff_projects(old, new).changes}
    assert {("amp", "tc_ppm_per_c"), ("adc", "offset_v"), (None, "temp_range_c"), (None, "ib_a")} <= fields
