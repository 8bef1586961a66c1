"""Long chains are swept by a sparse LU per frequency: the same numbers as a dense solve."""

from __future__ import annotations

import numpy as np
import pytest

from stagewise.engine import sweep
from stagewise.engine.chain import merged_system
from stagewise.model.project import OpampModel, Part, Project, Stage
from stagewise.model.values import Quantity


def _chain(stages: int) -> Project:
    # Our own values: an RC low-pass (2k2, 1n5) into a finite op-amp follower, repeated.
    model = OpampModel(a0_db=Quantity.of(98), gbw_hz=Quantity.of("8M"), rout_ohm=Quantity.of(45))
    return Project("sparse sweep", opamp_models={"u": model}, stages=[Stage(f"s{index}", f"S{index}", parts=[
        Part("R1", "R", ["in", "mid"], Quantity.of("2k2")),
        Part("C1", "C", ["mid", "0"], Quantity.of("1n5")),
        Part("U1", "opamp", ["mid", "out", "out"], model="u"),
    ]) for index in range(stages)])


def test_long_chain_takes_the_sparse_path_and_matches_a_dense_solve() -> None:
    merged = merged_system(_chain(30))
    driven = merged.driven()
    assert sweep._sparse_pattern(driven.g, driven.c)
    s = 1j * sweep.TWO_PI * np.logspace(0, 8, 97)
    rhs = np.zeros((driven.g.shape[0], 2), dtype=complex)
    rhs[:, 0] = driven.b
    rhs[merged.interface_indices[7], 1] = 1.0
    got = sweep.solve_batched(driven.g, driven.c, rhs, s)
    # Reference library: numpy linalg.solve (LAPACK gesv) on the stacked dense matrices.
    dense = np.linalg.solve(driven.g[None] + s[:, None, None] * driven.c[None], np.broadcast_to(rhs, (len(s),) + rhs.shape))
    scale = np.max(np.abs(dense), axis=1, keepdims=True)
    assert np.max(np.abs(got - dense) / scale) < 1e-10
    single = sweep.solve_batched(driven.g, driven.c, rhs[:, 0], s)
    assert single.shape == (len(s), driven.g.shape[0])
    assert np.max(np.abs(single - dense[:, :, 0]) / scale[:, :, 0]) < 1e-10


def test_a_singular_sparse_matrix_raises_as_the_dense_solve_does() -> None:
    n = sweep.SPARSE_MIN_UNKNOWNS + 4
    g = np.eye(n)
    g[3, 3] = 0.0  # an unknown nothing determines: singular at every s
    c = np.zeros((n, n))
    # Reference library: numpy linalg.solve raises LinAlgError for an exactly singular matrix.
    with pytest.raises(np.linalg.LinAlgError):
        np.linalg.solve(g, np.ones(n))
    with pytest.raises(np.linalg.LinAlgError):
        sweep.solve_batched(g, c, np.ones(n, dtype=complex), np.array([1j, 2j]))



def test_points_solved_again_come_from_the_kept_solutions_and_leave_with_the_pencil() -> None:
    import gc  # noqa: PLC0415

    driven = merged_system(_chain(30)).driven()
    g, c = driven.g.copy(), driven.c.copy()
    s = 1j * sweep.TWO_PI * np.array([3e3, 1e4, 3e4])
    first = sweep.solve_batched(g, c, driven.b.astype(complex), s)
    again = sweep.solve_batched(g, c, driven.b.astype(complex), s[::-1])[::-1]
    # Reference library: numpy linalg.solve (LAPACK gesv) at each point.
    dense = np.array([np.linalg.solve(g + point * c, driven.b.astype(complex)) for point in s])
    assert np.max(np.abs(first - dense)) < 1e-10 * np.max(np.abs(dense))
    assert np.array_equal(first, again)
    other = driven.b.astype(complex) * 2.0  # another right-hand side is solved, not looked up
    assert np.allclose(sweep.solve_batched(g, c, other, s), 2.0 * dense, rtol=1e-12, atol=0)
    key = (id(g), id(c))
    assert key in sweep._PATTERNS
    del g, c
    gc.collect()
    assert key not in sweep._PATTERNS
