"""Area-weighted means of grid values per study cell, period (month or season) and layer.

For the valid values x_i of a cell and period, with pixel areas w_i (km2, times the level
thickness for 3-D fields), the mean is sum(w_i x_i) / sum(w_i); the effort is the valid
pixel area per time step, sum(w_i) / (time steps of the period in the file), so a fully
covered cell reports the area of its pixels, a half-clouded one half of it.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
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
        key = self.cell_keys(pixel_cell, layer[levels])
        w = np.asarray(weight, np.float64)[levels]
        x = np.where(valid, values, 0.0)
        lv = slice(None) if levels.size == n_z else levels  # a slice: no copy of the block
        for j, period in enumerate(local.tolist()):
            steps = np.flatnonzero(inverse == j)
            run = slice(int(steps[0]), int(steps[-1]) + 1) if steps[-1] - steps[0] + 1 == steps.size else steps
            # per-pixel sums over the period's time steps first (a reduction along one axis),
            # then pixels (and levels) into cells
            self.add_pixel_sums(period, key, valid[run][:, lv].sum(axis=0), x[run][:, lv].sum(axis=0), w)

    def cell_keys(self, pixel_cell: np.ndarray, layer: np.ndarray) -> np.ndarray:
        """(Z * P,) flat (layer, cell) key of each level (layer index >= 0) and pixel, for :meth:`add_pixel_sums`."""
        return (np.asarray(layer, np.int64)[:, None] * self.n_cells
                + np.asarray(pixel_cell, np.int64)[None, :]).ravel()

    def add_pixel_sums(self, period: int, key: np.ndarray, n: np.ndarray, total: np.ndarray,
                       weight: np.ndarray) -> None:
        """Add one period's per-pixel sums: pixels (and levels) into cells, one weighted bincount per quantity.

        Parameters
        ----------
        period
            Period index.
        key
            (Z * P,) from :meth:`cell_keys`.
        n, total
            (Z, P) count and sum of the valid values of each level and pixel over the period's steps.
        weight
            (Z, P) weight of each level and pixel.
        """
        if not np.any(n):
            return
        size = self.n_layers * self.n_cells
        sum_w = np.bincount(key, weights=(weight * n).ravel(), minlength=size)
        sum_wx = np.bincount(key, weights=(weight * total).ravel(), minlength=size)
        count = np.bincount(key, weights=np.ravel(n), minlength=size).astype(np.int64)  # exact below 2**53
        hit = np.flatnonzero(count)
        lay, cell = np.divmod(hit, self.n_cells)
        self._parts.append(pd.DataFrame({
            "period": np.full(hit.size, period, dtype=np.int64), "layer": lay, "cell": cell,
            "sum_w": sum_w[hit], "sum_wx": sum_wx[hit], "n": count[hit],
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


class PixelPeriodSums:
    """Per-pixel counts and sums of the periods being read, handed to the cell sums when complete.

    A period's sums grow block by block (blocks of time steps, or of grid rows) over the
    positions of the read window; when its last time step has been read (:meth:`close`) its
    inside pixels are picked and go into cells once, by :meth:`CellPeriodSums.add_pixel_sums`.
    At most ``max_open`` periods are held (each a count and a sum per level and window
    position): opening one more first hands over the oldest (the cell sums merge parts of a
    period), so memory stays bounded however the time axis is ordered. With ``max_open = 0``
    each block is handed over at once. The values used, fill and invalid of the inside pixels
    are counted on the way (:attr:`used`, :attr:`fill`, :attr:`invalid`, complete after
    :meth:`close_all`).

    Parameters
    ----------
    cells
        Where complete periods go.
    inside, window_size
        Sorted window positions of the P pixels inside the domain; positions in the window.
    key, weight
        From :meth:`CellPeriodSums.cell_keys`, and (Z, P) weights, for the P inside pixels.
    total_dtype
        dtype of the sums (int64 for stored integers, float64 for decoded values).
    canonical_sum
        (n, total) -> sum of the canonical values, applied to a period's sums when handed over.
    """

    def __init__(self, cells: CellPeriodSums, inside: np.ndarray, window_size: int, key: np.ndarray,
                 weight: np.ndarray, total_dtype: np.dtype,
                 canonical_sum: Callable[[np.ndarray, np.ndarray], np.ndarray], max_open: int) -> None:
        self.cells = cells
        self.inside = inside
        self.shape = (weight.shape[0], window_size)
        self.key = key
        self.weight = weight
        self.total_dtype = np.dtype(total_dtype)
        self.canonical_sum = canonical_sum
        self.max_open = max_open
        self.used = self.fill = self.invalid = 0
        self._open: dict[int, tuple[np.ndarray, np.ndarray]] = {}
        # fill and invalid counts per window position, picked once at the end (held mode)
        self._masked = (np.zeros(self.shape, np.int64), np.zeros(self.shape, np.int64)) if max_open else None

    def add(self, period: int, start: int, n: np.ndarray, total: np.ndarray, fill: np.ndarray,
            invalid: np.ndarray) -> None:
        """Add (Z, w) counts and sums of one block's steps of ``period`` at window positions start..start + w:
        values kept ``n`` and their sum ``total``, fill values and invalid values."""
        span = slice(start, start + n.shape[1])
        if self._masked is None:
            a, b = (int(i) for i in np.searchsorted(self.inside, [span.start, span.stop]))
            pick = self.inside[a:b] - start
            n = n[:, pick]
            self.used += int(n.sum())
            self.fill += int(fill[:, pick].sum())
            self.invalid += int(invalid[:, pick].sum())
            key = self.key.reshape(self.weight.shape)[:, a:b].ravel()
            self.cells.add_pixel_sums(period, key, n, self.canonical_sum(n, total[:, pick]), self.weight[:, a:b])
            return
        if period not in self._open:
            if len(self._open) >= self.max_open:
                self.close(next(iter(self._open)))
            self._open[period] = (np.zeros(self.shape, np.int64), np.zeros(self.shape, self.total_dtype))
        acc_n, acc_total = self._open[period]
        acc_n[:, span] += n
        acc_total[:, span] += total
        self._masked[0][:, span] += fill
        self._masked[1][:, span] += invalid

    def close(self, period: int) -> None:
        """Hand a period's sums to the cell sums (nothing if it is not open)."""
        held = self._open.pop(period, None)
        if held is not None:
            n, total = (x[:, self.inside] for x in held)
            self.used += int(n.sum())
            self.cells.add_pixel_sums(period, self.key, n, self.canonical_sum(n, total), self.weight)

    def close_all(self) -> None:
        """Hand over every open period and finish the counts."""
        for period in list(self._open):
            self.close(period)
        if self._masked is not None:
            self.fill += int(self._masked[0][:, self.inside].sum())
            self.invalid += int(self._masked[1][:, self.inside].sum())
            self._masked = (np.zeros(self.shape, np.int64), np.zeros(self.shape, np.int64))
