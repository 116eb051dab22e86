"""Gridded files at their seams: CF time bounds, the earliest date, and axes that would give wrong areas."""

from __future__ import annotations

from pathlib import Path

import cftime
import numpy as np
import pytest
import xarray as xr
from gridded_files import write_profile

from harmonize import load_study
from harmonize.demo.sources.gridded import write_raw_netcdf
from harmonize.ingest import prepare

LAT = np.round(np.arange(42.55, 43.5, 0.1), 6)
LON = np.round(np.arange(-152.95, -151.9, 0.1), 6)
SST = 'sst = "sea_surface_temperature"'


def _dataset(stamps: np.ndarray, values: list[float], units: str, calendar: str,
             bounds: np.ndarray | None = None) -> xr.Dataset:
    data = np.ones((len(values), LAT.size, LON.size), np.float32) * np.asarray(values, np.float32)[:, None, None]
    t_attrs = {"units": units, "calendar": calendar, "standard_name": "time"}
    variables = {"sst": (("time", "lat", "lon"), data, {"units": "degC"})}
    if bounds is not None:
        t_attrs["bounds"] = "time_bnds"
        variables["time_bnds"] = (("time", "nv"), np.asarray(bounds, np.float64), {})
    return xr.Dataset(variables, coords={
        "time": ("time", np.asarray(stamps, np.float64), t_attrs),
        "lat": ("lat", LAT, {"units": "degrees_north", "standard_name": "latitude"}),
        "lon": ("lon", LON, {"units": "degrees_east", "standard_name": "longitude"}),
    })


def _read(study_dir: Path, ds: xr.Dataset, period: str = "month"):  # type: ignore[no-untyped-def]
    study = load_study(study_dir)
    path = study_dir / "field.nc"
    write_raw_netcdf(ds, path)
    write_profile(study_dir, "model", SST, period=period, provider_type="model")
    adapter, prof = prepare(study, "model")
    return adapter.read({"rows": path}, prof, study)


def _month_means(out) -> dict[str, float]:  # type: ignore[no-untyped-def]
    va = out.values.assign(month=out.values["event_id"].str.split("/").str[1])
    means = va.groupby("month")["value"].agg(["min", "max"]).round(9)
    assert (means["min"] == means["max"]).all()  # every cell of a month holds the month's value
    return means["min"].to_dict()


@pytest.mark.parametrize("calendar", ["noleap", "standard", "360_day"])
def test_end_stamped_monthly_means_land_in_their_own_month(study_dir: Path, calendar: str) -> None:
    # monthly means for January-March 2019 stamped at the end of each month (the upper
    # bound), with time_bnds: times computed by cftime, not by harmonize
    units = "days since 2019-01-01 00:00:00"
    lower = cftime.date2num([cftime.datetime(2019, m, 1, calendar=calendar) for m in (1, 2, 3)], units,
                            calendar=calendar)
    upper = cftime.date2num([cftime.datetime(2019, m + 1, 1, calendar=calendar) for m in (1, 2, 3)], units,
                            calendar=calendar)
    bounds = np.stack([lower, upper], axis=1)
    out = _read(study_dir, _dataset(upper, [5.0, 7.0, 9.0], units, calendar, bounds))
    assert _month_means(out) == {"2019-01": 5.0, "2019-02": 7.0, "2019-03": 9.0}
    assert any("midpoint of their bounds 'time_bnds' (CF 1.11 section 7.1)" in n for n in out.notes)
    assert any("3 of 3 time stamps equal the upper bound" in n for n in out.notes)
    # the same stamps without bounds are read as stamped: January's mean lands in February
    plain = _read(study_dir, _dataset(upper, [5.0, 7.0, 9.0], units, calendar))
    assert _month_means(plain) == {"2019-02": 5.0, "2019-03": 7.0, "2019-04": 9.0}
    assert not any("upper bound" in n for n in plain.notes)


def test_centre_stamped_steps_with_bounds_are_not_called_end_stamped(study_dir: Path) -> None:
    units = "hours since 2019-06-01"
    lower = np.array([0.0, 24.0 * 30])  # 1 June, 1 July
    upper = np.array([24.0 * 30, 24.0 * 61])  # 1 July, 1 August
    out = _read(study_dir, _dataset((lower + upper) / 2, [11.0, 13.0], units, "standard",
                                    np.stack([lower, upper], axis=1)))
    assert _month_means(out) == {"2019-06": 11.0, "2019-07": 13.0}
    assert not any("upper bound" in n for n in out.notes)


def test_end_stamped_december_belongs_to_the_winter_of_the_next_january(study_dir: Path) -> None:
    # December 2019 stamped 2020-01-01 00:00: its midpoint is in December -> winter 2020
    # (CONTRACT season rule), as January 2020 is; November stays in autumn 2019
    units = "days since 2019-11-01"
    months = [(2019, 11), (2019, 12), (2020, 1)]
    lower = cftime.date2num([cftime.datetime(y, m, 1, calendar="standard") for y, m in months], units, calendar="standard")
    nxt = [(2019, 12), (2020, 1), (2020, 2)]
    upper = cftime.date2num([cftime.datetime(y, m, 1, calendar="standard") for y, m in nxt], units, calendar="standard")
    out = _read(study_dir, _dataset(upper, [12.0, 8.0, 10.0], units, "standard", np.stack([lower, upper], axis=1)),
                period="season")
    seasons = out.values.assign(period=out.values["event_id"].str.split("/").str[1]).groupby("period")["value"].first()
    assert seasons.round(9).to_dict() == {"2019-autumn": 12.0, "2020-winter": 9.0}


def test_bounds_of_the_wrong_shape_are_refused(study_dir: Path) -> None:
    from harmonize.errors import InputFileError

    units = "days since 2019-01-01"
    ds = _dataset(np.array([15.0, 45.0]), [1.0, 2.0], units, "standard").assign(
        time_bnds=(("time",), np.array([0.0, 31.0])))
    ds["time"].attrs["bounds"] = "time_bnds"
    with pytest.raises(InputFileError, match=r"time bounds 'time_bnds' of 'time' have shape \(2,\), expected \(2, 2\)"):
        _read(study_dir, ds)


def test_times_before_1800_are_bad_times_like_in_every_source(study_dir: Path) -> None:
    # "days since 1700-01-01" for a product meant to start in 2019: a wrong reference date
    ds = _dataset(np.array([15.0, 45.0 + 365 * 320]), [1.0, 2.0], "days since 1700-01-01", "standard")
    out = _read(study_dir, ds)
    masked = out.masked.set_index("reason_code")
    n_pixels = LAT.size * LON.size
    assert masked.loc["bad_time", "n_values"] == n_pixels
    assert "dated before 1800-01-01, the earliest date harmonize accepts" in masked.loc["bad_time", "message"]
    assert all(e.split("/")[1] >= "2019" for e in out.values["event_id"])


# -------------------------------------------------------------- guards
def _field(study_dir: Path, data: np.ndarray, attrs: dict, lat: np.ndarray = LAT, lon: np.ndarray = LON,
           lat_bounds: np.ndarray | None = None) -> Path:
    ds = xr.Dataset({"sst": (("time", "lat", "lon"), data, attrs)}, coords={
        "time": ("time", np.array([15.0]), {"units": "days since 2019-06-01", "standard_name": "time"}),
        "lat": ("lat", np.asarray(lat, float), {"units": "degrees_north", "standard_name": "latitude"}),
        "lon": ("lon", np.asarray(lon, float), {"units": "degrees_east", "standard_name": "longitude"}),
    })
    if lat_bounds is not None:
        ds["lat"].attrs["bounds"] = "lat_bnds"
        ds["lat_bnds"] = (("lat", "nv"), lat_bounds)
    path = study_dir / "field.nc"
    write_raw_netcdf(ds, path)
    write_profile(study_dir, "model", SST, provider_type="model")
    return path


def _adapter_read(study_dir: Path, path: Path):  # type: ignore[no-untyped-def]
    study = load_study(study_dir)
    adapter, prof = prepare(study, "model")
    return adapter.read({"rows": path}, prof, study)


def test_a_latitude_axis_that_is_not_monotonic_is_refused(study_dir: Path) -> None:
    from harmonize.errors import InputFileError

    lat = LAT.copy()
    lat[[3, 4]] = lat[[4, 3]]  # two rows swapped
    path = _field(study_dir, np.full((1, LAT.size, LON.size), 9.0, np.float32), {"units": "degC"}, lat=lat)
    with pytest.raises(InputFileError, match=r"coordinate axis 'lat' is not monotonic \(42\.85 follows 42\.95 at "
                                             r"finite position 5 of 10\).*sortby"):
        _adapter_read(study_dir, path)


def test_a_single_latitude_row_without_bounds_is_refused_with_bounds_read(study_dir: Path) -> None:
    from harmonize.errors import InputFileError

    one = np.array([43.0])
    data = np.full((1, 1, LON.size), 9.0, np.float32)
    path = _field(study_dir, data, {"units": "degC"}, lat=one)
    with pytest.raises(InputFileError, match=r"coordinate axis 'lat' has a single value \(43\) and no bounds"):
        _adapter_read(study_dir, path)
    # with bounds 42.95-43.05 the row's area is that band's (pyproj.Geod, Karney 2013)
    import pyproj

    path = _field(study_dir, data, {"units": "degC"}, lat=one, lat_bounds=np.array([[42.95, 43.05]]))
    out = _adapter_read(study_dir, path)
    n = 400
    lons = np.concatenate([np.linspace(0, 0.1, n), np.linspace(0.1, 0, n)])
    lats = np.concatenate([np.full(n, 42.95), np.full(n, 43.05)])
    pixel = abs(pyproj.Geod(ellps="WGS84").polygon_area_perimeter(lons, lats)[0]) / 1e6
    assert out.events["effort"].sum() == pytest.approx(pixel * LON.size, rel=1e-6)


def test_scale_factor_zero_is_refused(study_dir: Path) -> None:
    from harmonize.errors import InputFileError

    path = _field(study_dir, np.full((1, LAT.size, LON.size), 900, np.int16),
                  {"units": "degC", "scale_factor": np.float32(0.0), "add_offset": np.float32(0.0)})
    with pytest.raises(InputFileError, match=r"variable 'sst' has scale_factor = 0: every value would unpack to "
                                             r"add_offset \(0\)"):
        _adapter_read(study_dir, path)


def test_the_netcdf_default_fill_of_an_integer_variable_is_masked(study_dir: Path) -> None:
    import netCDF4

    fill = netCDF4.default_fillvals["i2"]  # -32767 (CF 1.11 section 2.5.1)
    stored = np.full((1, LAT.size, LON.size), 900, np.int16)  # 9.00 degC packed by 0.01
    stored[0, 0, :] = fill  # one row of land without a _FillValue attribute
    path = _field(study_dir, stored, {"units": "degC", "scale_factor": np.float32(0.01)})
    out = _adapter_read(study_dir, path)
    masked = out.masked.set_index("reason_code")
    assert masked.loc["missing_value", "n_values"] == LON.size
    assert "-32767" in masked.loc["missing_value", "message"]
    assert np.allclose(out.values["value"], 9.0, atol=1e-5)  # never -327.67 degC mixed in


def test_a_nan_latitude_costs_its_own_row_only(study_dir: Path) -> None:
    lat = LAT.copy()
    lat[4] = np.nan
    data = np.full((1, LAT.size, LON.size), 9.0, np.float32)
    with_nan = _adapter_read(study_dir, _field(study_dir, data, {"units": "degC"}, lat=lat))
    whole = _adapter_read(study_dir, _field(study_dir, data, {"units": "degC"}))
    # the rows beside the NaN keep their 0.1-degree height: the valid area is the whole
    # grid's less exactly the NaN row's pixels (band 42.9-43.0 N, pyproj.Geod)
    import pyproj

    n = 400
    lons = np.concatenate([np.linspace(0, 0.1, n), np.linspace(0.1, 0, n)])
    lats = np.concatenate([np.full(n, LAT[4] - 0.05), np.full(n, LAT[4] + 0.05)])
    row = abs(pyproj.Geod(ellps="WGS84").polygon_area_perimeter(lons, lats)[0]) / 1e6 * LON.size
    assert with_nan.events["effort"].sum() == pytest.approx(whole.events["effort"].sum() - row, rel=1e-6)
    assert with_nan.files[0].rows_accepted == (LAT.size - 1) * LON.size


def test_a_step_whose_bounds_straddle_two_months_goes_whole_to_its_midpoint(study_dir: Path) -> None:
    # weekly means: 22-29 January (midpoint 25 Jan 12:00) and 29 January - 5 February
    # (midpoint 1 February 12:00, by cftime below): the second week is February's, not split
    units = "days since 2019-01-01"
    lower = cftime.date2num([cftime.datetime(2019, 1, 22), cftime.datetime(2019, 1, 29)], units, calendar="standard")
    upper = cftime.date2num([cftime.datetime(2019, 1, 29), cftime.datetime(2019, 2, 5)], units, calendar="standard")
    mid = cftime.num2date((lower + upper) / 2, units, calendar="standard")
    assert [(d.month, d.day) for d in mid] == [(1, 25), (2, 1)]
    out = _read(study_dir, _dataset(upper, [4.0, 6.0], units, "standard", np.stack([lower, upper], axis=1)))
    assert _month_means(out) == {"2019-01": 4.0, "2019-02": 6.0}
