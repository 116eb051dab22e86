"""GeoPackage export: opens with pyogrio/geopandas, declared CRS, true cell areas, coverage."""

from __future__ import annotations

import json
from pathlib import Path

import geopandas as gpd
import numpy as np
import pyogrio
import pyproj
import pytest
from export_store import ExportStore, export_study

import harmonize
from harmonize.export.gpkg import export_gpkg
from harmonize.export.metadata import read_export_metadata
from harmonize.export.selection import ExportFilters
from harmonize.study import Study


@pytest.fixture(scope="module")
def shared(tmp_path_factory: pytest.TempPathFactory) -> tuple[Study, Path, ExportStore]:
    folder = tmp_path_factory.mktemp("gpkg")
    study, built = export_study(folder / "study")
    return study, export_gpkg(study, folder / "coverage.gpkg").path, built


@pytest.fixture
def study(shared: tuple[Study, Path, ExportStore]) -> Study:
    return shared[0]


@pytest.fixture
def gpkg(shared: tuple[Study, Path, ExportStore]) -> tuple[Path, ExportStore]:
    return shared[1], shared[2]


def test_layers_open_with_the_declared_crs(gpkg: tuple[Path, ExportStore]) -> None:
    path, _ = gpkg
    layers = dict(pyogrio.list_layers(path))
    assert layers == {"events": "Point", "cells": "Polygon", "cell_coverage": None, "export_metadata": None}
    for name in ("events", "cells"):
        info = pyogrio.read_info(path, layer=name)
        assert pyproj.CRS(info["crs"]) == pyproj.CRS("EPSG:4326")
    events = gpd.read_file(path, layer="events")
    assert len(events) == 10 and events.crs.to_epsg() == 4326     # E2 (2 vessels) withheld
    t1 = events[events["event_id"] == "T1"].geometry.iloc[0]
    assert (t1.x, t1.y) == (-153.0, 43.0)     # generalised to 0.1 degree (already on it)
    assert events.set_index("event_id").loc["T1", "data_generalizations"].startswith("coordinates rounded")
    assert "variable" not in events.columns   # no taxon data in the points


def test_cell_areas_match_geodesic_areas(gpkg: tuple[Path, ExportStore], study: Study) -> None:
    cells = gpd.read_file(gpkg[0], layer="cells")
    # EPSG:6933 is equal-area, so every 25 km cell covers 625 km2 of the WGS84 ellipsoid;
    # pyproj.Geod (Karney 2013, "Algorithms for geodesics", J. Geodesy 87:43-55) measures the
    # outlines. Densified edges (8 points a side) keep the polygon within 0.1 % of the area.
    geod = pyproj.Geod(ellps="WGS84")
    areas = np.array([abs(geod.geometry_area_perimeter(g)[0]) for g in cells.geometry]) / 1e6
    np.testing.assert_allclose(areas, study.cell_size_km ** 2, rtol=1e-3)
    np.testing.assert_allclose(cells["area_km2"], 625.0)


def test_cell_coverage_attributes(gpkg: tuple[Path, ExportStore]) -> None:
    path, built = gpkg
    cells = gpd.read_file(path, layer="cells").set_index("cell_id")
    shared = cells.loc[built.effort_cells["E1"]]
    assert shared["events"] == 1 and shared["events_effort"] == 1        # E2 (2 vessels) is in no layer
    assert shared["fishing_hours"] == 12.0 and "fishing_values_suppressed" not in cells.columns
    other = cells.loc[built.effort_cells["E3"]]   # E3 fishing + G1 model cell-period
    assert other["fishing_hours"] == 7.5 and other["events_gridded"] == 1 and other["events"] == 2
    trawl_cell = cells[cells["events_trawl"] == 2]   # T3 and T4 share a cell, two season years
    assert len(trawl_cell) == 1 and trawl_cell["season_years"].iloc[0] == 2
    assert (trawl_cell["first_season_year"].iloc[0], trawl_cell["last_season_year"].iloc[0]) == (2020, 2021)
    coverage = pyogrio.read_dataframe(path, layer="cell_coverage")
    assert coverage["events"].sum() == 7      # 10 public events, 3 of them sensitive (no cell)


def test_metadata_table_and_filters(study: Study, gpkg: tuple[Path, ExportStore], tmp_path: Path) -> None:
    path, built = gpkg
    table = pyogrio.read_dataframe(path, layer="export_metadata").set_index("key")["value"]
    assert table["tool_version"] == harmonize.__version__
    assert {i["ingest_id"] for i in json.loads(table["ingests"])} == set(built.ingests.values())
    assert read_export_metadata(path)["format"] == "gpkg"
    only = export_gpkg(study, tmp_path / "trawl.gpkg", ExportFilters.build(kinds="trawl"))
    assert len(gpd.read_file(only.path, layer="events")) == 4
