"""Hostile NetCDF files are refused in one line before any value is read: a file declaring far
more values than it holds, a time axis with no steps, a valid_min that is text."""

from __future__ import annotations

import resource
from pathlib import Path

import netCDF4
import numpy as np
import pytest
from gridded_files import regular_file, write_profile

from harmonize import Store, load_study, run
from harmonize.errors import InputFileError

SST = 'sst = "sea_surface_temperature"'
LAT, LON = np.array([43.0, 43.1]), np.array([-152.0, -151.9])


def _refused(study_dir: Path, path: Path, match: str) -> None:
    study = load_study(study_dir)
    write_profile(study_dir, "sst_sat", SST)
    with pytest.raises(InputFileError, match=match) as info:
        run(study, "sst_sat", {"rows": path})
    assert path.name in str(info.value) and "\n" not in str(info.value)
    assert not Store(study.store_dir).exists() or len(Store(study.store_dir).ingests()) == 0


def test_a_small_file_declaring_billions_of_values_is_refused_before_reading(study_dir: Path) -> None:
    # An HDF5 NetCDF file whose chunks are never written: 2.5e10 declared values in a few KB.
    path = study_dir / "bomb.nc"
    with netCDF4.Dataset(path, "w", format="NETCDF4") as nc:
        nc.createDimension("time", 25_000)
        nc.createDimension("lat", 1_000)
        nc.createDimension("lon", 1_000)
        t = nc.createVariable("time", "f8", ("time",))
        t.units, t.standard_name = "days since 2019-01-01", "time"
        t[:] = np.arange(25_000.0)
        la = nc.createVariable("lat", "f8", ("lat",))
        la.units = "degrees_north"
        la[:] = np.linspace(42.0, 45.0, 1_000)
        lo = nc.createVariable("lon", "f8", ("lon",))
        lo.units = "degrees_east"
        lo[:] = np.linspace(-154.0, -150.0, 1_000)
        v = nc.createVariable("sst", "f4", ("time", "lat", "lon"), chunksizes=(1, 1_000, 1_000), zlib=True)
        v.units = "degC"
    size = path.stat().st_size
    assert size < 1_000_000
    peak_before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    _refused(study_dir, path, r"variable 'sst' declares 25,000,000,000 values \(25000 x 1000 x 1000\) "
                              rf"in a file of {size:,} bytes")
    # refused before reading: the peak memory grew by far less than one time step (4 MB) x 100
    assert resource.getrusage(resource.RUSAGE_SELF).ru_maxrss - peak_before < 400_000  # KiB


def test_a_time_axis_with_no_steps_is_refused(study_dir: Path) -> None:
    path = regular_file(study_dir / "empty.nc", {"sst": (np.zeros((0, 2, 2), np.float32), {"units": "degC"})},
                        LAT, LON, time=np.array([]))
    _refused(study_dir, path, r"the time axis 'time' of 'sst' has no steps")


def test_a_text_valid_min_is_refused(study_dir: Path) -> None:
    path = regular_file(study_dir / "text.nc",
                        {"sst": (np.full((2, 2, 2), 9.0, np.float32), {"units": "degC", "valid_min": "cold"})},
                        LAT, LON, time=[1.0, 2.0])
    _refused(study_dir, path, r"variable 'sst' has a packing or valid-range attribute that is not a number")
