"""Co-location: gridded cell-period values attached to sample events of the store."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from factories import store_frames
from gridded_files import regular_file, write_profile

from harmonize import load_study, run
from harmonize.colocate import colocate, colocate_wide
from harmonize.demo.sources.gridded import write_raw_netcdf
from harmonize.errors import HarmonizeError
from harmonize.study import Study

LAT = np.arange(42.05, 45.0, 0.1)
LON = np.arange(-153.95, -150.0, 0.1)


def _gridded_store(study_dir: Path) -> Study:
    """Three gridded sources over the whole fixture domain, constant values easy to check.

    SST (satellite): June 2019 = 10 degC, July 2019 = 20 degC, clouded everywhere north of 44.5 N.
    Bottom temperature (model, near_bottom, seasons): 5 degC. Temperature by study layer: the
    surface layer 1 degC, the epipelagic layer 2 degC.
    """
    study = load_study(study_dir)
    shape = (2, LAT.size, LON.size)
    sst = np.where(np.arange(2)[:, None, None] == 0, 10.0, 20.0) * np.ones(shape)
    sst[:, LAT > 44.5, :] = -999.0
    regular_file(study_dir / "sst.nc", {"sst": (sst.astype(np.float32), {"units": "degC", "_FillValue": np.float32(-999)})},
                 LAT, LON, time=[10.0, 40.0], time_units="days since 2019-06-01")
    write_profile(study_dir, "sat", 'sst = "sea_surface_temperature"', source_id="satellite")
    run(study, "sat", {"rows": study_dir / "sst.nc"})
    regular_file(study_dir / "tob.nc", {"tob": (np.full((3, LAT.size, LON.size), 5.0, np.float32), {"units": "degC"})},
                 LAT, LON, time=[15.0, 45.0, 75.0], time_units="days since 2019-06-01")
    write_profile(study_dir, "model", 'tob = "sea_water_temperature_at_sea_floor"', period="season",
                  layer="near_bottom", provider_type="model", source_id="ocean_model")
    run(study, "model", {"rows": study_dir / "tob.nc"})
    levels = np.broadcast_to(np.array([1.0, 2.0])[None, :, None, None], (2, 2, LAT.size, LON.size))
    ds = xr.Dataset({"thetao": (("time", "depth", "lat", "lon"), levels.astype(np.float32).copy(), {"units": "degC"})},
                    coords={"time": ("time", [20.0, 35.0], {"units": "days since 2019-06-01"}),
                            "depth": ("depth", [5.0, 50.0], {"units": "m", "positive": "down"}),
                            "lat": ("lat", LAT, {"units": "degrees_north"}), "lon": ("lon", LON, {"units": "degrees_east"})})
    write_raw_netcdf(ds, study_dir / "thetao.nc")
    write_profile(study_dir, "model3d", 'thetao = "sea_water_temperature"', layer="by_layer", provider_type="model",
                  source_id="ocean_model_3d")
    run(study, "model3d", {"rows": study_dir / "thetao.nc"})
    return study


def _samples(study: Study) -> None:
    events = pd.DataFrame({
        "event_id": ["haul-1", "tow-2", "haul-3", "haul-4"],
        "event_start": ["2019-06-15 08:00", "2019-07-02 10:00", "2018-06-15 09:00", "2019-06-20 12:00"],
        "lat": [43.0, 43.0, 43.0, 44.8],
        "lon": [-152.0, -152.0, -152.0, -152.0],
        "depth_layer": ["near_bottom", "epipelagic", "near_bottom", "near_bottom"],
    })
    values = pd.DataFrame({"event_id": events["event_id"], "variable": "Ostravix keldensis", "value": 1.0})
    store_frames(study, events, values, source_id="survey", kind="trawl")


def test_each_sample_gets_its_cell_period_value(study_dir: Path) -> None:
    study = _gridded_store(study_dir)
    _samples(study)
    long = colocate(study, ["sea_surface_temperature", "sea_water_temperature_at_sea_floor", "sea_water_temperature"])
    got = long.set_index(["event_id", "variable"])["value"]
    sst, tob, temp = "sea_surface_temperature", "sea_water_temperature_at_sea_floor", "sea_water_temperature"
    # a surface field matches every sample; July hauls get July's value
    assert got[("haul-1", sst)] == pytest.approx(10.0)
    assert got[("tow-2", sst)] == pytest.approx(20.0)
    assert got[("haul-1", tob)] == pytest.approx(5.0)
    # a field per study layer matches the sample's layer only
    assert got[("tow-2", temp)] == pytest.approx(2.0)
    assert pd.isna(got[("haul-1", temp)])
    # before the gridded period, or in a clouded cell: null, never a neighbour's value
    assert pd.isna(got[("haul-3", sst)]) and pd.isna(got[("haul-3", tob)])
    assert pd.isna(got[("haul-4", sst)]) and got[("haul-4", tob)] == pytest.approx(5.0)
    assert len(long) == 4 * 3 and set(long["source_id"]) == {"survey"}
    assert (long["unit"] == "degC").all()
    row = long[(long["event_id"] == "haul-1") & (long["variable"] == sst)].iloc[0]
    assert row["gridded_source_id"] == "satellite" and row["gridded_event_id"].endswith("/2019-06/surface/" + sst)
    assert row["period_start"] == pd.Timestamp("2019-06-01", tz="UTC") and row["valid_area_km2"] > 500


def test_wide_form_and_choosing_between_sources(study_dir: Path) -> None:
    study = _gridded_store(study_dir)
    _samples(study)
    # a second SST source: the wide form then needs a choice
    sst2 = np.full((1, LAT.size, LON.size), 12.5, np.float32)
    regular_file(study_dir / "sst2.nc", {"sst": (sst2, {"units": "degC"})}, LAT, LON, time=[5.0],
                 time_units="days since 2019-06-01")
    write_profile(study_dir, "sat2", 'sst = "sea_surface_temperature"', source_id="satellite_b")
    run(study, "sat2", {"rows": study_dir / "sst2.nc"})
    with pytest.raises(HarmonizeError, match="2 gridded sources provide 'sea_surface_temperature'"):
        colocate_wide(study, ["sea_surface_temperature"])
    wide = colocate_wide(study, ["sea_surface_temperature", "sea_water_temperature_at_sea_floor"],
                         sources={"sea_surface_temperature": "satellite_b"}).set_index("event_id")
    assert list(wide.columns) == ["source_id", "sea_surface_temperature", "sea_water_temperature_at_sea_floor"]
    assert wide.loc["haul-1", "sea_surface_temperature"] == pytest.approx(12.5)
    assert wide.loc["haul-1", "sea_water_temperature_at_sea_floor"] == pytest.approx(5.0)


def test_events_given_as_a_frame_with_positions(study_dir: Path) -> None:
    study = _gridded_store(study_dir)
    events = pd.DataFrame({"source_id": ["mine"], "event_id": ["a"], "event_start": [pd.Timestamp("2019-07-10")],
                           "lat": [42.6], "lon": [-153.2]})
    long = colocate(study, ["sea_surface_temperature"], events)
    assert long["value"].tolist() == pytest.approx([20.0])


def test_unknown_variable_and_source_are_explained(study_dir: Path) -> None:
    study = _gridded_store(study_dir)
    with pytest.raises(HarmonizeError, match="no gridded source in the store has 'sea_ice_area_fraction'"):
        colocate(study, ["sea_ice_area_fraction"])
    with pytest.raises(HarmonizeError, match="gridded source 'nope' has no 'sea_surface_temperature'"):
        colocate(study, ["sea_surface_temperature"], sources={"sea_surface_temperature": "nope"})


@pytest.mark.subprocess
def test_cli_verb(study_dir: Path, tmp_path: Path) -> None:
    study = _gridded_store(study_dir)
    _samples(study)
    out = tmp_path / "sst.csv"
    proc = subprocess.run(
        [sys.executable, "-c", "from harmonize.cli.app import main; main()", "--study", str(study_dir), "colocate",
         "sea_surface_temperature", "--csv", str(out), "--wide"],
        capture_output=True, text=True, check=False)
    assert proc.returncode == 0, proc.stderr
    assert "survey" in proc.stdout and "satellite" in proc.stdout
    csv = pd.read_csv(out)
    assert csv.set_index("event_id").loc["tow-2", "sea_surface_temperature"] == pytest.approx(20.0)
    bad = subprocess.run(
        [sys.executable, "-c", "from harmonize.cli.app import main; main()", "--study", str(study_dir), "colocate",
         "sea_surface_temperature", "--source", "oops"], capture_output=True, text=True, check=False)
    assert bad.returncode == 2 and "is not VARIABLE=SOURCE_ID" in bad.stderr
