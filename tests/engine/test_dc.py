"""DC accuracy budget against the op-amp handbook formulas for offsets, bias currents and gain errors."""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from stagewise.engine.dc import DcBudget, bias_current_factor, budget_to_json, dc_budgets
from stagewise.engine.mna import assemble
from stagewise.engine.sweep import drive
from stagewise.files.codec import decode
from stagewise.model.project import Project

# Component values of our own choosing.
RS, RG, RF = 27e3, 3.3e3, 47e3
VOS, IB, IOS = 1.3e-3, 85e-9, 7e-9
HUGE_GAIN_DB = 220  # A0 = 1e11: the handbook formulas assume an ideal loop


def model(**keys: Any) -> dict[str, Any]:
    return {"a0_db": HUGE_GAIN_DB, "gbw_hz": "1G", **keys}


def make_project(parts: list[dict[str, Any]], *, models: dict[str, Any] | None = None,
                 settings_keys: dict[str, Any] | None = None, converter: dict[str, Any] | None = None,
                 stages: list[dict[str, Any]] | None = None, amplitude: Any = None) -> Project:
    document = {
        "format": "stagewise-project", "version": 1, "title": "dc test",
        "settings": {"f_min_hz": 1, "f_max_hz": 1e6, **(settings_keys or {})},
        "input": {"drive": "voltage", "amplitude": amplitude},
        "converter": converter or {},
        "opamp_models": models or {"op": model(vos_v=VOS, ib_a=IB, ios_a=IOS)},
        "stages": stages or [{"id": "s", "name": "stage", "ports": {"in": "in", "out": "out"}, "parts": parts}],
    }
    return decode(document)


def non_inverting(rs: float = RS, rg: float = RG, rf: float = RF, **extra: Any) -> list[dict[str, Any]]:
    return [
        {"ref": "Rs", "type": "R", "nodes": ["in", "p"], "value": rs, **extra.get("Rs", {})},
        {"ref": "Rg", "type": "R", "nodes": ["n", "0"], "value": rg, **extra.get("Rg", {})},
        {"ref": "Rf", "type": "R", "nodes": ["n", "out"], "value": rf, **extra.get("Rf", {})},
        {"ref": "U1", "type": "opamp", "nodes": ["p", "n", "out"], "model": "op"},
    ]


def inverting(r1: float, rf: float, rp: float) -> list[dict[str, Any]]:
    return [
        {"ref": "R1", "type": "R", "nodes": ["in", "n"], "value": r1},
        {"ref": "Rf", "type": "R", "nodes": ["n", "out"], "value": rf},
        {"ref": "Rp", "type": "R", "nodes": ["p", "0"], "value": rp},
        {"ref": "U1", "type": "opamp", "nodes": ["p", "n", "out"], "model": "op"},
    ]


def budget(project: Project, where: str = "isolated", stage: str = "s") -> DcBudget:
    budgets = dc_budgets(project)
    place = budgets.chain if where == "chain" else getattr(budgets, where)[stage]
    assert isinstance(place, DcBudget), place
    return place


def by_kind(result: DcBudget, kind: str, ref: str | None = None) -> Any:
    found = [item for item in result.contributions if item.kind == kind and (ref is None or item.ref == ref)]
    assert len(found) == 1, (kind, result.contributions)
    return found[0]


@pytest.mark.parametrize("place", ["isolated", "in_chain", "chain"])
def test_non_inverting_offset_matches_the_handbook_formula(place: str) -> None:
    result = budget(make_project(non_inverting()), place)
    noise_gain = 1 + RF / RG
    # Source: S. Franco, Design with Operational Amplifiers and Analog Integrated Circuits, 3rd ed.,
    # sec. 5.1-5.2 (value from memory): Vout = Vos·(1 + Rf/Rg) + Ib−·Rf − Ib+·Rs·(1 + Rf/Rg).
    assert by_kind(result, "vos").out_v == pytest.approx(VOS * noise_gain, rel=1e-9)
    ib = by_kind(result, "ib")
    assert dict(ib.via)["in-"] == pytest.approx(IB * RF, rel=1e-9)
    assert dict(ib.via)["in+"] == pytest.approx(-IB * RS * noise_gain, rel=1e-9)
    assert ib.out_v == pytest.approx(IB * RF - IB * RS * noise_gain, rel=1e-9)
    # Ib+ = Ib + Ios/2, Ib− = Ib − Ios/2: the offset current's share is (Ios/2)·(Rf + Rs·(1 + Rf/Rg)).
    assert by_kind(result, "ios").out_v == pytest.approx(IOS / 2 * (RF + RS * noise_gain), rel=1e-9)
    assert result.offset_out_v == pytest.approx(
        VOS * noise_gain + abs(IB * RF - IB * RS * noise_gain) + IOS / 2 * (RF + RS * noise_gain), rel=1e-9)


def test_inverting_offset_matches_the_handbook_formula() -> None:
    r1, rf, rp = 12e3, 150e3, 6.8e3
    result = budget(make_project(inverting(r1, rf, rp)))
    noise_gain = 1 + rf / r1
    # Source: S. Franco, 3rd ed., sec. 5.1-5.2 (value from memory): the same formula with the input
    # resistor R1 (its source end grounded, the drive zeroed) in place of Rg and Rp at the + input.
    assert by_kind(result, "vos").out_v == pytest.approx(VOS * noise_gain, rel=1e-9)
    assert by_kind(result, "ib").out_v == pytest.approx(IB * rf - IB * rp * noise_gain, rel=1e-9)
    assert result.gain == pytest.approx(-rf / r1, rel=1e-9)


def test_bias_current_cancelling_resistor_leaves_only_the_offset_current() -> None:
    balance = RF * RG / (RF + RG)
    result = budget(make_project(non_inverting(rs=balance)))
    # Source: S. Franco, 3rd ed., sec. 5.2 (value from memory): with Rs = Rf ∥ Rg equal bias currents
    # cancel at the output and the error is Ios·Rf.
    assert abs(by_kind(result, "ib").out_v) < 1e-9 * IB * RF
    assert by_kind(result, "ios").out_v == pytest.approx(IOS * RF, rel=1e-9)


@pytest.mark.parametrize("a0_db", [40, 60, 86])
def test_finite_open_loop_gain_error_of_a_non_inverting_stage(a0_db: float) -> None:
    project = make_project(non_inverting(), models={"op": {"a0_db": a0_db, "gbw_hz": "10M"}})
    result = budget(project)
    a0 = 10 ** (a0_db / 20)
    beta = RG / (RG + RF)
    # Source: H. S. Black's feedback formula, closed-loop gain (1/β)·1/(1 + 1/(A·β)); e.g. Franco,
    # 3rd ed., sec. 1.3 (value from memory).
    exact = 1 / (1 + 1 / (a0 * beta))
    assert result.gain == pytest.approx(exact / beta, rel=1e-12)
    assert result.gain_ideal == pytest.approx(1 / beta, rel=1e-12)
    assert by_kind(result, "finite_gain").gain_error_pct == pytest.approx(100 * (exact - 1), rel=1e-9)


def test_tolerance_gain_error_against_the_exact_extremes() -> None:
    tol = 0.001
    parts = non_inverting(Rg={"tol": tol}, Rf={"tol": tol})
    result = budget(make_project(parts))
    nominal = 1 + RF / RG
    # Common practice, no source: the exact extremes of 1 + Rf/Rg lie at the vertices (Rf high, Rg low)
    # and (Rf low, Rg high); the linearised worst case agrees to first order in tol.
    high = (1 + RF * (1 + tol) / (RG * (1 - tol))) / nominal - 1
    low = 1 - (1 + RF * (1 - tol) / (RG * (1 + tol))) / nominal
    assert result.gain_error_pct / 100 == pytest.approx(max(high, low), rel=2 * tol)
    assert result.gain_error_pct / 100 == pytest.approx(min(high, low), rel=2 * tol)
    # Each part alone, evaluated exactly; root-sum-square of independent errors (common practice).
    only_rf = (1 + RF * (1 + tol) / RG) / nominal - 1
    only_rg = (1 + RF / (RG * (1 - tol))) / nominal - 1
    assert by_kind(result, "tol", "Rf").gain_error_pct / 100 == pytest.approx(only_rf, rel=tol)
    assert result.gain_error_rss_pct / 100 == pytest.approx(math.hypot(only_rf, only_rg), rel=tol)


def test_drift_from_tempco_vos_drift_and_cmos_bias_current() -> None:
    tc_ppm = 50
    models = {"op": model(vos_v=VOS, vos_drift_v_per_c=4e-6, ib_a=2e-12, input_type="cmos")}
    parts = non_inverting(Rf={"tc_ppm_per_c": tc_ppm})
    project = make_project(parts, models=models, settings_keys={"temp_range_c": [-40, 85]},
                           converter={"full_scale_vpp": 5, "bits": 16})
    result = budget(project, "chain")
    noise_gain = 1 + RF / RG
    delta_t = 65  # the farther end of [-40, 85] from 25 °C
    assert by_kind(result, "vos_drift").out_v == pytest.approx(4e-6 * delta_t * noise_gain, rel=1e-9)
    # Common practice, no source: CMOS and JFET input bias currents double about every 10 °C.
    assert bias_current_factor("cmos", 85) == pytest.approx(2**6)
    ib_change = 2e-12 * (2**6 - 1) * (RF - RS * noise_gain)
    assert by_kind(result, "ib_drift").out_v == pytest.approx(ib_change, rel=1e-9)
    # Gain change Rf·tc·ΔT through the sensitivity ∂ln(1 + Rf/Rg)/∂ln Rf = Rf/(Rf + Rg); the level
    # is the converter's positive full scale, 2.5 V (common practice, no source).
    sensitivity = RF / (RF + RG)
    assert by_kind(result, "tempco").out_v == pytest.approx(2.5 * sensitivity * tc_ppm * 1e-6 * delta_t, rel=1e-9)
    drift_terms = abs(ib_change) + 4e-6 * delta_t * noise_gain + 2.5 * sensitivity * tc_ppm * 1e-6 * delta_t
    assert result.drift_out_v_per_c == pytest.approx(drift_terms / delta_t, rel=1e-9)


def test_bipolar_bias_current_falls_with_temperature() -> None:
    # Source: Gray, Hurst, Lewis and Meyer, Analysis and Design of Analog Integrated Circuits, ch. 1:
    # β rises about +7000 ppm/°C (value from memory), so Ib = Ic/β falls by that rate.
    assert bias_current_factor("bipolar", 35) == pytest.approx(math.exp(-0.07))
    assert bias_current_factor(None, 35) is None


def test_lsb_percent_and_ppm_of_full_scale() -> None:
    project = make_project(non_inverting(), converter={"full_scale_vpp": 4.096, "bits": 12})
    result = budget(project, "chain")
    document = budget_to_json(result, project.converter)
    # Source: IEEE Std 1241 (ideal code width Q = FSR / 2^N); % and ppm of the full-scale span are
    # common practice, no source.
    assert document["lsb_v"] == pytest.approx(4.096 / 4096)
    assert document["total_wc_lsb"] == pytest.approx(result.total_wc_v / 1e-3)
    assert document["total_wc_pct_fs"] == pytest.approx(100 * result.total_wc_v / 4.096)
    assert document["total_wc_ppm_fs"] == pytest.approx(1e6 * result.total_wc_v / 4.096)


def test_worst_case_and_rss_totals_add_the_contributions() -> None:
    parts = non_inverting(Rf={"tol": "0.5%"})
    project = make_project(parts, converter={"full_scale_vpp": 5, "bits": 16})
    result = budget(project, "chain")
    magnitudes = [abs(item.out_v) for item in result.contributions]
    # Common practice, no source: worst case adds magnitudes, RSS adds squares of independent terms.
    assert result.total_wc_v == pytest.approx(sum(magnitudes), rel=1e-12)
    assert result.total_rss_v == pytest.approx(math.sqrt(sum(m * m for m in magnitudes)), rel=1e-12)


def test_high_pass_stage_has_no_dc_gain_and_says_why() -> None:
    parts = [{"ref": "C1", "type": "C", "nodes": ["in", "out"], "value": "100n"},
             {"ref": "R1", "type": "R", "nodes": ["out", "0"], "value": "10k", "tol": "1%"}]
    result = budget(make_project(parts))
    # Common practice, no source: a series capacitor passes no DC, so the DC gain is 0 and its error undefined.
    assert result.gain is None and result.gain_error_pct is None
    assert "blocks DC" in result.why["gain_error_pct"]


def test_block_offset_and_gain_error_reach_the_next_stage() -> None:
    stages = [
        {"id": "b", "name": "block", "kind": "block", "gain": 4, "poles_hz": [1e5], "zeros_hz": [],
         "zin": {"r_ohm": None, "c_f": None}, "zout_ohm": 0, "offset_v": "2m", "gain_error": "0.2%"},
        {"id": "s", "name": "follower", "ports": {"in": "in", "out": "out"},
         "parts": [{"ref": "R1", "type": "R", "nodes": ["in", "0"], "value": "10k"},
                   {"ref": "U1", "type": "opamp", "nodes": ["in", "out", "out"], "model": "ideal"}]},
    ]
    project = make_project([], stages=stages, amplitude="0.1")
    result = budget(project, "chain")
    # Common practice, no source: a block's output offset passes a unity follower unchanged, and a
    # gain error ε at the 0.4 V level (0.1 V × 4) is 0.4·ε volts.
    assert by_kind(result, "block_offset").out_v == pytest.approx(2e-3, rel=1e-12)
    assert by_kind(result, "block_gain").out_v == pytest.approx(0.4 * 0.002, rel=1e-12)


# -- adjoint sensitivities against central differences ---------------------------------------


def dc_gain(project: Project) -> float:
    stage = project.stages[0]
    driven = drive(assemble(stage, project), False)
    x = np.linalg.solve(driven.g, driven.b)
    return float(x[driven.output])


@settings(max_examples=40, deadline=None)
@given(values=st.lists(st.floats(min_value=100, max_value=1e6), min_size=5, max_size=5),
       a0_db=st.floats(min_value=40, max_value=120))
def test_adjoint_sensitivities_agree_with_central_differences(values: list[float], a0_db: float) -> None:
    r1, r2, r3, r4, r5 = values
    tol = 0.01

    def parts(scale: dict[str, float]) -> list[dict[str, Any]]:
        return [
            {"ref": "R1", "type": "R", "nodes": ["in", "a"], "value": r1 * scale.get("R1", 1), "tol": tol},
            {"ref": "R2", "type": "R", "nodes": ["a", "0"], "value": r2 * scale.get("R2", 1), "tol": tol},
            {"ref": "R3", "type": "R", "nodes": ["a", "p"], "value": r3 * scale.get("R3", 1), "tol": tol},
            {"ref": "R4", "type": "R", "nodes": ["n", "0"], "value": r4 * scale.get("R4", 1), "tol": tol},
            {"ref": "R5", "type": "R", "nodes": ["n", "out"], "value": r5 * scale.get("R5", 1), "tol": tol},
            {"ref": "U1", "type": "opamp", "nodes": ["p", "n", "out"], "model": "op"},
        ]

    models = {"op": {"a0_db": a0_db, "gbw_hz": "1M", "rout_ohm": 60, "rin_ohm": "1M"}}
    result = budget(make_project(parts({}), models=models))
    nominal = dc_gain(make_project(parts({}), models=models))
    step = 1e-4
    refs = ("R1", "R2", "R3", "R4", "R5")
    central = []
    for ref in refs:
        plus = dc_gain(make_project(parts({ref: 1 + step}), models=models))
        minus = dc_gain(make_project(parts({ref: 1 - step}), models=models))
        # Reference: central difference of the exact solve (truncation error O(step²) ≈ 1e-8).
        central.append(abs(plus - minus) / (2 * step) / abs(nominal))
    adjoint = [by_kind(result, "tol", ref).gain_error_pct / 100 / tol for ref in refs]
    # Agreement to 1e-6 of the largest sensitivity (a tiny one is lost in the difference's rounding).
    assert np.max(np.abs(np.subtract(adjoint, central))) <= 1e-6 * max(central)


def test_analyze_document_and_checks_carry_the_budget() -> None:
    from stagewise.engine.analysis import ProjectAnalysis  # noqa: PLC0415

    project = make_project(non_inverting(Rf={"tol": "1%"}), converter={"full_scale_vpp": 5, "bits": 16})
    analysis = ProjectAnalysis(project, spread=False)
    document = analysis.document()
    stage = document["stages"][0]
    for place in (stage["isolated"], stage["in_chain"], document["chain"]):
        dc = place["dc"]
        for key in ("gain", "gain_error_pct", "offset_out_v", "drift_out_v_per_c", "contributions",
                    "total_wc_v", "total_rss_v"):
            assert key in dc
        assert {"source", "kind", "out_v"} <= set(dc["contributions"][0])
    assert {"total_wc_lsb", "total_rss_lsb", "total_wc_pct_fs"} <= set(document["chain"]["dc"])
    # Source: Franco, 3rd ed., sec. 5.1 (value from memory): the Vos term is Vos·(1 + Rf/Rg), so the
    # worst-case offset is at least that.
    value, why = analysis.metric_value("offset_out_v", "isolated", "s", None)
    assert why is None and value >= VOS * (1 + RF / RG)
    value, why = analysis.metric_value("drift_out_v_per_c", "chain", "s", None)
    assert value is None and "operating temperature range" in why


def test_cmrr_of_a_non_inverting_stage_is_a_gain_error_of_one_over_cmrr() -> None:
    cmrr_db = 80
    project = make_project(non_inverting(), models={"op": model(cmrr_db=cmrr_db)}, amplitude="0.1")
    result = budget(project)
    # Source: S. Franco, 3rd ed., sec. 5.4 (value from memory): the common-mode error is an input
    # offset v_cm/CMRR; in a non-inverting stage v_cm = v_in, so it is a gain error of 1/CMRR.
    assert by_kind(result, "cmrr").gain_error_pct == pytest.approx(100 / 10 ** (cmrr_db / 20), rel=1e-6)


def test_supply_variation_over_psrr_is_an_input_offset() -> None:
    psrr_db = 90
    project = make_project(non_inverting(), models={"op": model(psrr_db=psrr_db)},
                           settings_keys={"supply_variation_v": "0.5"})
    result = budget(project)
    # Source: S. Franco, 3rd ed., sec. 5.4 (value from memory): ΔVos = ΔVs/PSRR, times the noise gain.
    expected = 0.5 / 10 ** (psrr_db / 20) * (1 + RF / RG)
    assert by_kind(result, "psrr").out_v == pytest.approx(expected, rel=1e-9)


def test_an_op_amp_without_dc_feedback_has_no_finite_gain_term() -> None:
    # Common practice, no source: a comparator-style op-amp (no feedback) has no closed-loop gain to
    # compare with an ideal one; the budget says so instead of inventing a term.
    parts = [{"ref": "R1", "type": "R", "nodes": ["in", "p"], "value": "1k"},
             {"ref": "R2", "type": "R", "nodes": ["out", "0"], "value": "10k"},
             {"ref": "U1", "type": "opamp", "nodes": ["p", "0", "out"], "model": "op"}]
    project = make_project(parts, models={"op": {"a0_db": 60, "gbw_hz": "1M", "rout_ohm": 100}})
    result = budget(project)
    assert not [item for item in result.contributions if item.kind == "finite_gain"]
    assert any("no DC feedback" in note for note in result.notes)
    assert result.gain_ideal is None and "no DC solution" in result.why["gain_ideal"]


def test_from_input_adds_the_upstream_offsets_through_the_gains_after_them() -> None:
    rf2, rg2 = 33e3, 10e3
    stage_two = [
        {"ref": "Rg", "type": "R", "nodes": ["n", "0"], "value": rg2},
        {"ref": "Rf", "type": "R", "nodes": ["n", "out"], "value": rf2},
        {"ref": "U1", "type": "opamp", "nodes": ["in", "n", "out"], "model": "vos_only"},
    ]
    stages = [{"id": "a", "name": "first", "ports": {"in": "in", "out": "out"}, "parts": non_inverting()},
              {"id": "b", "name": "second", "ports": {"in": "in", "out": "out"}, "parts": stage_two}]
    models = {"op": model(vos_v=VOS, ib_a=IB, ios_a=IOS), "vos_only": model(vos_v=0.5e-3)}
    project = make_project([], models=models, stages=stages)
    budgets = dc_budgets(project)
    second_from_input, second_in_chain = budgets.from_input["b"], budgets.in_chain["b"]
    assert isinstance(second_from_input, DcBudget) and isinstance(second_in_chain, DcBudget)
    gain_two = 1 + rf2 / rg2
    # Source: S. Franco, 3rd ed., sec. 5.1 (value from memory): each stage's input offset is multiplied
    # by its own noise gain and then by the gain of every stage after it.
    first_vos = next(item for item in second_from_input.contributions if item.stage_id == "a" and item.kind == "vos")
    assert first_vos.out_v == pytest.approx(VOS * (1 + RF / RG) * gain_two, rel=1e-9)
    assert [item.stage_id for item in second_in_chain.contributions if item.kind == "vos"] == ["b"]
    assert by_kind(second_in_chain, "vos").out_v == pytest.approx(0.5e-3 * gain_two, rel=1e-9)


def test_an_unstable_place_has_no_dc_budget() -> None:
    from stagewise.engine.analysis import ProjectAnalysis  # noqa: PLC0415

    # More positive feedback (10k/(10k + 4k7) = 0.68 to the + input) than negative (0.5): a pole in the right
    # half-plane, so the circuit never settles (common practice, no source).
    parts = [{"ref": "R1", "type": "R", "nodes": ["in", "p"], "value": "10k"},
             {"ref": "R2", "type": "R", "nodes": ["p", "out"], "value": "4k7"},
             {"ref": "R3", "type": "R", "nodes": ["n", "0"], "value": "10k"},
             {"ref": "R4", "type": "R", "nodes": ["n", "out"], "value": "10k"},
             {"ref": "U1", "type": "opamp", "nodes": ["p", "n", "out"], "model": "op"}]
    project = make_project(parts, models={"op": {"a0_db": 100, "gbw_hz": "1M", "vos_v": "1m"}})
    analysis = ProjectAnalysis(project, spread=False)
    document, why = analysis.dc_document("isolated", "s")
    assert document is None and "unstable" in why


# The contract's dc keys and the check metric that reads each (the dc object's `gain` is `dc_gain`).
CONTRACT_METRICS = {"gain": "dc_gain", "gain_error_pct": "gain_error_pct", "offset_out_v": "offset_out_v",
                    "drift_out_v_per_c": "drift_out_v_per_c", "total_wc_v": "total_wc_v",
                    "total_rss_v": "total_rss_v"}
CHAIN_ONLY = {"total_wc_lsb": "total_wc_lsb", "total_rss_lsb": "total_rss_lsb", "total_wc_pct_fs": "total_wc_pct_fs"}


def test_every_contract_key_of_dc_is_a_check_in_every_place() -> None:
    # Common practice, no source: the contract; each dc key is a metric a check can name in
    # every place a check can sit, and a check on it reads the number analyze --json reports there.
    from stagewise.engine.analysis import ProjectAnalysis  # noqa: PLC0415
    from stagewise.model.project import Check  # noqa: PLC0415
    from stagewise.model.validate import validate  # noqa: PLC0415
    from stagewise.model.values import Quantity  # noqa: PLC0415
    from stagewise.review.checks import evaluate_check  # noqa: PLC0415

    project = make_project(non_inverting(Rf={"tol": "1%", "tc_ppm_per_c": 25}),
                           settings_keys={"temp_range_c": [-20, 70]}, amplitude="0.1",
                           converter={"full_scale_vpp": 5, "bits": 16})
    stage = project.stages[0]
    wanted = [(where, key, metric) for where in ("isolated", "in_chain", "from_input", "chain")
              for key, metric in (CONTRACT_METRICS | (CHAIN_ONLY if where == "chain" else {})).items()]
    for index, (where, _key, metric) in enumerate(wanted):
        stage.checks.append(Check(id=f"c{index}", text=metric, metric=metric, where=where,
                                  max=Quantity.of("1e9")))
    assert validate(project) == []
    analysis = ProjectAnalysis(project, spread=False)
    document = analysis.document()
    places = {"isolated": document["stages"][0]["isolated"], "in_chain": document["stages"][0]["in_chain"],
              "from_input": document["stages"][0]["from_input"], "chain": document["chain"]}
    for check, (where, key, _metric) in zip(stage.checks, wanted, strict=True):
        result = evaluate_check(check, stage, project, analysis)
        reported = places[where]["dc"][key]
        assert reported is not None, (where, key)
        assert result.value == pytest.approx(reported, rel=1e-12), (where, key)
        assert result.state.name == "MET", (where, key, result.why)


def test_a_check_naming_gain_is_told_the_metric_is_dc_gain() -> None:
    # Common practice, no source: a refused name says which name to use.
    from stagewise.model.project import Check  # noqa: PLC0415
    from stagewise.model.validate import validate  # noqa: PLC0415
    from stagewise.model.values import Quantity  # noqa: PLC0415

    project = make_project(non_inverting())
    project.stages[0].checks.append(Check(id="g", text="gain", metric="gain", where="isolated",
                                          min=Quantity.of("5")))
    problems = validate(project)
    assert len(problems) == 1 and "dc_gain" in problems[0] and "stages[0].checks[0].metric" in problems[0]


@pytest.mark.parametrize(("input_type", "range_c", "factor"), [
    # Common practice, no source: JFET input bias current doubles about every 10 °C; over [0, 30] °C
    # it is largest at 30 °C (2^0.5), although 0 °C lies farther from 25 °C (where it is 2^-2.5).
    ("jfet", [0, 30], 2**0.5),
    # Source: Gray, Hurst, Lewis and Meyer, ch. 1 (β +0.7 %/°C, value from memory): a bipolar Ib is
    # largest at the cold end, 20 °C here, although 85 °C lies farther from 25 °C.
    ("bipolar", [20, 85], math.exp(0.035)),
    # Below 25 °C only, a JFET's Ib only shrinks: no drift is added to the 25 °C term.
    ("jfet", [-20, 20], 1.0),
])
def test_bias_current_drift_is_taken_where_the_bias_current_is_largest(input_type: str, range_c: list[float],
                                                                       factor: float) -> None:
    ib = 150e-12
    models = {"op": model(ib_a=ib, ios_a=ib / 4, input_type=input_type)}
    project = make_project(non_inverting(), models=models, settings_keys={"temp_range_c": range_c})
    result = budget(project, "isolated")
    at_25 = by_kind(result, "ib").out_v
    # Source: Franco, 3rd ed., sec. 5.1 (value from memory): Ib into both pins of a non-inverting
    # stage gives Ib·(Rf − Rs·(1 + Rf/Rg)) at the output.
    assert at_25 == pytest.approx(ib * (RF - RS * (1 + RF / RG)), rel=1e-9)
    drift = [item for item in result.contributions if item.kind == "ib_drift"]
    rise = sum(item.out_v for item in drift)
    # The worst Ib error over the range is Ib(T_worst)·(...), the 25 °C term plus the drift term.
    assert at_25 + rise == pytest.approx(at_25 * factor, rel=1e-9)
