"""Stage templates and the generic op-amp library: they load, validate, analyse, and each
template's isolated response matches its closed form.

Closed forms are derived here by nodal analysis with the Laplace impedances R, sL, 1/(sC) and
the ideal op-amp rules (v+ = v−, no input current), from the template's own part values; the
engine's response must match them to 1e-9 relative (DESIGN 3.6).
"""

from __future__ import annotations

import copy
import json
import math
from pathlib import Path

import numpy as np
import pytest
from numpy.typing import NDArray

from stagewise.engine.mna import assemble
from stagewise.engine.sweep import drive, frequency_grid, transfer
from stagewise.files.codec import dumps, encode_opamp
from stagewise.files.project_file import loads_project
from stagewise.files.templates import (
    Template,
    TemplateError,
    instantiate_template,
    load_opamp_library,
    load_template,
    load_templates,
    template_ids,
)
from stagewise.model.project import IDEAL_OPAMP, Project, Settings, Stage
from stagewise.model.validate import validate
from stagewise.model.values import Quantity

REQUIRED = {
    "rc_lowpass", "rc_highpass", "series_rlc", "lc_ladder_3", "lc_ladder_5", "inverting", "noninverting",
    "ac_noninverting", "sallen_key_lowpass", "sallen_key_highpass", "mfb_lowpass", "mfb_bandpass",
    "transimpedance", "integrator", "difference_amplifier", "instrumentation_amplifier", "converter_driver",
}  # fmt: skip
OPAMP_PARAMETERS = (
    "a0_db", "gbw_hz", "p2_hz", "rout_ohm", "rin_ohm", "cin_diff_f", "cin_cm_f", "en_v_rthz", "en_corner_hz",
    "in_a_rthz", "in_corner_hz", "swing_v", "slew_v_per_s",
)  # fmt: skip


@pytest.fixture(scope="module")
def templates() -> dict[str, Template]:
    return load_templates()


def _response(stage: Stage, project: Project, f_hz: NDArray[np.float64], ideal: bool) -> NDArray[np.complex128]:
    trial = copy.deepcopy(stage)
    if ideal:
        for part in trial.parts:
            if part.type == "opamp":
                part.model = IDEAL_OPAMP
    system = drive(assemble(trial, project), current=trial.drive == "current")
    return transfer(system, f_hz)


def _values(stage: Stage) -> dict[str, float]:
    return {part.ref: part.value.si for part in stage.parts if part.value is not None}


def _abcd_series(z: NDArray[np.complex128]) -> NDArray[np.complex128]:
    one, zero = np.ones_like(z), np.zeros_like(z)
    return np.stack([np.stack([one, z], -1), np.stack([zero, one], -1)], -2)


def _abcd_shunt(y: NDArray[np.complex128]) -> NDArray[np.complex128]:
    one, zero = np.ones_like(y), np.zeros_like(y)
    return np.stack([np.stack([one, zero], -1), np.stack([y, one], -1)], -2)


def _ladder(v: dict[str, float], s: NDArray[np.complex128], elements: list[str]) -> NDArray[np.complex128]:
    """V_out/V_in of Rs, then shunt C / series L alternating, loaded by RL (chain matrices)."""
    # Source: two-port chain (ABCD) matrices of series impedances and shunt admittances, any
    # circuits text (e.g. Nilsson & Riedel, Electric Circuits, two-port chapter).
    total = _abcd_series(v["Rs"] + 0 * s)
    for ref in elements:
        step = _abcd_shunt(s * v[ref]) if ref.startswith("C") else _abcd_series(s * v[ref])
        total = total @ step
    a, b = total[..., 0, 0], total[..., 0, 1]
    return 1.0 / (a + b / v["RL"])


def _closed_form(template_id: str, v: dict[str, float], s: NDArray[np.complex128]) -> NDArray[np.complex128]:
    """Each template's transfer function with ideal op-amps, derived by nodal analysis."""
    # Source: Laplace impedances R, sL, 1/(sC) and Kirchhoff's laws (Nilsson & Riedel, Electric
    # Circuits); ideal op-amp rules; the formulas are derived by hand from those.
    if template_id == "rc_lowpass":
        return 1.0 / (1.0 + s * v["R1"] * v["C1"])
    if template_id == "rc_highpass":
        return s * v["R1"] * v["C1"] / (1.0 + s * v["R1"] * v["C1"])
    if template_id == "series_rlc":
        return s * v["R1"] * v["C1"] / (s**2 * v["L1"] * v["C1"] + s * v["R1"] * v["C1"] + 1.0)
    if template_id == "lc_ladder_3":
        return _ladder(v, s, ["C1", "L2", "C3"])
    if template_id == "lc_ladder_5":
        return _ladder(v, s, ["C1", "L2", "C3", "L4", "C5"])
    if template_id == "inverting":
        return -v["Rf"] / v["Rg"] + 0 * s
    if template_id == "noninverting":
        return 1.0 + v["Rf"] / v["Rg"] + 0 * s
    if template_id == "ac_noninverting":
        coupling = s * v["Rb"] * v["Cin"] / (1.0 + s * v["Rb"] * v["Cin"])
        return coupling * (1.0 + v["Rf"] / (v["Rg"] + 1.0 / (s * v["Cg"])))
    if template_id == "sallen_key_lowpass":
        # Source: Sallen & Key (1955): 1/(s²R1R2C1C2 + sC2(R1+R2) + 1), C2 to the reference.
        return 1.0 / (s**2 * v["R1"] * v["R2"] * v["C1"] * v["C2"] + s * v["C2"] * (v["R1"] + v["R2"]) + 1.0)
    if template_id == "sallen_key_highpass":
        # Source: Sallen & Key (1955), high-pass dual (derived here by nodal analysis).
        top = s**2 * v["R1"] * v["R2"] * v["C1"] * v["C2"]
        return top / (top + s * v["R1"] * (v["C1"] + v["C2"]) + 1.0)
    if template_id == "mfb_lowpass":
        # Source: Williams & Taylor, Electronic Filter Design Handbook, multiple-feedback low-pass.
        damping = v["C2"] * (v["R2"] + v["R3"] + v["R2"] * v["R3"] / v["R1"])
        return -(v["R2"] / v["R1"]) / (s**2 * v["R2"] * v["R3"] * v["C1"] * v["C2"] + s * damping + 1.0)
    if template_id == "mfb_bandpass":
        # Source: Williams & Taylor, Electronic Filter Design Handbook, multiple-feedback band-pass.
        rp = v["R1"] * v["R2"] / (v["R1"] + v["R2"])
        return -(s * v["C2"] * v["R3"] * rp / v["R1"]) / (
            s**2 * v["C1"] * v["C2"] * v["R3"] * rp + s * (v["C1"] + v["C2"]) * rp + 1.0
        )
    if template_id == "transimpedance":
        return -v["Rf"] / (1.0 + s * v["Rf"] * v["Cf"])
    if template_id == "integrator":
        return -(v["Rr"] / v["Rin"]) / (1.0 + s * v["Rr"] * v["Cf"])
    if template_id == "difference_amplifier":
        return v["R4"] / (v["R3"] + v["R4"]) * (1.0 + v["R2"] / v["R1"]) + 0 * s
    if template_id == "instrumentation_amplifier":
        assert v["R1a"] == v["R1b"] and v["R2a"] == v["R2b"] and v["R3a"] == v["R3b"]
        return (1.0 + 2.0 * v["R1a"] / v["Rg"]) * (v["R3a"] / v["R2a"]) + 0 * s
    if template_id == "converter_driver":
        return 1.0 / (1.0 + s * v["Rs"] * v["Cs"])
    raise AssertionError(f"no closed form for {template_id}")


def test_the_required_topologies_are_all_there(templates: dict[str, Template]) -> None:
    # Common practice, no source: the brief's list of at least 14 topologies.
    assert REQUIRED <= set(templates)
    assert len(templates) >= 14
    assert set(template_ids()) == set(templates)
    assert templates["transimpedance"].stage.drive == "current"
    assert all(t.stage.drive == "voltage" for key, t in templates.items() if key != "transimpedance")
    assert all(t.description.strip() and t.name.strip() for t in templates.values())


def test_every_template_validates_and_its_response_is_finite_over_the_grid(templates: dict[str, Template]) -> None:
    # Common practice, no source: a stage from a template is a valid, solvable circuit.
    project = Project(title="all templates", settings=Settings())
    for template in templates.values():
        instantiate_template(project, template)
    assert validate(project) == []
    reloaded = loads_project(dumps(project))  # the instantiated project survives the codec
    assert [stage.id for stage in reloaded.stages] == [stage.id for stage in project.stages]
    f_hz = frequency_grid(project.settings)
    for stage in project.stages:
        response = _response(stage, project, f_hz, ideal=False)
        assert response.shape == f_hz.shape
        assert np.all(np.isfinite(response)), stage.id
        assert np.all(np.abs(response) > 0), stage.id


@pytest.mark.parametrize("template_id", sorted(REQUIRED))
def test_template_response_matches_its_closed_form(templates: dict[str, Template], template_id: str) -> None:
    template = templates[template_id]
    project = Project(title="closed forms", opamp_models=dict(template.opamp_models))
    f_hz = np.logspace(0, 6, 61)
    engine = _response(template.stage, project, f_hz, ideal=True)
    expected = _closed_form(template_id, _values(template.stage), 2j * math.pi * f_hz)
    # Source: DESIGN 3.6 accuracy, relative error below 1e-9 against closed forms.
    np.testing.assert_allclose(engine, expected, rtol=1e-9, atol=0)


def test_rc_corner_is_one_over_two_pi_rc(templates: dict[str, Template]) -> None:
    stage = templates["rc_lowpass"].stage
    v = _values(stage)
    corner_hz = 1.0 / (2 * math.pi * v["R1"] * v["C1"])  # Source: first-order RC corner, any circuits text
    response = _response(stage, Project(title="rc"), np.array([corner_hz]), ideal=True)
    assert abs(response[0]) == pytest.approx(1 / math.sqrt(2), rel=1e-12)
    assert math.degrees(np.angle(response[0])) == pytest.approx(-45.0, abs=1e-9)


def test_doubly_terminated_ladders_are_maximally_flat(templates: dict[str, Template]) -> None:
    # Source: Zverev, Handbook of Filter Synthesis: doubly terminated Butterworth ladder,
    # normalized elements 2·sin((2k−1)π/(2n)) (1, 2, 1 for n = 3), |H| = 0.5/√(1 + (ω/ωc)^(2n)).
    omega_c = 1e5  # the templates' corner, from their 1 kΩ ends and element values
    w = np.logspace(3, 6.5, 40)
    for template_id, n, rtol in (("lc_ladder_3", 3, 1e-9), ("lc_ladder_5", 5, 2e-6)):
        stage = templates[template_id].stage
        v = _values(stage)
        for k, ref in enumerate([p.ref for p in stage.parts if p.type in ("L", "C")], start=1):
            g = 2 * math.sin((2 * k - 1) * math.pi / (2 * n))
            scale = 1e3 / omega_c if ref.startswith("L") else 1 / (1e3 * omega_c)
            assert v[ref] == pytest.approx(g * scale, rel=1e-6)  # values rounded to 6 digits
        response = _response(stage, Project(title="ladder"), w / (2 * math.pi), ideal=True)
        np.testing.assert_allclose(np.abs(response), 0.5 / np.sqrt(1 + (w / omega_c) ** (2 * n)), rtol=rtol)


def test_sallen_key_template_omega0_and_q(templates: dict[str, Template]) -> None:
    # Source: Sallen & Key (1955); REFERENCES table: ω0 = 1/√(R1R2C1C2), Q = √(R1R2C1C2)/(C2(R1+R2)).
    stage = templates["sallen_key_lowpass"].stage
    v = _values(stage)
    tau = math.sqrt(v["R1"] * v["R2"] * v["C1"] * v["C2"])
    f0_hz, q = 1 / (2 * math.pi * tau), tau / (v["C2"] * (v["R1"] + v["R2"]))
    response = _response(stage, Project(title="sk", opamp_models=dict(templates["sallen_key_lowpass"].opamp_models)),
                         np.array([f0_hz]), ideal=True)
    # At ω0 a unity-gain second-order low-pass is −j·Q.
    assert response[0] == pytest.approx(-1j * q, rel=1e-9)


def test_finite_opamp_models_stay_close_to_the_ideal_gain_at_low_frequency(templates: dict[str, Template]) -> None:
    # Common practice, no source: closed-loop gain error ≈ noise gain / A0, far below 0.1 % here.
    for template_id in ("noninverting", "inverting", "difference_amplifier", "instrumentation_amplifier"):
        template = templates[template_id]
        project = Project(title="finite", opamp_models=dict(template.opamp_models))
        ideal = _closed_form(template_id, _values(template.stage), np.array([2j * math.pi * 10.0]))
        finite = _response(template.stage, project, np.array([10.0]), ideal=False)
        assert finite[0] == pytest.approx(ideal[0], rel=1e-3), template_id


def test_opamp_library_has_every_parameter_and_decodes_with_the_project_codec() -> None:
    library = load_opamp_library()
    assert len(library) >= 5
    # Source: DESIGN 3.2, the op-amp model parameters.
    for name, model in library.items():
        document = encode_opamp(model)
        assert set(OPAMP_PARAMETERS) <= set(document), name
        assert model.description.strip(), name
        assert model.swing_v is not None and model.swing_v[0].si < model.swing_v[1].si
    project_document = {
        "format": "stagewise-project", "version": 1, "title": "library", "stages": [],
        "opamp_models": {name: encode_opamp(model) for name, model in library.items()},
    }  # fmt: skip
    loaded = loads_project(json.dumps(project_document))
    assert set(loaded.opamp_models) == set(library)


def test_template_models_are_the_library_models(templates: dict[str, Template]) -> None:
    # Common practice, no source: a template carries the shipped model unchanged.
    library = load_opamp_library()
    for template in templates.values():
        for name, model in template.opamp_models.items():
            assert encode_opamp(model) == encode_opamp(library[name]), (template.id, name)


def test_instantiate_copies_models_renames_on_clash_and_makes_ids_unique(templates: dict[str, Template]) -> None:
    # Common practice, no source: a project file is self-contained (DESIGN 3.2) and ids unique.
    template = templates["noninverting"]
    (model_name,) = template.opamp_models
    project = Project(title="clash")
    project.opamp_models[model_name] = copy.deepcopy(template.opamp_models[model_name])
    project.opamp_models[model_name].gbw_hz = Quantity("3M", 3e6)  # a different model, same name
    first = instantiate_template(project, template)
    second = instantiate_template(project, template, name="Second gain stage")
    third = instantiate_template(project, template, stage_id="noninverting")
    assert [first.id, second.id, third.id] == ["noninverting", "noninverting-2", "noninverting-3"]
    assert second.name == "Second gain stage"
    renamed = f"{model_name} (2)"
    assert set(project.opamp_models) == {model_name, renamed}
    assert project.opamp_models[model_name].gbw_hz.si == 3e6  # the project's own model untouched
    for stage in (first, second, third):
        assert stage.part("U1") is not None and stage.part("U1").model == renamed  # type: ignore[union-attr]
    assert validate(project) == []
    assert template.stage.part("U1").model == model_name  # type: ignore[union-attr]


def test_instantiate_with_sized_values_and_refusals(templates: dict[str, Template]) -> None:
    project = Project(title="values")
    stage = instantiate_template(project, templates["rc_lowpass"], values={"R1": 4990.0, "C1": 3.3e-9})
    assert stage.part("R1").value.si == 4990.0  # type: ignore[union-attr]
    assert stage.part("C1").value.si == pytest.approx(3.3e-9, rel=1e-12)  # type: ignore[union-attr]
    with pytest.raises(TemplateError, match="no valued part"):
        instantiate_template(project, templates["rc_lowpass"], values={"R9": 1.0})
    with pytest.raises(TemplateError, match="greater than zero"):
        instantiate_template(project, templates["rc_lowpass"], values={"R1": -5.0})
    with pytest.raises(TemplateError, match="not a stage template"):
        load_template("no_such_template")
    with pytest.raises(TemplateError, match="not a template id"):
        load_template("../opamps")
    assert len(project.stages) == 1


def test_template_document_round_trips_and_bad_templates_are_refused(templates: dict[str, Template], tmp_path: Path) -> None:
    # Common practice, no source: what is written reads back the same; bad files name the problem.
    from stagewise.files.codec import encode_stage
    from stagewise.files.templates import template_document

    original = templates["mfb_bandpass"]
    (tmp_path / "mine.json").write_text(json.dumps(template_document(original)), encoding="utf-8")
    again = load_template("mine", tmp_path)
    assert encode_stage(again.stage) == encode_stage(original.stage)
    assert again.description == original.description
    broken = template_document(original)
    broken["stage"]["parts"][0]["value"] = "15kk"
    broken["opamp_models"]["spare model"] = {"a0_db": 100, "gbw_hz": "1M"}
    (tmp_path / "broken.json").write_text(json.dumps(broken), encoding="utf-8")
    with pytest.raises(TemplateError) as caught:
        load_template("broken", tmp_path)
    assert 'stage.parts[0].value: "15kk" is not a value' in str(caught.value)
    (tmp_path / "unused.json").write_text(json.dumps({**template_document(original), "opamp_models": {
        **template_document(original)["opamp_models"], "spare model": {"a0_db": 100, "gbw_hz": "1M"}}}), encoding="utf-8")
    with pytest.raises(TemplateError, match='"spare model" is not used'):
        load_template("unused", tmp_path)
    (tmp_path / "extra.json").write_text(json.dumps({**template_document(original), "sizing": {}}), encoding="utf-8")
    with pytest.raises(TemplateError, match='unknown key "sizing"'):
        load_template("extra", tmp_path)
