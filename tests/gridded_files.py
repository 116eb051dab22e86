"""Small NetCDF files and gridded profiles for the gridded tests, written with xarray."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import xarray as xr

from harmonize.demo.sources.gridded import write_raw_netcdf


def write_profile(study_dir: Path, name: str, variables: str, period: str = "month", layer: str = "surface",
                  extra: str = "", provider_type: str = "remote_sensing", source_id: str | None = None) -> Path:
    """A gridded profile in the study's profiles/ folder."""
    text = (f'[source]\nid = "{source_id or name}"\nkind = "gridded"\nprovider_type = "{provider_type}"\n\n'
            f"[variables]\n{variables}\n\n[aggregate]\nperiod = \"{period}\"\nlayer = \"{layer}\"\n{extra}")
    path = study_dir / "profiles" / f"{name}.toml"
    path.write_text(text, encoding="utf-8")
    return path


def regular_file(path: Path, data: dict[str, tuple[np.ndarray, dict]], lat: np.ndarray, lon: np.ndarray,
                 time: np.ndarray, time_units: str = "days since 2019-01-01 00:00:00", calendar: str = "standard",
                 depth: np.ndarray | None = None, depth_attrs: dict | None = None) -> Path:
    """A (time, [depth], lat, lon) file; ``data`` maps name -> (stored array, attributes)."""
    dims = ("time", "depth", "lat", "lon") if depth is not None else ("time", "lat", "lon")
    coords = {
        "time": ("time", np.asarray(time, float), {"units": time_units, "calendar": calendar, "standard_name": "time"}),
        "lat": ("lat", np.asarray(lat, float), {"units": "degrees_north", "standard_name": "latitude"}),
        "lon": ("lon", np.asarray(lon, float), {"units": "degrees_east", "standard_name": "longitude"}),
    }
    if depth is not None:
        coords["depth"] = ("depth", np.asarray(depth, float), depth_attrs or {"units": "m", "positive": "down"})
    ds = xr.Dataset({k: (dims, v, dict(a)) for k, (v, a) in data.items()}, coords=coords)
    write_raw_netcdf(ds, path)
    return path
