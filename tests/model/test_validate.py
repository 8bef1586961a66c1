"""Every validation rule, each through the loader, each naming its JSON path.

The base document is the example of DESIGN section 5 (which must load as it is); each case
breaks it in one place and expects a problem that starts with that place's JSON path.
"""

from __future__ import annotations

import copy
import json
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest

from stagewise.files.project_file import ProjectFileError, loads_project
from stagewise.model.project import Part, Project, Stage
from stagewise.model.validate import validate
from stagewise.model.values import Quantity

DESIGN_EXAMPLE = Path(__file__).resolve().parents[1] / "files" / "data" / "design_example.json"


def design_example() -> dict[str, Any]:
    """The example file of DESIGN section 5, key for key (copied into tests/files/data)."""
    document: dict[str, Any] = json.loads(DESIGN_EXAMPLE.read_text(encoding="utf-8"))
    return document


def problems_of(document: dict[str, Any]) -> list[str]:
    try:
        loads_project(json.dumps(document), "test.stagewise.json")
    except ProjectFileError as error:
        return error.problems
    return []


def test_design_example_loads() -> None:
    # Source: DESIGN.md section 5: "A file with exactly the keys of this example must load".
    project = loads_project(json.dumps(design_example()))
    assert [stage.id for stage in project.stages] == ["buf", "adc"]
    assert project.stages[0].parts[0].value is not None
    assert project.stages[0].parts[0].value.si == 1e6
    assert project.stages[1].is_block


def _set(path: tuple[Any, ...], value: Any) -> Callable[[dict[str, Any]], None]:
    def apply(document: dict[str, Any]) -> None:
        node: Any = document
        for piece in path[:-1]:
            node = node[piece]
        node[path[-1]] = value

    return apply


def _delete(path: tuple[Any, ...]) -> Callable[[dict[str, Any]], None]:
    def apply(document: dict[str, Any]) -> None:
        node: Any = document
        for piece in path[:-1]:
            node = node[piece]
        del node[path[-1]]

    return apply


def _append_part(part: dict[str, Any]) -> Callable[[dict[str, Any]], None]:
    def apply(document: dict[str, Any]) -> None:
        document["stages"][0]["parts"].append(part)

    return apply


def _both(*steps: Callable[[dict[str, Any]], None]) -> Callable[[dict[str, Any]], None]:
    def apply(document: dict[str, Any]) -> None:
        for step in steps:
            step(document)

    return apply


S0 = ("stages", 0)
P0 = (*S0, "parts", 0)
P1 = (*S0, "parts", 1)
ADC = ("stages", 1)

# (case id, how to break the example, the JSON path the problem must name, a word it must say)
# Common practice, no source: each is a rule of DESIGN section 3.2, 5 or the list.
CASES: list[tuple[str, Callable[[dict[str, Any]], None], str, str]] = [
    ("unknown part type", _set((*P0, "type"), "resistor"), "stages[0].parts[0].type", "not a part type"),
    ("bad value", _set((*P0, "value"), "4k7x"), "stages[0].parts[0].value", '"4k7x" is not a value'),
    ("value that holds code", _set((*P0, "value"), "__import__('os').system('x')"),
     "stages[0].parts[0].value", "is not a value"),
    ("zero resistance", _set((*P0, "value"), 0), "stages[0].parts[0].value", "greater than zero"),
    ("negative capacitance", _append_part({"ref": "C1", "type": "C", "nodes": ["in", "0"], "value": "-1n"}),
     "stages[0].parts[2].value", "greater than zero"),
    ("missing value", _delete((*P0, "value")), "stages[0].parts[0].value", "needs a value"),
    ("tolerance of 100 %", _set((*P0, "tol"), "100%"), "stages[0].parts[0].tol", "tolerance"),
    ("duplicate ref", _set((*P1, "ref"), "R1"), "stages[0].parts[1].ref", "R1"),
    ("wrong node count", _set((*P0, "nodes"), ["in"]), "stages[0].parts[0].nodes", "2 nodes"),
    ("empty node name", _set((*P0, "nodes"), ["in", " "]), "stages[0].parts[0].nodes", "node 2"),
    ("controlled source naming a missing part",
     _append_part({"ref": "F1", "type": "cccs", "nodes": ["out", "0"], "value": 2, "control": "R9"}),
     "stages[0].parts[2].control", '"R9" is not a part'),
    ("controlled source without control",
     _append_part({"ref": "H1", "type": "ccvs", "nodes": ["out", "0"], "value": 2}),
     "stages[0].parts[2].control", "needs the ref"),
    ("control by a current source",
     _both(_append_part({"ref": "G1", "type": "vccs", "nodes": ["out", "0", "in", "0"], "value": "1m"}),
           _append_part({"ref": "F1", "type": "cccs", "nodes": ["out", "0"], "value": 2, "control": "G1"})),
     "stages[0].parts[3].control", "cannot control"),
    ("control on a resistor", _set((*P0, "control"), "U1"), "stages[0].parts[0].control", "only ccvs and cccs"),
    ("model on a resistor", _set((*P0, "model"), "generic-10M"), "stages[0].parts[0].model", "only op-amps"),
    ("op-amp model that does not exist", _set((*P1, "model"), "super-99G"), "stages[0].parts[1].model",
     '"super-99G" is not an op-amp model'),
    ("op-amp without model", _delete((*P1, "model")), "stages[0].parts[1].model", "needs a model"),
    ("op-amp with a value", _set((*P1, "value"), 5), "stages[0].parts[1].value", "model, not a value"),
    ("port naming no node", _set((*S0, "ports", "out"), "vout"), "stages[0].ports.out", '"vout" is not a node'),
    ("port on node 0", _set((*S0, "ports", "in"), "0"), "stages[0].ports", "node 0"),
    ("stage with no path to node 0",
     _append_part({"ref": "R2", "type": "R", "nodes": ["x", "y"], "value": "1k"}),
     "stages[0].parts", "no path to node 0"),
    ("current-driven series resistor: nothing sets a voltage",
     _both(_set((*S0, "parts"), [{"ref": "R1", "type": "R", "nodes": ["in", "out"], "value": "1k"}]),
           _set((*S0, "drive"), "current")),
     "stages[0].parts", "a current drive sets a current"),
    ("duplicate stage id", _set((*ADC, "id"), "buf"), "stages[1].id", '"buf" is used by another stage'),
    ("f_min >= f_max", _set(("settings", "f_min_hz"), "2M"), "settings.f_min_hz", "below f_max_hz"),
    ("f_min = f_max", _set(("settings", "f_min_hz"), 1e6), "settings.f_min_hz", "below f_max_hz"),
    ("negative frequency", _set(("settings", "f_max_hz"), -5), "settings.f_max_hz", "greater than zero"),
    ("negative temperature in kelvin", _set(("settings", "temperature_c"), -300), "settings.temperature_c",
     "absolute zero"),
    ("zero kelvin", _set(("settings", "temperature_c"), -273.15), "settings.temperature_c", "absolute zero"),
    ("reversed noise band", _set(("settings", "noise_band_hz"), [20000, 10]), "settings.noise_band_hz",
     "lower edge"),
    ("noise band of one value", _set(("settings", "noise_band_hz"), [10]), "settings.noise_band_hz",
     "two values"),
    ("no points", _set(("settings", "points_per_decade"), 0), "settings.points_per_decade", "between 1"),
    ("points not whole", _set(("settings", "points_per_decade"), 10.5), "settings.points_per_decade",
     "whole number"),
    ("too many points", _both(_set(("settings", "f_min_hz"), "1f"), _set(("settings", "points_per_decade"), 10000)),
     "settings.points_per_decade", "frequency points"),
    ("ref_hz outside the sweep", _set(("settings", "ref_hz"), "2M"), "settings.ref_hz", "outside"),
    ("negative seed", _set(("settings", "seed"), -1), "settings.seed", "negative"),
    ("no Monte Carlo samples", _set(("settings", "mc_samples"), 0), "settings.mc_samples", "between 1"),
    ("unknown distribution", _set(("settings", "mc_distribution"), "cauchy"), "settings.mc_distribution",
     "uniform"),
    ("converter bits", _set(("converter", "bits"), 0), "converter.bits", "between 1 and 32"),
    ("converter rate", _set(("converter", "fs_hz"), 0), "converter.fs_hz", "greater than zero"),
    ("unknown drive", _set(("input", "drive"), "charge"), "input.drive", "voltage"),
    ("negative load", _set(("load", "r_ohm"), "-1k"), "load.r_ohm", "greater than zero"),
    ("absurd open-loop gain", _set(("opamp_models", "generic-10M", "a0_db"), 400), "opamp_models.generic-10M.a0_db",
     "ideal"),
    ("op-amp model without gbw", _delete(("opamp_models", "generic-10M", "gbw_hz")), "opamp_models.generic-10M",
     'missing key "gbw_hz"'),
    ("reversed swing", _set(("opamp_models", "generic-10M", "swing_v"), [4, -4]), "opamp_models.generic-10M.swing_v",
     "low limit"),
    ("model named ideal", _set(("opamp_models", "ideal"), {"a0_db": 100, "gbw_hz": "1M"}), "opamp_models.ideal",
     "reserved"),
    ("duplicate check id",
     _set((*S0, "checks"), [{"id": "gain", "text": "Once?"}, {"id": "gain", "text": "Again?"}]),
     "stages[0].checks[1].id", "another check"),
    ("unknown metric", _set((*S0, "checks", 0, "metric"), "gain_dbv"), "stages[0].checks[0].metric",
     "not a metric"),
    ("numeric check without limits", _both(_delete((*S0, "checks", 0, "min")), _delete((*S0, "checks", 0, "max"))),
     "stages[0].checks[0]", "min, max or both"),
    ("min above max", _set((*S0, "checks", 0, "min"), 1), "stages[0].checks[0].min", "above max"),
    ("unknown where", _set((*S0, "checks", 0, "where"), "everywhere"), "stages[0].checks[0].where", "in_chain"),
    ("comment on a missing check",
     _set((*S0, "comments"), [{"author": "A. Reviewer", "time": "2026-01-01T00:00:00Z", "text": "?", "check": "nope",
                               "resolved": False}]),
     "stages[0].comments[0].check", '"nope" names no check'),
    ("sign-off verdict", _set((*S0, "signoffs"), [{"name": "A", "role": "r", "verdict": "maybe", "note": "",
                                                   "time": "t", "fingerprint": "f"}]),
     "stages[0].signoffs[0].verdict", "accept, rework"),
    ("block without gain", _delete((*ADC, "gain")), "stages[1].gain", "needs a gain"),
    ("block with parts", _set((*ADC, "parts"), []), "stages[1].parts", "block stage takes no"),
    ("circuit with a gain", _set((*S0, "gain"), 2), "stages[0].gain", "circuit stage takes no"),
    ("block pole at 0 Hz", _set((*ADC, "poles_hz"), [0]), "stages[1].poles_hz[0]", "not stable"),
    ("block with more zeros than poles", _set((*ADC, "zeros_hz"), [10, 20]), "stages[1].zeros_hz", "as many poles"),
    ("block pair with zero Q", _set((*ADC, "poles_hz"), [[1000, 0]]), "stages[1].poles_hz[0]", "greater than zero"),
    ("unknown key at the top", _set(("colour",), "red"), "(document)", 'unknown key "colour"'),
    ("unknown key in a part", _set((*P0, "colour"), "red"), "stages[0].parts[0]", 'unknown key "colour"'),
    ("unknown key in settings", _set(("settings", "f_mid_hz"), 5), "settings", 'unknown key "f_mid_hz"'),
    ("missing title", _delete(("title",)), "(document)", 'missing key "title"'),
    ("empty stage name", _set((*S0, "name"), "  "), "stages[0].name", "empty"),
    ("wrong format", _set(("format",), "other-tool"), "format", "not a Stagewise project"),
    ("stages not a list", _set(("stages",), {"buf": {}}), "stages", "expected a list"),
]


@pytest.mark.parametrize(("name", "breaks", "path", "words"), CASES, ids=[case[0] for case in CASES])
def test_rule_names_its_json_path(name: str, breaks: Callable[[dict[str, Any]], None], path: str, words: str) -> None:
    document = design_example()
    breaks(document)
    problems = problems_of(document)
    assert problems, f"{name}: the broken file loaded"
    matching = [problem for problem in problems if problem.startswith(f"{path}:") or problem.startswith(f"{path}.")]
    assert matching, f"{name}: no problem names {path}: {problems}"
    assert any(words in problem for problem in matching), f"{name}: {matching}"


def test_every_problem_is_listed_at_once() -> None:
    document = design_example()
    _set((*P0, "value"), "4k7x")(document)
    _set((*P1, "model"), "nonexistent")(document)
    _set(("settings", "temperature_c"), -500)(document)
    _set(("colour",), "red")(document)
    _set((*ADC, "zout_ohm"), "abc")(document)
    with pytest.raises(ProjectFileError) as caught:
        loads_project(json.dumps(document), "x.stagewise.json")
    problems = caught.value.problems
    # The decoder's problems (syntax, unknown keys, values) come all together; semantic ones
    # (the missing model, the temperature) follow once the document decodes.
    paths = [problem.split(":")[0] for problem in problems]
    assert "stages[0].parts[0].value" in paths
    assert "(document)" in paths
    assert "stages[1].zout_ohm" in paths
    assert str(caught.value).startswith("x.stagewise.json: 3 problems: ")


def test_semantic_problems_are_listed_together() -> None:
    document = design_example()
    _set((*P1, "model"), "nonexistent")(document)
    _set(("settings", "temperature_c"), -500)(document)
    _set((*S0, "ports", "out"), "nowhere")(document)
    problems = problems_of(document)
    paths = {problem.split(":")[0] for problem in problems}
    assert {"stages[0].parts[1].model", "settings.temperature_c", "stages[0].ports.out"} <= paths


def test_validate_works_on_a_model_built_in_code() -> None:
    # The GUI edits the model directly and validates before saving.
    stage = Stage(id="s", name="S", parts=[Part("R1", "R", ["in", "out"], Quantity.of("1k")),
                                           Part("R2", "R", ["x", "y"], Quantity.of("1k"))])
    project = Project(title="T", stages=[stage])
    problems = validate(project)
    # Common practice, no source: a resistor between two otherwise unconnected nodes floats.
    assert any(problem.startswith("stages[0].parts:") and "no path to node 0" in problem for problem in problems)
    stage.parts[1] = Part("R2", "R", ["out", "0"], Quantity.of("1k"))
    assert validate(project) == []
    # A series resistor alone is referenced to node 0 by the voltage drive at its input.
    stage.parts.pop()
    assert validate(project) == []


def test_a_broken_example_does_not_leak_between_cases() -> None:
    first = design_example()
    second = copy.deepcopy(first)
    _set((*P0, "value"), "bad")(first)
    assert problems_of(second) == []


# Common practice, no source (SI Brochure, 9th ed., for the unit symbols): a value written with
# a unit must carry the unit of the part it sits on; a bare number takes the part's unit.
@pytest.mark.parametrize(("kind", "value", "sentence"), [
    ("R", "10nF", '"10nF" is a capacitance, a resistor takes ohms'),
    ("C", "2.2 MΩ", '"2.2 MΩ" is a resistance, a capacitor takes farads'),
    ("L", "47uF", '"47uF" is a capacitance, an inductor takes henries'),
    ("vcvs", "3V", '"3V" is a voltage, a voltage-controlled voltage source takes a plain gain (no unit)'),
    ("vccs", "2k", None),
    ("vccs", "2 ohm", '"2 ohm" is a resistance, a voltage-controlled current source takes a transconductance'),
    ("R", "5%", '"5%" is a percentage, a resistor takes ohms'),
    ("R", "4k7 \u2126", None),
    ("C", "4n7", None),
    ("L", "3.3mH", None),
    ("vccs", "20mS", None),
])
def test_a_value_carries_the_unit_of_its_part(kind: str, value: str, sentence: str | None) -> None:
    nodes = ["out", "0"] if kind in ("R", "C", "L") else ["out", "0", "in", "0"]
    stage = Stage(id="s", name="S", parts=[Part("R1", "R", ["in", "out"], Quantity.of("1k")),
                                           Part("X1", kind, nodes, Quantity.of(value))])
    problems = validate(Project(title="T", stages=[stage]))
    if sentence is None:
        assert problems == []
    else:
        assert len(problems) == 1 and problems[0].startswith(f"stages[0].parts[1].value: {sentence}")


def test_a_transresistance_takes_ohms() -> None:
    # Common practice, no source: a current-controlled voltage source's gain is volts per ampere,
    # ohms; siemens (amperes per volt) is its inverse.
    stage = Stage(id="s", name="S", parts=[Part("R1", "R", ["in", "out"], Quantity.of("1k")),
                                           Part("H1", "ccvs", ["out", "0"], Quantity.of("2mS"), control="R1")])
    project = Project(title="T", stages=[stage])
    assert validate(project) == [
        'stages[0].parts[1].value: "2mS" is a conductance, a current-controlled voltage source takes a '
        "transresistance in ohms"]
    stage.parts[1].value = Quantity.of("2k ohm")
    assert validate(project) == []


# Common practice, no source (SI Brochure, 9th ed., for the unit symbols): the same rule holds
# for every numeric field of the settings, the drive, the converter, the load and a block stage:
# a bare number takes the field's unit, a written unit must be that one.
@pytest.mark.parametrize(("path", "value", "sentence"), [
    (("converter", "fs_hz"), "10nF", '"10nF" is a capacitance, fs_hz takes hertz'),
    (("converter", "fs_hz"), "96kHz", None),
    (("converter", "full_scale_vpp"), "5 ohm", '"5 ohm" is a resistance, full_scale_vpp takes volts'),
    (("load", "r_ohm"), "2.2u F", '"2.2u F" is a capacitance, r_ohm takes ohms'),
    (("load", "r_ohm"), "10k", None),
    (("load", "c_f"), "1kHz", '"1kHz" is a frequency, c_f takes farads'),
    (("settings", "ref_hz"), "1kV", '"1kV" is a voltage, ref_hz takes hertz'),
    (("settings", "f_max_hz"), "1MHz", None),
    (("settings", "noise_band_hz"), ["10", "20kF"], None),  # the second edge is checked below
    (("input", "amplitude"), "10mA", '"10mA" is a current, amplitude takes volts'),
    (("input", "amplitude"), "10mV", None),
    (("stages", 1, "zin", "c_f"), "22p", None),
    (("stages", 1, "zin", "c_f"), "1kΩ", '"1kΩ" is a resistance, c_f takes farads'),
    (("stages", 1, "zin", "r_ohm"), "10pF", '"10pF" is a capacitance, r_ohm takes ohms'),
    (("stages", 1, "zout_ohm"), "50 V", '"50 V" is a voltage, zout_ohm takes ohms'),
    (("stages", 1, "gain"), "2V", '"2V" is a voltage, gain takes a plain number (no unit)'),
])
def test_settings_converter_load_and_block_fields_carry_their_unit(
        path: tuple[Any, ...], value: Any, sentence: str | None) -> None:
    document = design_example()
    _set(path, value)(document)
    problems = problems_of(document)
    json_path = ".".join(f"[{key}]" if isinstance(key, int) else key for key in path).replace(".[", "[")
    if path[-1] == "noise_band_hz":
        assert problems == [f'{json_path}[1]: "20kF" is a capacitance, noise_band_hz takes hertz']
    elif sentence is None:
        assert problems == []
    else:
        assert problems == [f"{json_path}: {sentence}"]


def test_a_current_drive_amplitude_and_a_block_transimpedance_take_their_units() -> None:
    # Common practice, no source: a current drive's amplitude is in amperes; a current-driven
    # block's gain is volts per ampere, ohms.
    document = design_example()
    document["input"] = {"drive": "current", "amplitude": "1uA"}
    document["stages"][0]["drive"] = "current"
    assert not any(problem.startswith("input.amplitude") for problem in problems_of(document))
    document["input"]["amplitude"] = "1uV"
    assert 'input.amplitude: "1uV" is a voltage, amplitude takes amperes' in problems_of(document)


# Common practice, no source: a check's limits are in its metric's unit (the metric table), and
# "5%" means the fraction 0.05, so on a metric already in percent it would set a limit 100 times
# too small: a yield "≥ 99%" would pass a 1 % yield. That is refused with the number to write.
@pytest.mark.parametrize(("check", "problem"), [
    ({"metric": "f_high_3db_hz", "where": "isolated", "min": "10nF"},
     '.min: "10nF" is a capacitance, f_high_3db_hz is in Hz'),
    ({"metric": "f_high_3db_hz", "where": "isolated", "min": "10kHz"}, None),
    ({"metric": "gain_db", "where": "isolated", "at_hz": "1kV", "min": -1}, '.at_hz: "1kV" is a voltage, at_hz takes hertz'),
    ({"metric": "phase_margin_deg", "where": "isolated", "min": "45dB"},
     '.min: "45dB" is a level in decibels, phase_margin_deg is in °'),
    ({"metric": "overshoot_pct", "where": "isolated", "max": "5%"},
     '.max: "5%" would be read as the fraction 0.05; overshoot_pct is already in percent, so write 5'),
    ({"metric": "overshoot_pct", "where": "isolated", "max": 5}, None),
    ({"metric": "swing_margin_v", "where": "chain", "min": "100mV"}, None),
    ({"metric": "swing_margin_v", "where": "chain", "min": "100mA"}, '.min: "100mA" is a current, swing_margin_v is in V'),
])
def test_a_checks_limits_carry_the_unit_of_its_metric(check: dict[str, Any], problem: str | None) -> None:
    document = design_example()
    document["stages"][0]["checks"] = [{"id": "c", "text": "a check", **check}]
    problems = problems_of(document)
    if problem is None:
        assert problems == []
    else:
        assert problems == [f"stages[0].checks[0]{problem}"]
