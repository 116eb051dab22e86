"""Per-(period, layer, cell) sums of a block: per-pixel sums first, then pixels into cells.

The reference is the definition written out value by value with a pandas group-by: for
every valid value x of level z, pixel p and time step t, add w[z, p] and w[z, p] * x to the
group (period of t, layer of z, cell of p) and count it (area-weighted mean, CF conventions
chapter 7 cell_methods "area: mean"; the weights are pixel areas times level thickness).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from hypothesis import given
from hypothesis import strategies as st

from harmonize.gridded.aggregate import CellPeriodSums


def _reference(step_period, values, valid, pixel_cell, weight, level_layer) -> pd.DataFrame:  # type: ignore[no-untyped-def]
    t, z, p = np.nonzero(valid)
    frame = pd.DataFrame({
        "period": step_period[t], "layer": level_layer[z], "cell": pixel_cell[p],
        "sum_w": weight[z, p], "sum_wx": weight[z, p] * values[t, z, p], "n": 1,
    })
    return frame.groupby(["period", "layer", "cell"], as_index=False, sort=True).sum()


@given(st.integers(1, 6), st.integers(1, 3), st.integers(1, 12), st.integers(0, 2**32 - 1))
def test_sums_equal_the_value_by_value_definition(n_t: int, n_z: int, n_p: int, seed: int) -> None:
    rng = np.random.default_rng(seed)
    n_layers, n_cells = 2, 4
    step_period = rng.integers(0, 3, n_t)  # periods need not be contiguous in a block
    level_layer = rng.integers(-1, n_layers, n_z)  # -1: a level below the deepest layer
    pixel_cell = rng.integers(0, n_cells, n_p)
    weight = rng.uniform(0.5, 2.0, (n_z, n_p))
    values = rng.normal(10, 3, (n_t, n_z, n_p))
    valid = (rng.random((n_t, n_z, n_p)) < 0.7) & (level_layer >= 0)[None, :, None]
    values[~valid] = np.nan
    sums = CellPeriodSums(n_layers, n_cells)
    # two chunks, as reduce_variable feeds them (blocks of time steps)
    half = n_t // 2
    for sl in (slice(0, half), slice(half, n_t)):
        sums.add(step_period[sl], values[sl], valid[sl], pixel_cell, weight, level_layer)
    got = sums.result()
    want = _reference(step_period, values, valid, pixel_cell, weight, level_layer)
    assert got[["period", "layer", "cell", "n"]].astype(np.int64).to_numpy().tolist() == \
        want[["period", "layer", "cell", "n"]].astype(np.int64).to_numpy().tolist()
    np.testing.assert_allclose(got["sum_w"], want["sum_w"], rtol=1e-12)
    np.testing.assert_allclose(got["sum_wx"], want["sum_wx"], rtol=1e-12)


def test_two_dimensional_field_without_levels() -> None:
    # 2 steps of one period, 3 pixels in cells 0, 0, 1; pixel 2 missing at step 1
    values = np.array([[[1.0, 2.0, 3.0]], [[5.0, 6.0, np.nan]]])
    valid = ~np.isnan(values)
    sums = CellPeriodSums(1, 2)
    sums.add(np.array([0, 0]), values, valid, np.array([0, 0, 1]), np.array([[1.0, 2.0, 4.0]]))
    got = sums.result()
    # cell 0: weights 1+1+2+2 = 6, weighted sum 1*1 + 1*5 + 2*2 + 2*6 = 22, 4 values;
    # cell 1: one value 3 of weight 4
    assert got["sum_w"].tolist() == [6.0, 4.0]
    assert got["sum_wx"].tolist() == [22.0, 12.0]
    assert got["n"].tolist() == [4, 1]


@given(st.lists(st.tuples(st.integers(-(2**40), 2**40), st.integers(-(2**20), 2**20)), max_size=40))
def test_unique_pairs_equal_a_row_wise_unique(pairs: list[tuple[int, int]]) -> None:
    from harmonize.adapters.gridded import unique_pairs

    ix = np.array([p[0] for p in pairs], np.int64)
    iy = np.array([p[1] for p in pairs], np.int64)
    got, inverse = unique_pairs(ix, iy)
    if not pairs:
        assert got.shape == (0, 2) and inverse.size == 0
        return
    want, want_inverse = np.unique(np.stack([ix, iy], axis=1), axis=0, return_inverse=True)
    assert got.tolist() == want.tolist()
    assert inverse.tolist() == want_inverse.ravel().tolist()


def test_unique_pairs_beyond_the_key_range_falls_back() -> None:
    from harmonize.adapters.gridded import unique_pairs

    ix = np.array([-(2**62), 2**40, -(2**62)], np.int64)  # the grid's sentinel for unprojectable points
    iy = np.array([5, -(2**30), 5], np.int64)
    got, inverse = unique_pairs(ix, iy)
    assert got.tolist() == [[-(2**62), 5], [2**40, -(2**30)]] and inverse.tolist() == [0, 1, 0]
