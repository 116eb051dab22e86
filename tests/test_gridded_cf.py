"""CF decoding of gridded files, checked against xarray's own decoding, cftime, pint and the CF tables."""

from __future__ import annotations

import csv
from pathlib import Path

import cftime
import numpy as np
import pint
import pytest
import xarray as xr
from gridded_files import regular_file

from harmonize.gridded.cf import (
    CANONICAL_VARIABLES,
    Packing,
    decode_time,
    depth_metres,
)
from harmonize.gridded.classic import classic_required_size
from harmonize.units import conversion as unit_conversion

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures" / "gridded"


def _packed_sst_file(path: Path, rng: np.random.Generator) -> Path:
    stored = rng.integers(-1000, 3000, size=(3, 4, 5)).astype(np.int16)
    stored[0, 0, :2] = -32768
    return regular_file(path, {"sst": (stored, {
        "units": "K", "scale_factor": np.float32(0.01), "add_offset": np.float32(273.15), "_FillValue": np.int16(-32768)})},
        lat=[43.3, 43.2, 43.1, 43.0], lon=np.arange(5) * 0.1 + 207.0, time=[0, 1, 2])


def test_unpacking_matches_xarray_decode_cf(tmp_path: Path) -> None:
    # CF conventions 1.11, section 8.1 "Packed data": unpacked = packed x scale_factor + add_offset,
    # _FillValue compared with the packed value. Reference: xarray's decode_cf (mask_and_scale).
    path = _packed_sst_file(tmp_path / "packed.nc", np.random.default_rng(1))
    raw = xr.open_dataset(path, decode_cf=False, cache=False)
    packing = Packing.from_attrs(raw["sst"].attrs, raw["sst"].dtype)
    values, fill, invalid = packing.decode(raw["sst"].values)
    reference = xr.open_dataset(path)["sst"].values.astype(np.float64)
    np.testing.assert_array_equal(np.isnan(values), np.isnan(reference))
    np.testing.assert_allclose(values[~fill], reference[~fill], rtol=0, atol=1e-4)  # float32 attrs
    assert fill.sum() == 2 and not invalid.any()
    raw.close()


def test_valid_range_is_checked_on_packed_values_which_xarray_does_not() -> None:
    # CF 2.5.1 / 8.1: valid_min/valid_max typed like the stored data apply to the packed numbers.
    # xarray masks _FillValue but not valid_range (pydata/xarray issue #8359), so check by hand:
    attrs = {"scale_factor": 0.01, "add_offset": 273.15, "_FillValue": np.int16(-32768),
             "valid_min": np.int16(-300), "valid_max": np.int16(4500)}
    stored = np.array([-32768, -301, -300, 0, 4500, 4501], dtype=np.int16)
    values, fill, invalid = Packing.from_attrs(attrs, stored.dtype).decode(stored)
    assert fill.tolist() == [True, False, False, False, False, False]
    assert invalid.tolist() == [False, True, False, False, False, True]
    # hand arithmetic: -300 x 0.01 + 273.15 = 270.15; 4500 x 0.01 + 273.15 = 318.15
    np.testing.assert_allclose(values[[2, 3, 4]], [270.15, 273.15, 318.15])


def test_valid_range_typed_like_scale_factor_is_unpacked() -> None:
    # CF 8.1: a valid_range of the type of scale_factor (float for int16 data) is in unpacked units.
    attrs = {"scale_factor": np.float32(0.5), "add_offset": np.float32(0.0), "valid_range": np.array([0.0, 10.0], np.float32)}
    stored = np.array([-1, 0, 20, 21], dtype=np.int16)
    _, _, invalid = Packing.from_attrs(attrs, stored.dtype).decode(stored)
    assert invalid.tolist() == [True, False, False, True]


def test_unsigned_bytes() -> None:
    # NetCDF User Guide, attribute conventions: _Unsigned = "true" reads a signed byte as unsigned;
    # the byte -1 is 255, the byte -56 is 200.
    attrs = {"_Unsigned": "true", "_FillValue": np.int8(-1), "scale_factor": 0.5}
    stored = np.array([-1, -56, 10], dtype=np.int8)
    values, fill, _ = Packing.from_attrs(attrs, stored.dtype).decode(stored)
    assert fill.tolist() == [True, False, False]
    np.testing.assert_allclose(values[1:], [100.0, 5.0])


def test_default_float_fill_is_missing() -> None:
    # CF 2.5.1: without _FillValue the netCDF default fill (9.969209968386869e36 for floats,
    # Unidata netcdf.h NC_FILL_FLOAT) marks missing data.
    stored = np.array([1.5, 9.969209968386869e36, np.nan], dtype=np.float32)
    _, fill, _ = Packing.from_attrs({}, stored.dtype).decode(stored)
    assert fill.tolist() == [False, True, True]


@pytest.mark.parametrize("calendar", ["noleap", "360_day", "standard", "all_leap", "julian"])
def test_calendars_match_cftime_and_xarray(calendar: str) -> None:
    # CF conventions 4.4.1 calendars; reference: xarray decode_cf with cftime dates.
    days = np.array([0.0, 30.5, 58.0, 59.0, 359.5, 365.0, 730.0])
    axis = decode_time(days, "days since 2019-01-01 00:00:00", calendar)
    ds = xr.Dataset(coords={"time": ("time", days, {"units": "days since 2019-01-01 00:00:00", "calendar": calendar})})
    decoded = xr.decode_cf(ds, decode_times=xr.coders.CFDatetimeCoder(use_cftime=True))["time"].values
    assert axis.year.tolist() == [d.year for d in decoded]
    assert axis.month.tolist() == [d.month for d in decoded]


def test_noleap_and_360_day_by_hand() -> None:
    # Hand arithmetic (CF 4.4.1): in a 365-day year day 59 after 1 January is 1 March; in a
    # 360-day calendar every month has 30 days, so day 59 is 30 February and day 360 is 1 January.
    noleap = decode_time(np.array([58.0, 59.0]), "days since 2020-01-01", "noleap")
    assert noleap.month.tolist() == [2, 3]
    d360 = decode_time(np.array([59.0, 360.0]), "days since 2020-01-01", "360_day")
    assert d360.month.tolist() == [2, 1] and d360.year.tolist() == [2020, 2021]
    assert cftime.num2date(59.0, "days since 2020-01-01", calendar="360_day").day == 30


def test_bad_time_units_and_calendar() -> None:
    with pytest.raises(ValueError, match="not of the CF form"):
        decode_time(np.array([1.0]), "days", "standard")
    with pytest.raises(ValueError, match="not a CF calendar"):
        decode_time(np.array([1.0]), "days since 2000-01-01", "martian")
    axis = decode_time(np.array([1.0, np.nan]), "hours since 2000-01-01", None)
    assert axis.valid.tolist() == [True, False]


@pytest.mark.parametrize(("unit", "pint_unit"), [("K", "kelvin"), ("kelvin", "kelvin"), ("degC", "degC"),
                                                   ("degree_Celsius", "degC"), ("degF", "degF")])
def test_temperature_conversion_matches_pint(unit: str, pint_unit: str) -> None:
    # Reference: pint's offset-unit conversion (K -> degC subtracts 273.15, BIPM SI Brochure 2019).
    conv = unit_conversion("temperature", unit)
    ureg = pint.UnitRegistry()
    for kelvin in (271.35, 288.0, 300.15):
        given = ureg.Quantity(kelvin, "kelvin").to(pint_unit).magnitude
        expected = ureg.Quantity(given, pint_unit).to("degC").magnitude
        assert given * conv[0] + conv[1] == pytest.approx(expected, abs=1e-9)


def test_concentration_and_fraction_factors_match_pint() -> None:
    ureg = pint.UnitRegistry()
    for unit, pint_unit in (("kg m-3", "kg/m**3"), ("ug/L", "ug/L"), ("g m-3", "g/m**3"), ("mg/L", "mg/L")):
        scale, offset = unit_conversion("concentration", unit)
        assert offset == 0.0
        assert scale == pytest.approx(ureg.Quantity(1.0, pint_unit).to("mg/m**3").magnitude, rel=1e-12)
    assert unit_conversion("fraction", "%") == (0.01, 0.0)


def test_canonical_variables_are_cf_standard_names_with_convertible_units() -> None:
    # CF Standard Name Table v83 (2023-10-17): each name exists and our canonical unit converts
    # to the table's canonical unit (pint).
    with open(FIXTURES / "cf_standard_names_v83_subset.csv", encoding="utf-8") as fh:
        table = {r["standard_name"]: r["canonical_units"] for r in csv.DictReader(fh)}
    ureg = pint.UnitRegistry()
    for name, var in CANONICAL_VARIABLES.items():
        assert name in table, name
        ours = {"degC": "degC", "mg m-3": "mg/m**3", "1": "dimensionless"}[var.unit]
        theirs = {"K": "kelvin", "kg m-3": "kg/m**3", "1": "dimensionless"}[table[name]]
        assert ureg.Quantity(1.0, ours).to(theirs) is not None
        assert unit_conversion(var.dimension, var.unit) == (1.0, 0.0)  # stored in its canonical unit


def test_depth_levels_positive_up_and_centimetres() -> None:
    # CF 4.3: positive = "up" means heights; depths below the surface are their negatives.
    np.testing.assert_allclose(depth_metres(np.array([-5.0, -50.0]), {"units": "m", "positive": "up"}), [5.0, 50.0])
    np.testing.assert_allclose(depth_metres(np.array([500.0]), {"units": "cm", "positive": "down"}), [5.0])
    with pytest.raises(ValueError, match="not metres"):
        depth_metres(np.array([0.5]), {"units": "1", "standard_name": "ocean_sigma_coordinate"})


@pytest.mark.parametrize("fmt", ["NETCDF3_CLASSIC", "NETCDF3_64BIT"])
@pytest.mark.parametrize("unlimited", [None, "time"])
def test_classic_header_size_matches_files_the_netcdf_library_writes(tmp_path: Path, fmt: str, unlimited: str | None) -> None:
    # Reference: the sizes of files written by the netCDF-C library (NetCDF classic and 64-bit
    # offset format specification: fixed variables, then records of all record variables).
    ds = xr.Dataset({"sst": (("time", "lat", "lon"), np.ones((7, 5, 3), np.float32)),
                     "flag": (("time",), np.ones(7, np.int16))},
                    coords={"time": ("time", np.arange(7.0), {"units": "days since 2019-01-01"}),
                            "lat": np.arange(5.0), "lon": np.arange(3.0)})
    path = tmp_path / "f.nc"
    ds.to_netcdf(path, format=fmt, unlimited_dims=[unlimited] if unlimited else None)
    assert classic_required_size(path) == path.stat().st_size
    ds.to_netcdf(tmp_path / "g.nc", format="NETCDF4")
    assert classic_required_size(tmp_path / "g.nc") is None
