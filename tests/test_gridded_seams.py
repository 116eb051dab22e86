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
