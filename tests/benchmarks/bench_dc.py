"""DC accuracy budget: every place of a 10-stage chain by adjoint solves, against the direct method
(one solve of the merged DC matrix per error source).

Each stage (our own values) is a non-inverting amplifier with a source resistor, toleranced and
temperature-rated resistors and an RC output filter; its op-amp model carries offset, drift, bias
and offset currents, CMRR and PSRR; the project has a temperature range, a supply variation and a
converter. Goal: the whole budget (every stage isolated, in chain and from the input, and the
chain at the converter) in under 50 ms.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from run import Benchmark

from stagewise.engine import dc
from stagewise.engine.chain import merged_system
from stagewise.model.project import Converter, OpampModel, Part, Project, Settings, Stage
from stagewise.model.values import Quantity

STAGES = 10


def dc_chain(stages: int = STAGES) -> Project:
    """A chain of non-inverting stages with every DC key given."""
    model = OpampModel(a0_db=Quantity.of(112), gbw_hz=Quantity.of("4M"), rout_ohm=Quantity.of(60),
                       input_type="jfet", vos_v=Quantity.of("400u"), vos_drift_v_per_c=Quantity.of("5u"),
                       ib_a=Quantity.of("30p"), ios_a=Quantity.of("8p"), cmrr_db=Quantity.of(94),
                       psrr_db=Quantity.of(100))
    chain = []
    for index in range(stages):
        rf = 1e3 * (4.7 + 0.5 * (index % 4))
        parts = [
            Part("Rs", "R", ["in", "p"], Quantity.of(1e3 * (1 + index % 3)), Quantity.of("1%"),
                 tc_ppm_per_c=Quantity.of(100)),
            Part("Rg", "R", ["n", "0"], Quantity.of(10e3), Quantity.of("0.1%"), tc_ppm_per_c=Quantity.of(25)),
            Part("Rf", "R", ["n", "o"], Quantity.of(rf), Quantity.of("0.1%"), tc_ppm_per_c=Quantity.of(25)),
            Part("U1", "opamp", ["p", "n", "o"], model="jfet"),
            Part("Ro", "R", ["o", "out"], Quantity.of(100), Quantity.of("1%"), tc_ppm_per_c=Quantity.of(100)),
            Part("Co", "C", ["out", "0"], Quantity.of("1n"), Quantity.of("5%")),
        ]
        chain.append(Stage(f"s{index + 1}", f"Amplifier {index + 1}", parts=parts))
    settings = Settings(temp_range_c=(Quantity.of(-20), Quantity.of(70)), supply_variation_v=Quantity.of("0.3"))
    return Project("dc benchmark chain", settings=settings, opamp_models={"jfet": model}, stages=chain,
                   converter=Converter(fs_hz=Quantity.of("100k"), bits=18, full_scale_vpp=Quantity.of(10)))


def _setup() -> dict[str, Any]:
    project = dc_chain()
    merged = merged_system(project)
    return {"project": project, "merged": merged}


def _ours(context: Any) -> object:
    return dc.dc_budgets(context["project"], context["merged"])


def _direct_transfer(self: Any, output: int, collector: Any) -> tuple[np.ndarray, ...]:
    """The direct method: one forward solve G·y = w per source (and per path), read at ``output``."""
    if output not in self.transfers:
        self.transfers[output] = tuple(
            np.array([np.linalg.solve(self.g, matrix[:, column])[output] for column in range(matrix.shape[1])])
            for matrix in collector.matrices())
    return self.transfers[output]


def _direct(context: Any) -> object:
    # The same budget with every source's transfer from its own forward solve (no adjoint).
    adjoint = dc._Solved.transfer
    dc._Solved.transfer = _direct_transfer  # type: ignore[method-assign]
    try:
        return dc.dc_budgets(context["project"], context["merged"])
    finally:
        dc._Solved.transfer = adjoint  # type: ignore[method-assign]


def benchmarks() -> list[Benchmark]:
    return [
        Benchmark(
            name="dc_budget_10_stages",
            ours=_ours,
            baseline=_direct,
            setup=_setup,
            goal_seconds=0.05,
            note=f"{STAGES} stages, ~12 DC sources each: every place's budget (one adjoint solve per output, "
                 "Woodbury for the ideal gains) vs the same budget with one forward solve per source",
        ),
    ]
