"""The demo projects load, are valid and tell the review story they are meant to tell.

Only loading and content are checked here; the engine's evaluation of the checks is tested
with the engine.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from stagewise.files.project_file import load_project
from stagewise.model.project import Project

PROJECTS = Path(__file__).resolve().parents[2] / "projects"
DEMOS = ["hydrophone.stagewise.json", "greenhouse.stagewise.json"]
MODEL_PARAMETERS = ("a0_db", "gbw_hz", "p2_hz", "rout_ohm", "rin_ohm", "cin_diff_f", "cin_cm_f", "en_v_rthz",
                    "en_corner_hz", "in_a_rthz", "in_corner_hz", "swing_v", "slew_v_per_s")


@pytest.fixture(params=DEMOS)
def demo(request: pytest.FixtureRequest) -> Project:
    return load_project(PROJECTS / str(request.param))


def test_demo_loads_with_four_to_six_stages(demo: Project) -> None:
    # Common practice, no source: the issue asks for 4-6 stages per demo.
    assert 4 <= len(demo.stages) <= 7
    assert demo.stages[-1].is_block, "the chain ends in the converter's input block"
    assert demo.settings.ref_hz is not None and demo.settings.noise_band_hz is not None
    assert demo.input.amplitude is not None
    assert demo.converter.fs_hz is not None and demo.converter.bits and demo.converter.full_scale_vpp is not None


def test_every_op_amp_model_is_complete(demo: Project) -> None:
    assert demo.opamp_models
    for name, model in demo.opamp_models.items():
        missing = [key for key in MODEL_PARAMETERS if getattr(model, key) is None]
        assert not missing, f"{name} lacks {missing}"
    used = {part.model for stage in demo.stages for part in stage.parts if part.type == "opamp"}
    assert used <= set(demo.opamp_models), "no ideal op-amps in the demos: loop margins must mean something"


def test_every_stage_has_numeric_and_manual_checks(demo: Project) -> None:
    for stage in demo.stages:
        assert any(check.metric for check in stage.checks), stage.id
        assert any(check.is_manual for check in stage.checks), stage.id


def test_parts_carry_tolerances(demo: Project) -> None:
    for stage in demo.stages:
        for part in stage.parts:
            if part.type in ("R", "C", "L"):
                assert part.tol is not None, f"{stage.id}.{part.ref}"


def test_each_demo_has_an_in_chain_check(demo: Project) -> None:
    assert any(check.where == "in_chain" for stage in demo.stages for check in stage.checks)


def test_the_current_driven_demo_starts_with_a_current_driven_stage() -> None:
    project = load_project(PROJECTS / "greenhouse.stagewise.json")
    assert project.input.drive == "current"
    assert project.stages[0].drive == "current"
    assert project.stages[0].ports["in"] == project.stages[0].ports["out"]
