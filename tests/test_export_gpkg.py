"""GeoPackage export: opens with pyogrio/geopandas, declared CRS, true cell areas, coverage, layers by kind."""

from __future__ import annotations

import json
from pathlib import Path

import geopandas as gpd
import numpy as np
import pyogrio
import pyproj
import pytest
import shapely
from export_store import ExportStore, export_study

import harmonize
from harmonize.disclosure import Disclosure
from harmonize.errors import HarmonizeError
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


LAYERS = {"domain": "Polygon", "strata": "Polygon", "samples": "Point", "gridded_cells": "Polygon",
          "fishing_cells": "Polygon", "cells": "Polygon", "cell_coverage": None, "export_metadata": None}


def test_layers_open_with_the_declared_crs(gpkg: tuple[Path, ExportStore]) -> None:
    path, _ = gpkg
    layers = dict(pyogrio.list_layers(path))
    assert layers == LAYERS
    for name, kind in LAYERS.items():
        if kind is not None:
            info = pyogrio.read_info(path, layer=name)
            assert pyproj.CRS(info["crs"]) == pyproj.CRS("EPSG:4326")
    events = gpd.read_file(path, layer="samples")
    # the sample events only: T1-T4 and V1, @V2 (fishing and gridded cells have layers of their own)
    assert sorted(events["event_id"]) == ["@V2", "T1", "T2", "T3", "T4", "V1"] and events.crs.to_epsg() == 4326
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
    assert len(gpd.read_file(only.path, layer="samples")) == 4
    assert dict(pyogrio.list_layers(only.path)) == LAYERS     # empty layers keep their geometry type


def test_fishing_and_gridded_cells_have_layers_of_their_own(gpkg: tuple[Path, ExportStore], study: Study) -> None:
    path, built = gpkg
    fishing = gpd.read_file(path, layer="fishing_cells").set_index("event_id")
    # E2 rests on 2 vessels: withheld (rule of three); E1 (5 vessels) and E3 (3) are public
    assert sorted(fishing.index) == ["E1", "E3"]
    assert (fishing.loc["E1", "fishing_hours"], fishing.loc["E1", "n_vessels"]) == (12.0, 5)
    assert fishing.loc["E3", "cell_id"] == built.effort_cells["E3"]
    # each polygon is its cell: it holds the cell's centre, computed here from the grid's CRS
    grid_crs = pyproj.Transformer.from_crs(study.crs, "EPSG:4326", always_xy=True)
    for event_id, row in fishing.iterrows():
        ix, iy = (int(v) for v in row["cell_id"][1:].split("_y"))
        size = study.cell_size_km * 1000
        lon, lat = grid_crs.transform((ix + 0.5) * size, (iy + 0.5) * size)
        assert row.geometry.contains(shapely.Point(lon, lat)), event_id
    gridded = gpd.read_file(path, layer="gridded_cells")
    assert len(gridded) == 2 and set(gridded["variables"]) == {"sea_surface_temperature"}
    assert (gridded["cell_periods"] == 1).all()


def test_domain_and_strata_layers(gpkg: tuple[Path, ExportStore], study: Study) -> None:
    domain = gpd.read_file(gpkg[0], layer="domain")
    assert len(domain) == 1 and domain.geometry.iloc[0].equals(study.domain)
    strata = gpd.read_file(gpkg[0], layer="strata").set_index("stratum")
    assert sorted(strata.index) == sorted(name for name, _ in study.strata)
    for name, geom in study.strata:
        assert strata.loc[name].geometry.equals(geom)


def test_times_in_every_layer_end_in_z(gpkg: tuple[Path, ExportStore]) -> None:
    # ISO 8601 UTC instants; GDAL's raw text of a GeoPackage DATETIME column (OGC 12-128r18, 1.1.1.1.1)
    for name in ("samples", "fishing_cells"):
        frame = pyogrio.read_dataframe(gpkg[0], layer=name, datetime_as_string=True)
        for column in ("event_start", "event_end"):
            text = frame[column].dropna()
            assert len(text) and text.str.match(r"^\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d(\.\d+)?Z$").all(), (name, column)


def test_geopackage_version_for_older_tools(study: Study, tmp_path: Path) -> None:
    import sqlite3

    path = export_gpkg(study, tmp_path / "old.gpkg", version="1.2").path
    with sqlite3.connect(path) as con:
        # GeoPackage 1.2 (OGC 12-128r15, requirement 2): application_id "GPKG", user_version 10200
        assert con.execute("PRAGMA application_id").fetchall()[0][0] == int.from_bytes(b"GPKG", "big")
        assert con.execute("PRAGMA user_version").fetchall()[0][0] == 10200
    assert dict(pyogrio.list_layers(path)) == LAYERS
    assert read_export_metadata(path)["options"]["gpkg_version"] == "1.2"
    with pytest.raises(HarmonizeError, match="GeoPackage version '1.1' cannot be written; choose one of 1.2"):
        export_gpkg(study, tmp_path / "older.gpkg", version="1.1")


def test_aggregated_fishing_blocks_are_points(study: Study, tmp_path: Path) -> None:
    path = export_gpkg(study, tmp_path / "agg.gpkg", disclosure=Disclosure.for_study(study, fishing_aggregate=True)).path
    layers = dict(pyogrio.list_layers(path))
    assert layers["fishing_blocks"] == "Point" and len(gpd.read_file(path, layer="fishing_cells")) == 0
    blocks = gpd.read_file(path, layer="fishing_blocks")
    # a block is not a cell of the grid: no cell id, a point at the block's centre
    assert len(blocks) >= 1 and "cell_id" not in blocks.columns
    assert (blocks.geometry.geom_type == "Point").all() and blocks["fishing_hours"].notna().all()
