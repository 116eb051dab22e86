"""Masking grid values and summing them per pixel along time, on the stored integers where the data are packed.

A value is kept when it is not a fill value, lies in the file's valid range and, in the
canonical unit, in the variable's plausible range; the others are counted by reason. For
packed integers (CF 1.11 section 8.1, "Packed data": unpacked = packed x scale_factor +
add_offset; section 2.5.1, missing data: _FillValue, missing_value and valid_min/valid_max/
valid_range) every test is made on the stored integers, with bounds converted once into
the integer domain by bisection with the float decode itself
(:func:`harmonize.gridded.cf.integer_interval`), so each value is classified exactly as
decoding it to float64 and comparing would classify it. The kept integers are summed per
pixel in int64 (exact) and only the sums are unpacked: sum(x) = a x sum(r) + b x n, with
a = scale_factor x unit scale and b = add_offset x unit scale + unit offset, the canonical
value of a stored r being r x a + b.

Other stored types (floats, 64-bit integers, whose sums could overflow) are decoded to
float64 and summed as floats (:class:`FloatScreen`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from harmonize import units
from harmonize.gridded.cf import Packing, integer_interval


@dataclass(frozen=True)
class PixelReduction:
    """One block's values reduced along its first (time) axis, per remaining position."""

    n: np.ndarray  # values kept (not fill, valid, plausible)
    total: np.ndarray  # sum of the kept values: stored integers (int64) or canonical floats (float64)
    fill: np.ndarray  # fill or missing values
    invalid: np.ndarray  # values outside the valid range (not fill); the rest are implausible


class FloatScreen:
    """Decode every value to float64 (:meth:`Packing.decode`), convert it to the canonical unit, mask and sum.

    Parameters
    ----------
    packing
        The variable's packing, fill values and valid range.
    dimension, unit
        The unit the unpacked values are in (:func:`harmonize.units.conversion`).
    plausible
        Plausible range of the canonical values; values outside it are implausible.
    """

    #: Working bytes per value of a block: stored value, float64 copies, masks.
    bytes_per_value = 48

    def __init__(self, packing: Packing, dimension: str, unit: str, plausible: tuple[float, float]) -> None:
        self.packing = packing
        self.dimension = dimension
        self.unit = unit
        self.plausible = plausible

    def canonical(self, stored: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Canonical float64 values (NaN where fill or invalid), the fill mask and the invalid mask."""
        values, fill, invalid = self.packing.decode(stored)
        return units.to_canonical(values, self.dimension, self.unit), fill, invalid

    def reduce(self, stored: np.ndarray) -> PixelReduction:
        """Counts and sums along axis 0 of the values of ``stored`` (a block of time steps)."""
        values, fill, invalid = self.canonical(stored)
        lo, hi = self.plausible
        with np.errstate(invalid="ignore"):
            keep = ~(fill | invalid | (values < lo) | (values > hi))
        return PixelReduction(keep.sum(axis=0), np.where(keep, values, 0.0).sum(axis=0),
                              fill.sum(axis=0), invalid.sum(axis=0))

    def canonical_sum(self, n: np.ndarray, total: np.ndarray) -> np.ndarray:
        """The sum of the kept canonical values from :meth:`reduce`'s ``n`` and ``total``."""
        return np.asarray(total, np.float64)


class IntegerScreen(FloatScreen):
    """Mask and sum packed integers (8 to 32 bits) without decoding them; see the module docstring."""

    #: Working bytes per value of a block (int16; see __init__): the stored value, masks, the kept values.
    bytes_per_value = 12

    def __init__(self, packing: Packing, dtype: np.dtype, dimension: str, unit: str,
                 plausible: tuple[float, float]) -> None:
        super().__init__(packing, dimension, unit, plausible)
        reading = np.dtype(f"u{np.dtype(dtype).itemsize}") if packing.unsigned else np.dtype(dtype)
        info = np.iinfo(reading)
        # the stored value and the kept values (product with the mask) in the stored type, and
        # up to eight one-byte masks and comparison results alive at a time
        self.bytes_per_value = 8 + 2 * reading.itemsize
        self.first, self.last = int(info.min), int(info.max)
        self.fills = tuple(sorted({int(v) for v in packing.stored_fill_values(reading)}))
        self.valid = packing.valid_stored(reading)
        c_scale, c_offset = units.conversion(dimension, unit)

        def canonical(r: np.ndarray) -> np.ndarray:  # as canonical() computes it, value by value
            return units.to_canonical(packing.unpack(r.astype(np.float64)), dimension, unit)

        increasing = (packing.scale_factor > 0) == (c_scale > 0)
        p_lo, p_hi = integer_interval(canonical, *plausible, self.first, self.last, increasing)
        self.keep = (max(self.valid[0], p_lo), min(self.valid[1], p_hi))
        # canonical value of a stored r: r x a + b (the unpacking and the unit conversion composed)
        self.a = packing.scale_factor * c_scale
        self.b = packing.add_offset * c_scale + c_offset

    def _inside(self, raw: np.ndarray, lo: int, hi: int) -> np.ndarray | None:
        """Mask of lo <= raw <= hi; None when that is every value of the type."""
        if lo > hi:
            return np.zeros(raw.shape, bool)
        mask = None
        if lo > self.first:
            mask = raw >= lo
        if hi < self.last:
            mask = raw <= hi if mask is None else np.logical_and(mask, raw <= hi, out=mask)
        return mask

    def reduce(self, stored: np.ndarray) -> PixelReduction:
        raw = self.packing.reading(stored)
        steps, shape = raw.shape[0], raw.shape[1:]
        # the narrowest exact accumulators: counts of up to 65,535 steps in uint16, sums in int32
        # while steps x the largest stored magnitude stays below 2**31 (bool -> uint8 views and
        # narrow sums are several times faster than numpy's default int64 reductions)
        count_type = np.uint16 if steps < 2**16 else np.int64
        sum_type = np.int32 if steps * max(-self.first, self.last) < 2**31 else np.int64

        def count(mask: np.ndarray) -> np.ndarray:
            return mask.view(np.uint8).sum(axis=0, dtype=count_type)

        fill = None
        for value in self.fills:
            fill = raw == value if fill is None else np.logical_or(fill, raw == value, out=fill)
        keep = self._inside(raw, *self.keep)
        if fill is not None and any(self.keep[0] <= v <= self.keep[1] for v in self.fills):
            keep = ~fill if keep is None else np.logical_and(keep, ~fill, out=keep)
        if keep is None:
            n, total = np.full(shape, steps, np.int64), raw.sum(axis=0, dtype=sum_type)
        else:
            # a product with the mask, not np.where: the same integers, far cheaper
            n, total = count(keep), (raw * keep).sum(axis=0, dtype=sum_type)
        invalid = np.zeros(shape, np.int64)
        valid = self._inside(raw, *self.valid)
        if valid is not None:
            invalid = count(~valid if fill is None else ~(valid | fill))
        return PixelReduction(n, total, count(fill) if fill is not None else np.zeros(shape, np.int64), invalid)

    def canonical_sum(self, n: np.ndarray, total: np.ndarray) -> np.ndarray:
        return self.a * np.asarray(total, np.float64) + self.b * np.asarray(n, np.float64)


def screen_for(packing: Packing, dtype: np.dtype, dimension: str, unit: str,
               plausible: tuple[float, float]) -> FloatScreen:
    """The screen of a variable: on the stored integers for 8- to 32-bit integers, else by float decode."""
    dtype = np.dtype(dtype)
    if dtype.kind in "iu" and dtype.itemsize <= 4:
        return IntegerScreen(packing, dtype, dimension, unit, plausible)
    return FloatScreen(packing, dimension, unit, plausible)
