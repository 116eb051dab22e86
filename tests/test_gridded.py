"""Gridded NetCDF through the adapter and the pipeline: hand-computed aggregates, calendars,
layers, pixel accounting and every bad input the issue names."""

from __future__ import annotations

from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pyproj
import pytest
import xarray as xr
from gridded_files import regular_file, write_profile

from harmonize import Store, load_study, run
from harmonize.adapters.gridded import GriddedAdapter
from harmonize.demo.sea import MODEL_BOTTOM_OFFSET_C, bottom_temperature_c
from harmonize.demo.sources.gridded import model_grid, write_model_file, write_raw_netcdf
from harmonize.errors import ConfigError, InputFileError
from harmonize.ingest import prepare
from harmonize.study import Study
from harmonize.tagging import Grid

GEOD = pyproj.Geod(ellps="WGS84")
SST = 'sst = "sea_surface_temperature"'
KELVIN_PACKED = {"units": "K", "scale_factor": 0.01, "add_offset": 273.15, "_FillValue": np.int16(-32768),
                 "valid_min": np.int16(-500), "valid_max": np.int16(4500)}


def _pixel_area_km2(lat_lo: float, lat_hi: float, dlon: float, n: int = 2000) -> float:
    """Reference pixel area: pyproj.Geod polygon (Karney 2013) with the parallels densified."""
    lons = np.concatenate([np.linspace(0, dlon, n), np.linspace(dlon, 0, n)])
    lats = np.concatenate([np.full(n, lat_lo), np.full(n, lat_hi)])
    return abs(GEOD.polygon_area_perimeter(lons, lats)[0]) / 1e6


def _read(study: Study, profile: str, path: Path):  # type: ignore[no-untyped-def]
    adapter, prof = prepare(study, profile)
    return adapter.read({"rows": path}, prof, study)


def _packed(celsius: np.ndarray) -> np.ndarray:
    return np.round(np.asarray(celsius, float) / 0.01).astype(np.int16)  # K = packed x 0.01 + 273.15


def _cell_near(study: Study, lon: float, lat: float) -> tuple[str, float, float]:
    grid = Grid(study.crs, study.cell_size_km)
    ix, iy = grid.indices(np.array([lon]), np.array([lat]))
    clon, clat = grid.cell_centres_lonlat(ix, iy)
    return f"x{ix[0]}_y{iy[0]}", float(clon[0]), float(clat[0])


def test_hand_computed_cell_month_means_of_a_packed_kelvin_0_360_file(study_dir: Path) -> None:
    study = load_study(study_dir)
    cell, clon, clat = _cell_near(study, -152.0, 43.0)
    lat = np.round(clat + np.array([0.005, -0.005]), 6)  # north to south
    lon = np.round(clon + 360.0 + np.array([-0.01, 0.0, 0.01]), 6)  # 0..360 convention
    celsius = np.array([
        [[10, 11, 12], [13, 14, 15]],
        [[np.nan, 11, 12], [13, 14, 99]],  # one cloud, one value above valid_max
        [[20, 20, 20], [20, 20, 20]],
    ])
    stored = _packed(np.nan_to_num(celsius, nan=0))
    stored[1, 0, 0] = -32768
    stored[1, 1, 2] = 9900
    path = regular_file(study_dir / "sst.nc", {"sst": (stored, KELVIN_PACKED)}, lat, lon,
                        time=[0.5, 10.5, 40.5], time_units="days since 2019-06-01 00:00:00")
    write_profile(study_dir, "sst_sat", SST)
    out = _read(study, "sst_sat", path)

    mlon, mlat = np.meshgrid(lon - 360.0, lat)
    ids = Grid(study.crs, study.cell_size_km).cell_ids(mlon.ravel(), mlat.ravel())
    assert set(ids) == {cell}  # all six pixels lie in one study cell
    # pixel areas from pyproj.Geod; rows at lat+0.005 (north) and lat-0.005 (south), 0.01 deg wide
    a_n = _pixel_area_km2(clat, clat + 0.01, 0.01)
    a_s = _pixel_area_km2(clat - 0.01, clat, 0.01)
    june_mean = (a_n * (10 + 11 + 12 + 11 + 12) + a_s * (13 + 14 + 15 + 13 + 14)) / (5 * a_n + 5 * a_s)
    june_effort = (5 * a_n + 5 * a_s) / 2  # valid area per time step, 2 steps in June
    ev = out.events.set_index("event_id")
    va = out.values.set_index("event_id")
    june = f"{cell}/2019-06/surface/sea_surface_temperature"
    july = f"{cell}/2019-07/surface/sea_surface_temperature"
    assert sorted(ev.index) == [june, july]
    assert va.loc[june, "value"] == pytest.approx(june_mean, abs=1e-9)
    assert va.loc[june, "n_values"] == 10 and va.loc[july, "n_values"] == 6
    assert va.loc[july, "value"] == pytest.approx(20.0, abs=1e-9)
    assert ev.loc[june, "effort"] == pytest.approx(june_effort, rel=1e-6)
    assert ev.loc[july, "effort"] == pytest.approx(3 * (a_n + a_s), rel=1e-6)
    assert ev.loc[june, "event_start"] == pd.Timestamp("2019-06-01")
    assert ev.loc[june, "event_end"] == pd.Timestamp("2019-07-01")
    assert ev.loc[june, "depth_layer"] == "surface" and ev.loc[june, "cell_id"] == cell
    assert (va["unit"] == "degC").all() and (va["quantity"] == "measurement").all()
    assert (va["variable_kind"] == "physical").all()
    # every value accounted for: 18 read = 16 used + 1 fill + 1 out of range
    f = out.files[0]
    assert (f.rows_read, f.rows_accepted, f.rows_quarantined) == (18, 16, 2)
    assert dict(zip(out.masked["reason_code"], out.masked["n_values"], strict=True)) == {
        "missing_value": 1, "out_of_range": 1}


def test_pipeline_store_accounting_and_idempotent_reingest(study_dir: Path) -> None:
    study = load_study(study_dir)
    lat = np.arange(45.45, 41.5, -0.1)  # reaches beyond the domain (42..45 N, 154..150 W)
    lon = np.arange(205.05, 210.6, 0.1)
    rng = np.random.default_rng(3)
    celsius = 8 + rng.normal(0, 1, (4, lat.size, lon.size))
    stored = _packed(celsius)
    stored[rng.random(stored.shape) < 0.2] = -32768
    path = regular_file(study_dir / "sst.nc", {"sst": (stored, KELVIN_PACKED)}, lat, lon,
                        time=[15, 45, 75, 105])
    write_profile(study_dir, "sst_sat", SST, period="season")
    result = run(study, "sst_sat", {"rows": path})
    assert result.status == "complete"
    assert result.rows_read == stored.size == result.rows_accepted + result.rows_quarantined
    reasons = result.reasons()
    assert set(reasons.index) == {"outside_domain", "missing_value"}
    store = Store(study.store_dir)
    assert store.check() == []
    with store.connect() as con:
        summary = con.execute("SELECT reason_code, sum(n_values) FROM quarantine_summary GROUP BY ALL").fetchall()
        rows = con.execute("""SELECT season, season_year, count(*), min(event_start), max(event_end)
                              FROM observations GROUP BY ALL ORDER BY 1""").fetchall()
    assert dict(summary) == reasons.to_dict()
    # January-February 2019 are winter 2019; March and April spring 2019 (CONTRACT season rule)
    assert [(r[0], r[1]) for r in rows] == [("spring", 2019), ("winter", 2019)]
    spring = rows[0]
    assert spring[3] == pd.Timestamp("2019-03-01", tz="UTC") and spring[4] == pd.Timestamp("2019-06-01", tz="UTC")
    winter = rows[1]
    assert winter[3] == pd.Timestamp("2018-12-01", tz="UTC") and winter[4] == pd.Timestamp("2019-03-01", tz="UTC")
    again = run(study, "sst_sat", {"rows": path})
    assert again.status == "unchanged"


def test_chunked_reading_gives_the_same_result(study_dir: Path) -> None:
    study = load_study(study_dir)
    lat = np.arange(42.05, 44.0, 0.1)
    lon = np.arange(-153.95, -151.0, 0.1)
    rng = np.random.default_rng(5)
    stored = _packed(6 + rng.normal(0, 2, (30, lat.size, lon.size)))
    stored[rng.random(stored.shape) < 0.3] = -32768
    path = regular_file(study_dir / "sst.nc", {"sst": (stored, KELVIN_PACKED)}, lat, lon,
                        time=np.arange(30) * 7.0)
    write_profile(study_dir, "whole", SST)
    write_profile(study_dir, "tiny", SST, extra="chunk_mb = 0.001\n")  # blocks of one row of one step
    whole, tiny = _read(study, "whole", path), _read(study, "tiny", path)
    key = ["event_id"]
    a = whole.values.sort_values(key).reset_index(drop=True)
    b = tiny.values.sort_values(key).reset_index(drop=True)
    assert len(a) > 50
    np.testing.assert_allclose(a["value"], b["value"], rtol=1e-12)
    assert a["n_values"].tolist() == b["n_values"].tolist()
    np.testing.assert_allclose(whole.events.sort_values(key)["effort"], tiny.events.sort_values(key)["effort"])


def test_noleap_model_bottom_temperature_by_season(study_dir: Path) -> None:
    study = load_study(study_dir)
    path = write_model_file(study_dir / "model.nc", years=(2019, 2020))
    write_profile(study_dir, "model", 'tob = "sea_water_temperature_at_sea_floor"', period="season",
                  layer="near_bottom", provider_type="model")
    out = _read(study, "model", path)
    ev = out.events.merge(out.values, on="event_id")
    assert set(ev["depth_layer"]) == {"near_bottom"}
    assert set(ev["variable"]) == {"sea_water_temperature_at_sea_floor"}
    # The model runs MODEL_BOTTOM_OFFSET_C below the invented truth; a cell-season mean of the
    # smooth field is close to the truth at the cell centre, averaged over the season's months.
    summer = ev[ev["event_start"] == pd.Timestamp("2019-06-01")]
    assert len(summer) > 100
    doy = np.array([166.0, 196.5, 227.5])  # mid June, July, August (day of year + 1, no-leap)
    truth = np.mean([bottom_temperature_c(summer["lon"].to_numpy(), summer["lat"].to_numpy(), d, 2019) for d in doy], axis=0)
    diff = truth - summer["value"].to_numpy()
    assert np.median(diff) == pytest.approx(MODEL_BOTTOM_OFFSET_C, abs=0.05)
    # the curvilinear pixels inside the domain: accounted, and their areas sum to about the domain
    lon, lat = model_grid()
    assert out.files[0].rows_read == lon.size * 24
    cells = ev[ev["event_start"] == pd.Timestamp("2019-06-01")]
    domain_km2 = abs(GEOD.geometry_area_perimeter(study.domain)[0]) / 1e6
    assert cells["effort"].sum() == pytest.approx(domain_km2, rel=0.03)


def test_noleap_and_leap_years_put_day_59_in_different_seasons(study_dir: Path) -> None:
    # CF 4.4.1: day 59.5 after 2020-01-01 is 1 March in a no-leap calendar but 29 February in
    # the standard calendar (2020 is a leap year).
    study = load_study(study_dir)
    lat, lon = np.array([43.0, 43.01]), np.array([-152.0, -151.99])  # a single row would need bounds
    data = np.broadcast_to(np.array([1.0, 2.0], np.float32).reshape(2, 1, 1), (2, 2, 2)).copy()
    write_profile(study_dir, "m", 'tob = { name = "sea_water_temperature_at_sea_floor", unit = "degC" }',
                  period="season", layer="near_bottom")
    attrs = {"units": "degC"}
    for calendar, expected in (("noleap", {"winter": 1.0, "spring": 2.0}), ("standard", {"winter": 1.5})):
        path = regular_file(study_dir / f"{calendar}.nc", {"tob": (data, attrs)}, lat, lon, time=[58.5, 59.5],
                            time_units="days since 2020-01-01", calendar=calendar)
        out = _read(study, "m", path)
        got = {e.split("/")[1].split("-")[1]: v for e, v in zip(out.values["event_id"], out.values["value"], strict=True)}
        assert got == pytest.approx(expected)


def test_3d_field_reduced_per_study_layer(study_dir: Path) -> None:
    # Layer mean = thickness-weighted mean of the levels in the layer (levels from depth_bnds):
    # epipelagic (10-200 m) holds the 10-100 m level (value 2) and the 100-200 m level (value 3):
    # (2 x 90 + 3 x 100) / 190 = 2.526315...
    study = load_study(study_dir)
    lat, lon = np.array([43.0, 43.01]), np.array([-152.0, -151.99])
    depth = np.array([5.0, 50.0, 150.0, 500.0, 1500.0])
    values = np.broadcast_to(np.arange(1.0, 6.0)[None, :, None, None], (1, 5, 2, 2)).astype(np.float32)
    ds = xr.Dataset(
        {"thetao": (("time", "depth", "lat", "lon"), values.copy(), {"units": "degC"}),
         "depth_bnds": (("depth", "nv"), np.array([[0, 10], [10, 100], [100, 200], [200, 1000], [1000, 2000]], float))},
        coords={"time": ("time", [10.0], {"units": "days since 2019-07-01", "calendar": "standard"}),
                "depth": ("depth", depth, {"units": "m", "positive": "down", "bounds": "depth_bnds"}),
                "lat": ("lat", lat, {"units": "degrees_north"}), "lon": ("lon", lon, {"units": "degrees_east"})})
    path = study_dir / "thetao.nc"
    write_raw_netcdf(ds, path)
    write_profile(study_dir, "ocean3d", 'thetao = "sea_water_temperature"', layer="by_layer")
    out = _read(study, "ocean3d", path)
    got = out.events.merge(out.values, on="event_id").set_index("depth_layer")
    assert got.loc["surface", "value"] == pytest.approx(1.0)
    assert got.loc["epipelagic", "value"] == pytest.approx(480 / 190)
    assert got.loc["mesopelagic", "value"] == pytest.approx(4.0)
    assert got.loc["epipelagic", "depth_min_m"] == 10 and got.loc["epipelagic", "depth_max_m"] == 200
    pixel_area = sum(_pixel_area_km2(la - 0.005, la + 0.005, 0.01) for la in lat) * 2
    assert got.loc["epipelagic", "effort"] == pytest.approx(pixel_area, rel=1e-4)
    # the 1000-2000 m level is below the deepest study layer: 4 values masked as outside_domain
    assert dict(zip(out.masked["reason_code"], out.masked["n_values"], strict=True)) == {"outside_domain": 4}
    assert out.files[0].rows_read == 20 and out.files[0].rows_accepted == 16


def test_projected_grid_with_grid_mapping(study_dir: Path) -> None:
    # CF 5.6 grid mappings: x/y in a Lambert azimuthal equal-area projection, read with pyproj.CRS.from_cf.
    study = load_study(study_dir)
    crs = pyproj.CRS.from_proj4("+proj=laea +lat_0=43.5 +lon_0=-152 +ellps=WGS84 +units=m")
    x = np.arange(-50_000.0, 50_001.0, 10_000.0)
    y = np.arange(-40_000.0, 40_001.0, 10_000.0)
    data = np.full((1, y.size, x.size), 7.5, np.float32)
    ds = xr.Dataset(
        {"sst": (("time", "y", "x"), data, {"units": "degC", "grid_mapping": "crs"}),
         "crs": ((), 0, crs.to_cf())},
        coords={"time": ("time", [3.0], {"units": "days since 2021-08-01", "calendar": "standard"}),
                "x": ("x", x, {"standard_name": "projection_x_coordinate", "units": "m"}),
                "y": ("y", y, {"standard_name": "projection_y_coordinate", "units": "m"})})
    path = study_dir / "proj.nc"
    write_raw_netcdf(ds, path)
    write_profile(study_dir, "proj", SST)
    out = _read(study, "proj", path)
    np.testing.assert_allclose(out.values["value"], 7.5, rtol=1e-6)
    # 11 x 9 pixels of 10 km x 10 km in an equal-area projection: 9,900 km2 in all
    assert out.events["effort"].sum() == pytest.approx(9900.0, rel=1e-3)


# ------------------------------------------------------------------ bad input: one sentence, nothing written
def _nothing_written(study: Study) -> bool:
    store = Store(study.store_dir)
    if not store.exists():
        return True
    con = duckdb.connect(str(store.db_path), read_only=True)
    try:
        return con.execute("SELECT count(*) FROM ingests").fetchall()[0][0] == 0
    finally:
        con.close()


def _simple_file(study_dir: Path, name: str = "sst.nc", celsius: float = 9.0, **kw: object) -> Path:
    lat, lon = np.array([43.0, 43.1]), np.array([-152.0, -151.9])
    data = np.full((2, 2, 2), celsius, np.float32)
    attrs = kw.pop("attrs", {"units": "degC", "_FillValue": np.float32(-999)})
    return regular_file(study_dir / name, {"sst": (data, attrs)}, lat, lon, time=[1.0, 2.0], **kw)  # type: ignore[arg-type]


@pytest.mark.parametrize(("case", "match"), [
    ("not_netcdf", "is not a NetCDF file"),
    ("missing_variable", "variable 'sst', mapped in \\[variables\\].*is not in the file; its data variables are: chl"),
    ("no_time", "has no time axis"),
    ("no_coordinates", "no usable horizontal coordinates"),
    ("all_fill", "every value of 'sst' inside the study domain is a fill value"),
    ("outside", "no pixel of 'sst' lies inside the study domain"),
    ("truncated", "truncated or corrupt|corrupt or truncated"),
    ("truncated_classic", "is truncated: its NetCDF header describes"),
    ("kelvin_as_celsius", "labelled 'degC'.*they look like kelvin"),
    ("unit_conflict", "has units 'K' but sst_sat.toml says 'degC'"),
    ("no_units", "has no units attribute"),
    ("three_d_as_surface", "has 3 depth levels"),
])
def test_bad_files_one_sentence_nothing_written(study_dir: Path, case: str, match: str) -> None:
    study = load_study(study_dir)
    variables = SST
    path = study_dir / "bad.nc"
    lat, lon = np.array([43.0, 43.1]), np.array([-152.0, -151.9])
    if case == "not_netcdf":
        path.write_text("time,lat,lon,sst\n2019-01-01,43,-152,9.1\n")
    elif case == "missing_variable":
        ds = xr.Dataset({"chl": (("time", "lat", "lon"), np.ones((1, 2, 2)), {"units": "mg m-3"})},
                        coords={"time": ("time", [1.0], {"units": "days since 2019-01-01"}), "lat": lat, "lon": lon})
        write_raw_netcdf(ds, path)
    elif case == "no_time":
        ds = xr.Dataset({"sst": (("lat", "lon"), np.ones((2, 2)), {"units": "degC"})},
                        coords={"lat": ("lat", lat, {"units": "degrees_north"}), "lon": ("lon", lon, {"units": "degrees_east"})})
        write_raw_netcdf(ds, path)
    elif case == "no_coordinates":
        ds = xr.Dataset({"sst": (("time", "row", "col"), np.ones((1, 2, 2)), {"units": "degC"})},
                        coords={"time": ("time", [1.0], {"units": "days since 2019-01-01"})})
        write_raw_netcdf(ds, path)
    elif case == "all_fill":
        path = _simple_file(study_dir, "bad.nc", celsius=-999.0)
    elif case == "outside":
        path = regular_file(path, {"sst": (np.ones((1, 2, 2), np.float32), {"units": "degC"})},
                            np.array([10.0, 10.1]), np.array([20.0, 20.1]), time=[1.0])
    elif case == "truncated":
        rng = np.random.default_rng(0)
        big = rng.normal(9, 1, (50, 40, 40)).astype(np.float32)
        good = regular_file(study_dir / "good.nc", {"sst": (big, {"units": "degC"})},
                            np.linspace(42.1, 44.9, 40), np.linspace(-153.9, -150.1, 40), time=np.arange(50.0))
        data = good.read_bytes()
        path.write_bytes(data[: len(data) // 2])
    elif case == "truncated_classic":
        # the NetCDF library reads the missing tail of a classic file as zeros, without an error
        ds = xr.Dataset({"sst": (("time", "lat", "lon"), np.full((20, 30, 30), 9.0, np.float32), {"units": "degC"})},
                        coords={"time": ("time", np.arange(20.0), {"units": "days since 2019-01-01"}),
                                "lat": ("lat", np.linspace(42.1, 44.9, 30), {"units": "degrees_north"}),
                                "lon": ("lon", np.linspace(-153.9, -150.1, 30), {"units": "degrees_east"})})
        ds.to_netcdf(study_dir / "good.nc", format="NETCDF3_64BIT", unlimited_dims=["time"])
        data = (study_dir / "good.nc").read_bytes()
        path.write_bytes(data[: len(data) * 2 // 3])
    elif case == "kelvin_as_celsius":
        path = _simple_file(study_dir, "bad.nc", celsius=285.0)
    elif case == "unit_conflict":
        path = _simple_file(study_dir, "bad.nc", celsius=285.0, attrs={"units": "K"})
        variables = 'sst = { name = "sea_surface_temperature", unit = "degC" }'
    elif case == "no_units":
        path = _simple_file(study_dir, "bad.nc", attrs={"long_name": "sea temperature"})
    elif case == "three_d_as_surface":
        path = regular_file(path, {"sst": (np.ones((1, 3, 2, 2), np.float32), {"units": "degC"})}, lat, lon,
                            time=[1.0], depth=np.array([0.5, 5.0, 20.0]))
    write_profile(study_dir, "sst_sat", variables)
    with pytest.raises(InputFileError, match=match) as info:
        run(study, "sst_sat", {"rows": path})
    assert str(path.name) in str(info.value)
    assert "\n" not in str(info.value)
    assert _nothing_written(study)


def test_force_unit_repairs_a_wrong_units_attribute(study_dir: Path) -> None:
    study = load_study(study_dir)
    path = _simple_file(study_dir, "k.nc", celsius=285.15)  # says degC, holds kelvin
    write_profile(study_dir, "fixed", 'sst = { name = "sea_surface_temperature", force_unit = "K" }')
    out = _read(study, "fixed", path)
    assert out.values["value"].to_numpy() == pytest.approx(12.0)


@pytest.mark.parametrize(("variables", "extra", "match"), [
    ('sst = "sea_temperature"', "", "not a physical variable harmonize knows"),
    ('sst = { name = "sea_surface_temperature", unit = "furlongs" }', "", "not a temperature unit"),
    ('sst = "sea_surface_temperature"\nsst2 = "sea_surface_temperature"', "", "several file variables map"),
    (SST, "chunk_mb = -1\n", "aggregate.chunk_mb"),
])
def test_profile_mistakes_are_config_errors(study_dir: Path, variables: str, extra: str, match: str) -> None:
    study = load_study(study_dir)
    path = _simple_file(study_dir)
    write_profile(study_dir, "p", variables, extra=extra)
    with pytest.raises(ConfigError, match=match):
        run(study, "p", {"rows": path})
    write_profile(study_dir, "q", SST, period="fortnight")
    with pytest.raises(ConfigError, match="aggregate.period"):
        run(study, "q", {"rows": path})


def test_adapter_is_registered_with_its_field_vocabulary() -> None:
    adapter = GriddedAdapter()
    assert adapter.table_fields() == {"rows": {"time", "lat", "lon", "depth"}}
