"""Masking and summing packed grid values on the stored integers equal decoding every value first.

The reference below is the plain rule of the CF conventions, written out value by value:
Eaton et al., "NetCDF Climate and Forecast (CF) Metadata Conventions" 1.11 (2023),
section 8.1 "Packed data" (unpacked = packed x scale_factor + add_offset; valid_min,
valid_max and valid_range of the stored type apply to the packed numbers, those of the
type of scale_factor to the unpacked ones) and section 2.5.1 "Missing data, valid and
actual range of data" (a value equal to _FillValue or missing_value is missing; one
outside the valid range is invalid). A value that survives both is then converted to the
canonical unit and kept when it lies in the variable's plausible range.

Every example runs every stored integer of the type (for 8 and 16 bits) through both, and
puts the bounds exactly on decoded values of stored integers, so a value on a bound, the
rounding of the float arithmetic and a negative scale_factor are all exercised.
"""

from __future__ import annotations

import math

import numpy as np
from hypothesis import given
from hypothesis import strategies as st

from harmonize.gridded.aggregate import CellPeriodSums, PixelPeriodSums
from harmonize.gridded.cf import Packing
from harmonize.gridded.screen import FloatScreen, IntegerScreen, screen_for
from harmonize.units import conversion

# (dimension, unit): identity, and kelvin (0 degC = 273.15 K) whose offset nearly cancels a
# typical add_offset; the conversion constants are the unit registry's (not under test here)
UNITS = [("temperature", "degC"), ("temperature", "K"), ("concentration", "kg m-3")]


def _reference(raw: np.ndarray, attrs: dict, unsigned: bool, dim_unit: tuple[str, str],
               plausible: tuple[float, float]) -> dict[str, np.ndarray]:
    """Per column of ``raw`` (values along axis 0): kept count and fsum of kept canonical values,
    fills, invalid, implausible; each value decoded to float64 and tested one by one."""
    reading = raw.view(np.dtype(f"u{raw.dtype.itemsize}")) if unsigned else raw

    def as_read(v: object) -> int:  # an attribute in the stored type, read as the data are read
        stored = np.asarray(v).astype(raw.dtype)
        return int(stored.view(reading.dtype)) if unsigned else int(stored)

    fills = {as_read(attrs[k]) for k in ("_FillValue", "missing_value") if k in attrs}
    scale, offset = float(attrs["scale_factor"]), float(attrs["add_offset"])
    c_scale, c_offset = conversion(*dim_unit)
    packed_lo, packed_hi, unpacked_lo, unpacked_hi = -math.inf, math.inf, -math.inf, math.inf
    if "valid_range" in attrs:  # typed like scale_factor (float): unpacked numbers
        unpacked_lo, unpacked_hi = (float(v) for v in attrs["valid_range"])
    if "valid_min" in attrs:  # typed like the data: packed numbers
        packed_lo = as_read(attrs["valid_min"])
    if "valid_max" in attrs:
        packed_hi = as_read(attrs["valid_max"])
    lo, hi = plausible
    r = reading.astype(np.int64)
    fill = np.isin(r, list(fills))
    unpacked = r.astype(np.float64) * scale + offset  # every value decoded to float64
    invalid = ~fill & ~((packed_lo <= r) & (r <= packed_hi) & (unpacked_lo <= unpacked) & (unpacked <= unpacked_hi))
    canonical = unpacked * c_scale + c_offset
    implausible = ~fill & ~invalid & ~((lo <= canonical) & (canonical <= hi))
    kept = ~(fill | invalid | implausible)
    magnitude = np.abs(r * scale * c_scale) + abs(offset * c_scale) + abs(c_offset)
    return {
        "n": kept.sum(axis=0), "fill": fill.sum(axis=0), "invalid": invalid.sum(axis=0),
        "implausible": implausible.sum(axis=0),
        "sum": np.array([math.fsum(canonical[kept[:, j], j]) for j in range(r.shape[1])]),
        # the magnitudes behind each kept term, for the rounding bound
        "scale_of_sum": np.where(kept, magnitude, 0.0).sum(axis=0),
    }


def _decoded(r: int, attrs: dict, dim_unit: tuple[str, str], canonical: bool) -> float:
    """The float decode of one stored integer (to put a bound exactly on it)."""
    value = np.float64(r) * float(attrs["scale_factor"]) + float(attrs["add_offset"])
    if canonical:
        c_scale, c_offset = conversion(*dim_unit)
        value = value * c_scale + c_offset
    return float(value)


@st.composite
def packed_case(draw: st.DrawFn) -> tuple:
    dtype = np.dtype(draw(st.sampled_from(["i1", "i2", "i4"])))
    unsigned = dtype.itemsize < 4 and draw(st.booleans())
    info = np.iinfo(dtype)
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    if dtype.itemsize <= 2:  # every stored integer of the type, as 256 time steps of some pixels
        raw = np.arange(info.min, info.max + 1, dtype=np.int64).astype(dtype)
        rng.shuffle(raw)
        raw = raw.reshape(256, -1)
    else:
        raw = rng.integers(info.min, info.max, (64, 8), endpoint=True).astype(dtype)
        raw[rng.random(raw.shape) < 0.1] = rng.integers(-3, 4)  # repeated small values
    sign = draw(st.sampled_from([1.0, -1.0]))
    scale = sign * draw(st.sampled_from([1.0, 0.01, 0.1, 0.001, 1 / 3, 0.05, 7.0]) | st.floats(1e-5, 100.0))
    if draw(st.booleans()):
        scale = float(np.float32(scale))  # float32 attributes, as files often carry
    offset = draw(st.sampled_from([0.0, 273.15, 20.0, -5.0]) | st.floats(-1e4, 1e4))
    attrs: dict = {"scale_factor": scale, "add_offset": offset,
                   "_FillValue": np.asarray(rng.choice(raw.ravel())).astype(dtype)}
    if draw(st.booleans()):
        attrs["missing_value"] = np.asarray(rng.choice(raw.ravel())).astype(dtype)
    picks = [int(v) for v in rng.choice(raw.ravel(), 4)]  # stored values to put bounds on
    reading = (lambda v: int(np.asarray(v).astype(dtype).view(f"u{dtype.itemsize}"))) if unsigned else int
    dim_unit = draw(st.sampled_from(UNITS))
    valid = draw(st.sampled_from(["none", "packed", "unpacked", "min_only"]))
    if valid == "packed":
        lo, hi = sorted(picks[:2], key=reading)
        attrs["valid_min"], attrs["valid_max"] = np.asarray(lo).astype(dtype), np.asarray(hi).astype(dtype)
    elif valid == "min_only":
        attrs["valid_min"] = np.asarray(picks[0]).astype(dtype)
    elif valid == "unpacked":
        a, b = (_decoded(reading(r), attrs, dim_unit, False) for r in picks[:2])
        attrs["valid_range"] = np.array([min(a, b), max(a, b)])
    if unsigned:
        attrs["_Unsigned"] = "true"
    a, b = (_decoded(reading(r), attrs, dim_unit, True) for r in picks[2:])
    plausible = draw(st.sampled_from([(min(a, b), max(a, b)), (min(a, b), math.inf), (-math.inf, max(a, b)),
                                      (-5.0, 45.0)]))
    return raw, attrs, unsigned, dim_unit, plausible


@given(packed_case())
def test_integer_masking_and_sums_equal_decoding_every_value(case: tuple) -> None:
    raw, attrs, unsigned, dim_unit, plausible = case
    packing = Packing.from_attrs(attrs, raw.dtype)
    screen = screen_for(packing, raw.dtype, *dim_unit, plausible)
    assert isinstance(screen, IntegerScreen)
    got = screen.reduce(raw)
    want = _reference(raw, attrs, unsigned, dim_unit, plausible)
    assert got.n.tolist() == want["n"].tolist()
    assert got.fill.tolist() == want["fill"].tolist()
    assert got.invalid.tolist() == want["invalid"].tolist()
    implausible = raw.shape[0] - got.n - got.fill - got.invalid
    assert implausible.tolist() == want["implausible"].tolist()
    # the integer sums are exact; unpacking them rounds a few times, decoding every value once
    # per value: both stay within a few units in the last place of the magnitudes summed
    total = screen.canonical_sum(got.n, got.total)
    tolerance = 8 * np.finfo(np.float64).eps * want["scale_of_sum"] + 1e-300
    assert (np.abs(total - want["sum"]) <= tolerance).all(), (total, want["sum"])
    # and the float path (decode every value) classifies alike
    floats = FloatScreen(packing, *dim_unit, plausible).reduce(raw)
    assert floats.n.tolist() == got.n.tolist() and floats.invalid.tolist() == got.invalid.tolist()


def test_a_value_exactly_on_a_bound_is_kept_with_a_negative_scale_factor() -> None:
    # hand arithmetic: r x (-0.5) + 10: r = 4 -> 8.0, r = 5 -> 7.5, r = -20 -> 20.0, r = -21 -> 20.5;
    # valid_range (unpacked) [7.5, 20.0] keeps r in [-20, 5]; a plausible range [8.0, 45.0] (degC)
    # then keeps r in [-20, 4]; _FillValue -32768
    attrs = {"scale_factor": -0.5, "add_offset": 10.0, "_FillValue": np.int16(-32768),
             "valid_range": np.array([7.5, 20.0])}
    raw = np.array([[-32768], [-21], [-20], [4], [5], [6]], np.int16)
    screen = screen_for(Packing.from_attrs(attrs, raw.dtype), raw.dtype, "temperature", "degC", (8.0, 45.0))
    got = screen.reduce(raw)
    assert (int(got.fill[0]), int(got.invalid[0]), int(got.n[0])) == (1, 2, 2)  # -21 and 6 invalid; 5 implausible
    assert screen.canonical_sum(got.n, got.total)[0] == 20.0 + 8.0


@given(st.lists(st.tuples(st.integers(0, 3), st.integers(0, 10)), min_size=1, max_size=12), st.integers(0, 3),
       st.integers(0, 2**32 - 1))
def test_pixel_sums_held_per_period_equal_adding_every_block(blocks: list[tuple[int, int]], max_open: int,
                                                            seed: int) -> None:
    # blocks of time steps (each as one or two runs of window positions, as blocks of grid rows)
    # in any period order; holding at most max_open periods (0: none) gives the same cell sums as
    # adding every block's inside pixels to the cells at once
    rng = np.random.default_rng(seed)
    n_cells, window = 3, 10
    inside = np.flatnonzero(rng.random(window) < 0.7)
    pixel_cell = rng.integers(0, n_cells, inside.size)
    weight = rng.uniform(0.5, 2.0, (1, inside.size))
    direct = CellPeriodSums(1, n_cells)
    held = CellPeriodSums(1, n_cells)
    key = held.cell_keys(pixel_cell, np.array([0]))
    sums = PixelPeriodSums(held, inside, window, key, weight, np.dtype(np.int64), lambda n, t: t * 0.5 + n, max_open)
    counted = np.zeros(3, np.int64)
    for period, split in blocks:
        n, fill, invalid = rng.integers(0, 3, (3, 1, window))
        total = rng.integers(-100, 100, (1, window)) * (n > 0)
        direct.add_pixel_sums(period, key, n[:, inside], total[:, inside] * 0.5 + n[:, inside], weight)
        counted += [n[:, inside].sum(), fill[:, inside].sum(), invalid[:, inside].sum()]
        for span in (slice(0, split), slice(split, window)):
            if span.stop > span.start:
                sums.add(period, span.start, n[:, span], total[:, span], fill[:, span], invalid[:, span])
    sums.close_all()
    assert [sums.used, sums.fill, sums.invalid] == counted.tolist()
    a, b = direct.result(), held.result()
    assert a[["period", "layer", "cell", "n"]].to_numpy().tolist() == b[["period", "layer", "cell", "n"]].to_numpy().tolist()
    np.testing.assert_allclose(a["sum_w"], b["sum_w"], rtol=1e-12)
    np.testing.assert_allclose(a["sum_wx"], b["sum_wx"], rtol=1e-12)
