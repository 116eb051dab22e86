"""Area-weighted means of grid values per study cell, period (month or season) and layer.

For the valid values x_i of a cell and period, with pixel areas w_i (km2, times the level
thickness for 3-D fields), the mean is sum(w_i x_i) / sum(w_i); the effort is the valid
pixel area per time step, sum(w_i) / (time steps of the period in the file), so a fully
covered cell reports the area of its pixels, a half-clouded one half of it.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from harmonize.tagging import season_year_offsets

PERIODS = ("month", "season")


@dataclass(frozen=True)
class Periods:
    """The periods of a time axis.

    ``step_period`` gives the period index (into ``table``) of each time step, -1 for a
    step whose time could not be decoded. ``table`` has label, start, end (exclusive,
    naive UTC, on the Gregorian calendar whatever the file's calendar) and n_steps.
    """

    step_period: np.ndarray
    table: pd.DataFrame


def assign_periods(year: np.ndarray, month: np.ndarray, valid: np.ndarray, period: str,
                   seasons: Mapping[str, tuple[int, ...]]) -> Periods:
    """Map time steps (calendar year and month) to months or to the study's seasons.

    A season holding December and January belongs to the year of its January (the
    contract's season_year rule), so December 2019 is in "2020-winter".
    """
    year = np.asarray(year, np.int64)
    month = np.asarray(month, np.int64)
    valid = np.asarray(valid, bool)
    if period == "month":
        key = year * 12 + (month - 1)
    elif period == "season":
        names = list(seasons)
        index = np.zeros(13, dtype=np.int64)
        for i, name in enumerate(names):
            index[list(seasons[name])] = i
        offsets = season_year_offsets(seasons)
        key = (year + offsets[month]) * 16 + index[month]
    else:
        raise ValueError(f"period '{period}' is not one of {', '.join(PERIODS)}")
    keys, inverse, counts = np.unique(key[valid], return_inverse=True, return_counts=True)
    step_period = np.full(year.shape, -1, dtype=np.int64)
    step_period[valid] = inverse
    rows = []
    for k in keys.tolist():  # one step per period, not per value
        if period == "month":
            y, m = divmod(k, 12)
            start = pd.Timestamp(year=y, month=m + 1, day=1)
            rows.append((f"{y:04d}-{m + 1:02d}", start, start + pd.DateOffset(months=1)))
        else:
            sy, i = divmod(k, 16)
            name = names[i]
            offs = season_year_offsets(seasons)
            firsts = [pd.Timestamp(year=sy - int(offs[m]), month=m, day=1) for m in seasons[name]]
            rows.append((f"{sy:04d}-{name}", min(firsts), max(firsts) + pd.DateOffset(months=1)))
    table = pd.DataFrame(rows, columns=["label", "start", "end"])
    table["start"] = table["start"].astype("datetime64[us]")
    table["end"] = table["end"].astype("datetime64[us]")
    table["n_steps"] = counts.astype(np.int64)
    return Periods(step_period, table)


@dataclass
class CellPeriodSums:
    """Running weighted sums per (period, layer, cell), fed chunk by chunk.

    Memory holds only the non-empty sums of each chunk (of the size of the output), never
    the values themselves.
    """

    n_layers: int
    n_cells: int
    _parts: list[pd.DataFrame] = field(default_factory=list)

    def add(self, step_period: np.ndarray, values: np.ndarray, valid: np.ndarray,
            pixel_cell: np.ndarray, weight: np.ndarray, level_layer: np.ndarray | None = None) -> None:
        """Add one chunk.

        Parameters
        ----------
        step_period
            (T,) period index of each time step of the chunk.
        values, valid
            (T, Z, P) decoded values and their validity (Z = 1 for 2-D fields).
        pixel_cell
            (P,) compact cell index of each pixel.
        weight
            (Z, P) weight of each value: pixel area (km2) times level thickness (m) for 3-D fields.
        level_layer
            (Z,) layer index of each level (None: all in layer 0).
        """
        if not valid.any():
            return
        local, inverse = np.unique(step_period, return_inverse=True)
        n_z = values.shape[1]
        layer = np.zeros(n_z, np.int64) if level_layer is None else np.asarray(level_layer, np.int64)
        # levels below the deepest layer (-1) hold no valid value: left out of the keys
        levels = np.flatnonzero(layer >= 0)
        key = (layer[levels, None] * self.n_cells + np.asarray(pixel_cell, np.int64)[None, :]).ravel()
        w = np.asarray(weight, np.float64)[levels]
        size = self.n_layers * self.n_cells
        x = np.where(valid, values, 0.0)
        lv = slice(None) if levels.size == n_z else levels  # a slice: no copy of the block
        for j, period in enumerate(local.tolist()):
            steps = np.flatnonzero(inverse == j)
            run = slice(int(steps[0]), int(steps[-1]) + 1) if steps[-1] - steps[0] + 1 == steps.size else steps
            # per-pixel sums over the period's time steps first (a reduction along one axis),
            # then pixels (and levels) into cells: one weighted bincount over Z x P entries
            # per quantity instead of one int64 key and three bincounts over every value
            n_zp = valid[run][:, lv].sum(axis=0)
            if not n_zp.any():
                continue
            s_zp = x[run][:, lv].sum(axis=0)
            sum_w = np.bincount(key, weights=(w * n_zp).ravel(), minlength=size)
            sum_wx = np.bincount(key, weights=(w * s_zp).ravel(), minlength=size)
            n = np.bincount(key, weights=n_zp.ravel(), minlength=size).astype(np.int64)  # exact below 2**53
            hit = np.flatnonzero(n)
            lay, cell = np.divmod(hit, self.n_cells)
            self._parts.append(pd.DataFrame({
                "period": np.full(hit.size, period, dtype=local.dtype), "layer": lay, "cell": cell,
                "sum_w": sum_w[hit], "sum_wx": sum_wx[hit], "n": n[hit],
            }))

    def result(self) -> pd.DataFrame:
        """period, layer, cell, sum_w, sum_wx, n summed over all chunks."""
        if not self._parts:
            return pd.DataFrame({"period": np.array([], np.int64), "layer": np.array([], np.int64),
                                 "cell": np.array([], np.int64), "sum_w": [], "sum_wx": [],
                                 "n": np.array([], np.int64)})
        allp = pd.concat(self._parts, ignore_index=True)
        self._parts = [allp]
        return allp.groupby(["period", "layer", "cell"], as_index=False, sort=True).sum()
