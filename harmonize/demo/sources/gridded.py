"""Demo gridded fields: a satellite SST + chlorophyll product and an ocean model's bottom temperature.

Both files are invented and written the way real products often are. The satellite file
stores Kelvin SST packed as int16 (scale_factor, add_offset, _FillValue, valid range) on a
0..360 longitude axis with latitude running north to south, and has clouds. The model file
is on a curvilinear (rotated) grid with 2-D latitude/longitude, a no-leap calendar and
monthly means of sea-floor temperature that run :data:`MODEL_BOTTOM_OFFSET_C` colder than
the invented truth the trawl sensors measure, so the audit can find the offset.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import xarray as xr

from harmonize.demo.sea import (
    MODEL_BOTTOM_OFFSET_C,
    YEARS,
    DemoInput,
    bottom_depth_m,
    bottom_temperature_c,
    sea_surface_temperature_c,
)

KIND = "gridded"
ZERO_CELSIUS_K = 273.15  # exact (BIPM SI Brochure, 9th ed. 2019, section 2.3.1)
#: Days per month of the no-leap (365_day) calendar (CF conventions 1.11, section 4.4.1).
NOLEAP_MONTH_DAYS = np.array([31, 28, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31])

SATELLITE_PROFILE = """\
[source]
id = "keldmar_satellite"
kind = "gridded"
provider_type = "remote_sensing"
description = "Invented 8-day satellite composites of sea-surface temperature and chlorophyll-a."

[variables]
analysed_sst = "sea_surface_temperature"
chlor_a = "mass_concentration_of_chlorophyll_a_in_sea_water"

[aggregate]
period = "month"
layer = "surface"
"""

MODEL_PROFILE = """\
[source]
id = "keldmar_ocean_model"
kind = "gridded"
provider_type = "model"
description = "Invented ocean model: monthly mean sea-floor temperature, no-leap calendar."

[variables]
tob = { name = "sea_water_temperature_at_sea_floor", unit = "degC" }

[aggregate]
period = "season"
layer = "near_bottom"
"""


def chlorophyll_mg_m3(lon: np.ndarray, lat: np.ndarray, day_of_year: np.ndarray) -> np.ndarray:
    """Invented chlorophyll-a (mg m-3): richer over the shallow shelf, with a spring bloom."""
    depth = bottom_depth_m(lon, lat)
    bloom = np.exp(-0.5 * ((np.asarray(day_of_year, float) - 120.0) / 25.0) ** 2)
    return 0.25 + 1.2 * np.exp(-depth / 150.0) * (0.4 + bloom)


def write_satellite_file(path: Path, rng: np.random.Generator, years: tuple[int, ...] = YEARS,
                         step_days: int = 8, resolution_deg: float = 0.1, cloud_share: float = 0.3) -> Path:
    """Write the invented satellite product: packed Kelvin SST and chlorophyll-a, with clouds."""
    lon = np.round(np.arange(203.5 + resolution_deg / 2, 212.5, resolution_deg), 4)  # 0..360 convention
    lat = np.round(np.arange(46.5 - resolution_deg / 2, 40.5, -resolution_deg), 4)  # north to south
    days = np.concatenate([
        (np.datetime64(f"{y}-01-01") - np.datetime64("1981-01-01")).astype(int) + np.arange(0, 365, step_days)
        for y in years
    ]).astype(np.float64)
    times = np.datetime64("1981-01-01") + days.astype("timedelta64[D]")
    doy = (times - times.astype("datetime64[Y]")).astype(int) + 1
    year = times.astype("datetime64[Y]").astype(int) + 1970
    glon, glat = np.meshgrid(lon - 360.0, lat)
    shape = (days.size, lat.size, lon.size)
    sst_c = sea_surface_temperature_c(glon[None], glat[None], doy[:, None, None], year[:, None, None])
    sst_c = sst_c + rng.normal(0, 0.2, shape)
    packed = np.round(sst_c / 0.01).astype(np.int16)  # K = packed x 0.01 + 273.15
    chl = chlorophyll_mg_m3(glon[None], glat[None], doy[:, None, None]) * rng.lognormal(0, 0.15, shape)
    cloud = rng.random(shape) < cloud_share
    packed[cloud] = -32768
    chl = chl.astype(np.float32)
    chl[cloud] = -999.0
    # a few pixels with a sensor glitch beyond the valid range
    glitch = rng.random(shape) < 0.0005
    packed[glitch & ~cloud] = 9000
    chl[glitch & ~cloud] = -5.0
    ds = xr.Dataset(
        {
            "analysed_sst": (("time", "lat", "lon"), packed, {
                "standard_name": "sea_surface_temperature", "units": "kelvin", "scale_factor": 0.01,
                "add_offset": ZERO_CELSIUS_K, "_FillValue": np.int16(-32768),
                "valid_min": np.int16(-300), "valid_max": np.int16(4500)}),
            "chlor_a": (("time", "lat", "lon"), chl, {
                "standard_name": "mass_concentration_of_chlorophyll_a_in_sea_water", "units": "mg m-3",
                "_FillValue": np.float32(-999.0), "valid_min": np.float32(0.001), "valid_max": np.float32(100.0)}),
        },
        coords={
            "time": ("time", days, {"units": "days since 1981-01-01 00:00:00", "calendar": "standard",
                                    "standard_name": "time", "axis": "T"}),
            "lat": ("lat", lat, {"units": "degrees_north", "standard_name": "latitude"}),
            "lon": ("lon", lon, {"units": "degrees_east", "standard_name": "longitude"}),
        },
        attrs={"Conventions": "CF-1.8", "title": "Invented Keldmar Sea satellite composites (demo data)"},
    )
    write_raw_netcdf(ds, path)
    return path


def model_grid(nx: int = 70, ny: int = 55) -> tuple[np.ndarray, np.ndarray]:
    """A rotated curvilinear model grid over the Keldmar Sea: 2-D (lon, lat) of its centres."""
    i, j = np.meshgrid(np.arange(nx, dtype=float), np.arange(ny, dtype=float))
    lon = -157.0 + 0.14 * i + 0.025 * j
    lat = 40.2 + 0.12 * j - 0.012 * i
    return lon, lat


def write_model_file(path: Path, years: tuple[int, ...] = YEARS, calendar: str = "noleap") -> Path:
    """Write the invented ocean model's monthly bottom temperature on a no-leap calendar."""
    lon, lat = model_grid()
    if calendar == "360_day":
        month_days = np.full(12, 30)
    else:
        month_days = NOLEAP_MONTH_DAYS
    starts = np.concatenate([[0], np.cumsum(month_days)[:-1]])
    year_len = int(month_days.sum())
    mid = starts + month_days / 2.0
    days = np.concatenate([(y - years[0]) * year_len + mid for y in years])
    year = np.repeat(np.array(years), 12)
    doy = np.tile(mid + 1, len(years))
    temp = bottom_temperature_c(lon[None], lat[None], doy[:, None, None], year[:, None, None]) - MODEL_BOTTOM_OFFSET_C
    temp = temp.astype(np.float32)
    land = np.broadcast_to(lat > 46.3, temp.shape)  # the invented northern coast
    temp[land] = np.float32(1e20)
    ds = xr.Dataset(
        {"tob": (("time", "y", "x"), temp, {
            "standard_name": "sea_water_potential_temperature_at_sea_floor", "units": "degC",
            "_FillValue": np.float32(1e20), "coordinates": "nav_lat nav_lon"})},
        coords={
            "time": ("time", days, {"units": f"days since {years[0]}-01-01 00:00:00", "calendar": calendar,
                                    "standard_name": "time", "axis": "T"}),
            "nav_lat": (("y", "x"), lat, {"units": "degrees_north", "standard_name": "latitude"}),
            "nav_lon": (("y", "x"), lon, {"units": "degrees_east", "standard_name": "longitude"}),
        },
        attrs={"Conventions": "CF-1.8", "title": "Invented Keldmar Sea ocean model (demo data)"},
    )
    write_raw_netcdf(ds, path)
    return path


def write_raw_netcdf(ds: xr.Dataset, path: Path) -> None:
    """Write stored (already packed) numbers as they are: packing attributes pass through.

    ``_FillValue`` moves to the encoding (xarray writes it from there); scale_factor and
    add_offset stay plain attributes, so xarray does not pack the numbers a second time.
    """
    path.parent.mkdir(parents=True, exist_ok=True)
    encoding = {}
    for name, var in ds.data_vars.items():
        enc: dict = {"dtype": var.dtype}
        if "_FillValue" in var.attrs:
            enc["_FillValue"] = var.attrs.pop("_FillValue")
        encoding[name] = enc
    for name in ds.coords:
        encoding[name] = {"_FillValue": None}
    ds.to_netcdf(path, encoding=encoding, engine="netcdf4")


def generate(folder: Path, rng: np.random.Generator) -> list[DemoInput]:
    out = folder / "data" / KIND
    out.mkdir(parents=True, exist_ok=True)
    (folder / "profiles" / "gridded_satellite.toml").write_text(SATELLITE_PROFILE, encoding="utf-8")
    (folder / "profiles" / "gridded_model.toml").write_text(MODEL_PROFILE, encoding="utf-8")
    sat = write_satellite_file(out / "keldmar_sst_chl_8day.nc", rng)
    model = write_model_file(out / "keldmar_model_bottom_temperature.nc")
    return [
        DemoInput("profiles/gridded_satellite.toml", {"rows": str(sat.relative_to(folder))},
                  "satellite SST and chlorophyll (8-day composites)"),
        DemoInput("profiles/gridded_model.toml", {"rows": str(model.relative_to(folder))},
                  "ocean-model bottom temperature (no-leap calendar)"),
    ]
