"""Places above the size limit of the pole/zero and step-response analysis, and the shared sweep.

A long chain has a from-input and an in-chain place per stage, each as large as (the rest of) the
chain; above ``stage.MODEL_MAX_UNKNOWNS`` their zeros and step responses are null with the reason,
an in-chain place has no poles (so no verdict and no response figure), and every stage seen from
the chain's input reads its response off one sweep of the merged chain. The limit is lowered here
so that a short chain crosses it and the tests stay fast.
"""

from __future__ import annotations

import math

import numpy as np
import scipy.optimize

from stagewise.engine.analysis import ProjectAnalysis
from stagewise.engine.chain import load_admittance, merge_systems, merged_system
from stagewise.engine.mna import assemble
from stagewise.engine.stage import MODEL_MAX_UNKNOWNS, analyze_system
from stagewise.engine.sweep import TWO_PI, drive
from stagewise.model.project import Check, OpampModel, Part, Project, Stage
from stagewise.model.values import Quantity

STAGES = 8
LIMIT = 20  # a merged, driven 8-stage chain has 26 unknowns; stage 2 in chain 23, stage 3 20


def _chain(stages: int = STAGES, *, with_checks: bool = False) -> Project:
    # Our own values: an RC low-pass (2k7, 680p) into a finite op-amp follower, repeated.
    model = OpampModel(a0_db=Quantity.of(100), gbw_hz=Quantity.of("5M"), rout_ohm=Quantity.of(40))
    checks = [Check("g", "gain in chain", metric="gain_db", where="in_chain", min=Quantity.of(-1)),
              Check("c", "corner seen from the input", metric="f_high_3db_hz", where="from_input",
                    min=Quantity.of("1k"))] if with_checks else []
    return Project("size limit", opamp_models={"u": model}, stages=[Stage(f"s{index + 1}", f"S{index + 1}", parts=[
        Part("R1", "R", ["in", "mid"], Quantity.of("2k7")),
        Part("C1", "C", ["mid", "0"], Quantity.of("680p")),
        Part("U1", "opamp", ["mid", "out", "out"], model="u"),
    ], checks=checks if index == 1 else []) for index in range(stages)])


def _dense(g: np.ndarray, c: np.ndarray, b: np.ndarray, f_hz: np.ndarray) -> np.ndarray:
    s = 1j * TWO_PI * np.asarray(f_hz, dtype=float)
    # Reference library: numpy linalg.solve (LAPACK gesv) on each dense matrix G + sC.
    right = np.broadcast_to(b.astype(complex)[:, None], (len(s), len(b), 1))
    return np.linalg.solve(g[None] + s[:, None, None] * c[None], right)[:, :, 0]


def test_the_chain_and_its_inputs_above_the_limit_have_poles_but_no_zeros_or_step_and_say_why() -> None:
    document = ProjectAnalysis(_chain(), spread=False, max_unknowns=LIMIT).document()
    chain = document["chain"]
    for place in (chain, document["stages"][2]["from_input"]):
        for key in ("zeros", "step", "gain_constant"):
            assert place[key] is None
            assert "26 unknowns, above the 20" in place[f"{key}_why"]
        # Common practice, no source: an RC section into a follower is stable, whatever its load.
        assert place["stability"]["verdict"] == "stable"
    # Common practice, no source: the order of the network is its count of energy stores (one
    # capacitor and one op-amp pole per stage).
    assert len(chain["poles"]) == 2 * STAGES
    # The stage seen from the input shares the chain's pencil: the chain's poles, listed once there.
    assert document["stages"][2]["from_input"]["poles"] is None
    assert "chain" in document["stages"][2]["from_input"]["poles_why"]


def test_an_in_chain_place_above_the_limit_decides_nothing_and_its_checks_do_not_pass() -> None:
    analysis = ProjectAnalysis(_chain(with_checks=True), spread=False, max_unknowns=LIMIT)
    document = analysis.document()
    second = document["stages"][1]
    place = second["in_chain"]
    assert place["stability"]["verdict"] is None and "not decided" in place["stability"]["why"]
    for key in ("gain_db", "f_high_3db_hz", "poles", "zeros", "step"):
        assert place[key] is None
        assert "23 unknowns, above the 20" in place[f"{key}_why"]
    assert place["dc"] is None and "not decided" in place["dc_why"]
    gain_check = next(check for check in second["checks"] if check["id"] == "g")
    assert gain_check["value"] is None and gain_check["state"] == "no value"
    assert "above the 20" in gain_check["why"]
    # The same place seen from the input keeps its figures: met, with its exact corner.
    corner_check = next(check for check in second["checks"] if check["id"] == "c")
    assert corner_check["state"] == "met"
    # The first stage in chain, driven as the chain is, is the stage seen from the input: the
    # chain's poles decide it, and its figures are those seen from the input.
    first = document["stages"][0]
    assert first["in_chain"]["stability"]["verdict"] == "stable"
    assert first["in_chain"]["f_high_3db_hz"] == first["from_input"]["f_high_3db_hz"]
    assert first["in_chain"]["step"] is None and "26 unknowns" in first["in_chain"]["step_why"]
    # Stages whose rest of the chain is within the limit keep their whole model.
    third = document["stages"][2]["in_chain"]
    assert third["step"] is not None and third["zeros"] is not None
    assert third["stability"]["verdict"] == "stable"


def test_an_in_chain_place_above_the_limit_has_the_exact_response() -> None:
    project = _chain()
    analysis = ProjectAnalysis(project, spread=False, max_unknowns=LIMIT)
    place = analysis.in_chain("s2")
    assert place.model is None and place.poles_rad_s is None
    systems = [assemble(stage, project) for stage in project.stages]
    load_r, load_c = load_admittance(project)
    suffix = merge_systems([stage.id for stage in project.stages[1:]], systems[1:], current_drive=False,
                           load_r_ohm=load_r, load_c_f=load_c)
    driven = drive(suffix.system, False)
    dense = _dense(driven.g, driven.c, driven.b, analysis.f_hz)[:, suffix.interface_indices[1]]
    assert np.max(np.abs(place.response - dense) / np.abs(dense)) < 1e-9


def test_every_stage_seen_from_the_input_reads_the_shared_sweep_exactly() -> None:
    project = _chain()
    merged = merged_system(project)
    driven = merged.driven()
    for limit in (LIMIT, MODEL_MAX_UNKNOWNS):  # above the limit, and with the whole model
        analysis = ProjectAnalysis(project, spread=False, max_unknowns=limit)
        dense = _dense(driven.g, driven.c, driven.b, analysis.f_hz)
        for position, stage in enumerate(project.stages, start=1):
            response = analysis.from_input(stage.id).response
            expected = dense[:, merged.interface_indices[position]]
            assert np.max(np.abs(response - expected) / np.abs(expected)) < 1e-10


def test_the_corner_seen_from_the_input_above_the_limit_is_exact() -> None:
    project = _chain()
    merged = merged_system(project)
    driven = merged.driven()
    analysis = ProjectAnalysis(project, spread=False, max_unknowns=LIMIT)
    output = merged.interface_indices[5]
    found = analysis.document()["stages"][4]["from_input"]["f_high_3db_hz"]

    def gain_db(f_hz: float) -> float:
        return 20.0 * math.log10(abs(_dense(driven.g, driven.c, driven.b, np.array([f_hz]))[0, output]))

    # Reference library: numpy linalg.solve at s = 0 for the DC gain, scipy.optimize.brentq for
    # the half-power point (IEEE Std 100, "bandwidth": 10·log10(2) dB below the pass-band gain).
    dc = 20.0 * math.log10(abs(np.linalg.solve(driven.g, driven.b)[output]))
    expected = scipy.optimize.brentq(lambda f: gain_db(f) - (dc - 10.0 * math.log10(2.0)), 1e3, 1e6, xtol=1e-9)
    assert math.isclose(found, expected, rel_tol=1e-9)


def test_the_default_limit_is_stated_in_the_reason() -> None:
    merged = merged_system(_chain(40))  # 122 unknowns once driven, just above the limit
    driven = merged.driven()
    assert driven.g.shape[0] > MODEL_MAX_UNKNOWNS
    analysis = analyze_system(driven, np.logspace(2, 6, 9), find_poles=False)
    assert analysis.model is None and analysis.poles_model is None and analysis.response is not None
    assert f"{driven.g.shape[0]} unknowns, above the {MODEL_MAX_UNKNOWNS}" in (analysis.model_why or "")
