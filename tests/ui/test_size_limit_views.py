"""Views of a chain above the engine's size limit: the response is drawn, the model views say why not."""

from __future__ import annotations

import numpy as np
import pytest

from stagewise.engine.chain import merged_system
from stagewise.engine.stage import MODEL_MAX_UNKNOWNS
from stagewise.model.project import OpampModel, Part, Project, Stage
from stagewise.model.values import Quantity
from stagewise.ui import analyses


def _chain(stages: int) -> Project:
    # Our own values: an RC low-pass (1k5, 1n) into a finite op-amp follower, repeated.
    model = OpampModel(a0_db=Quantity.of(100), gbw_hz=Quantity.of("10M"), rout_ohm=Quantity.of(50))
    return Project("long chain", opamp_models={"u": model}, stages=[Stage(f"s{index + 1}", f"S{index + 1}", parts=[
        Part("R1", "R", ["in", "mid"], Quantity.of("1k5")),
        Part("C1", "C", ["mid", "0"], Quantity.of("1n")),
        Part("U1", "opamp", ["mid", "out", "out"], model="u"),
    ]) for index in range(stages)])


def test_a_chain_above_the_limit_draws_its_response_and_says_why_it_has_no_roots() -> None:
    project = _chain(45)
    merged = merged_system(project)
    driven = merged.driven()
    assert driven.g.shape[0] > MODEL_MAX_UNKNOWNS
    context = analyses.Context()
    context.begin(project, None)
    trace = analyses.chain_response(project, context)
    s = 2j * np.pi * trace.f_hz
    # Reference library: numpy linalg.solve (LAPACK gesv) on the merged circuit, and numpy unwrap
    # for the phase (continuous, starting near 0° at low frequency where the chain is flat).
    dense = np.linalg.solve(driven.g[None] + s[:, None, None] * driven.c[None],
                            np.broadcast_to(driven.b[:, None], (len(s), len(driven.b), 1)))[:, driven.output, 0]
    np.testing.assert_allclose(trace.mag_db, 20.0 * np.log10(np.abs(dense)), atol=1e-9)
    np.testing.assert_allclose(trace.phase_deg, np.degrees(np.unwrap(np.angle(dense))), atol=1e-6)
    for show in (lambda: analyses.chain_roots(project, context), lambda: analyses.chain_step(project, context)):
        with pytest.raises(analyses.NotAvailable, match=f"above the {MODEL_MAX_UNKNOWNS}"):
            show()
    second = project.stage("s2")
    assert second is not None
    with pytest.raises(analyses.NotAvailable, match="stability is not decided"):
        analyses.in_chain_step(second, project, context)
