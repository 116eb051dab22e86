"""GeoPackage export (OGC 12-128r18, GeoPackage Encoding Standard): events, cells, domain and strata.

Layers, all in WGS84 (EPSG:4326):

- ``samples`` (points): one per public sample event (trawl haul, plankton tow, transect
  segment, checklist: the kinds whose adapters say ``is_sample``) at its representative point,
  with time, season, layer, cell, stratum, effort and ``data_generalizations``.
- ``gridded_cells`` (polygons): one per source x grid cell holding gridded model or
  satellite values, with the number of cell-periods, the variables and the first and last
  season year (the values themselves are in the grid and long exports).
- ``fishing_cells`` (polygons): one per public fishing-effort cell-period (cell x period x gear
  x layer) with fishing hours and vessel count. Effort summed to coarser blocks by
  ``fishing_aggregate`` has no cell: those rows go to ``fishing_blocks`` (points at the
  block's centre), a layer written only when there are such rows.
- ``cells`` (polygons): the study grid cells holding public events, outlined in lon/lat with
  densified edges, with coverage attributes: events in all and per source kind, season years
  sampled, first and last season year, and total public fishing hours.
- ``domain`` (polygons) and ``strata`` (polygons, with ``stratum``): the study's domain and
  strata as study.toml names them.
- ``cell_coverage`` (attribute table): events per cell x season_year x season x source kind.
- ``export_metadata`` (attribute table): key/value provenance, ``provenance`` holding JSON.

As everywhere (:mod:`harmonize.disclosure`), every layer is built from the public rows:
withheld fishing-effort cell-periods are in no layer, and events with a sensitive taxon sit at
their rounded position without a cell. Times are written as UTC ``DATETIME`` values
(ISO 8601 ending in ``Z``). ``version`` chooses the GeoPackage version written (GDAL's
creation option ``VERSION``): 1.4 by default; 1.2 for GIS tools built on older GDAL, which
warn about the 1.4 ``user_version``.
"""

from __future__ import annotations

import json
from pathlib import Path

import geopandas as gpd
import pandas as pd
import pyogrio
import shapely

from harmonize.adapters.registry import kinds_sql
from harmonize.disclosure import Disclosure
from harmonize.errors import HarmonizeError
from harmonize.export.atomic import all_or_nothing
from harmonize.export.metadata import ExportResult, describe_gpkg_columns, provenance
from harmonize.export.selection import (
    BASE_VIEW,
    ExportFilters,
    open_selection,
    prepare_target,
    source_kinds,
)
from harmonize.sql import sql_text
from harmonize.study import Study
from harmonize.tagging import Grid

SUFFIXES = (".gpkg",)
CRS = "EPSG:4326"
#: GeoPackage versions GDAL writes (creation option VERSION); None = GDAL's default (1.4).
VERSIONS = ("1.2", "1.3", "1.4")


_GEOMETRY_TYPES = {"samples": "Point", "fishing_blocks": "Point", "gridded_cells": "Polygon",
                   "fishing_cells": "Polygon", "cells": "Polygon", "strata": "Polygon", "domain": "Polygon"}


def _events(con: object, where: str = "TRUE") -> pd.DataFrame:
    return con.sql(  # type: ignore[attr-defined]
        f"""SELECT source_id, event_id, any_value(source_kind) AS source_kind,
                   any_value(provider_type) AS provider_type, any_value(protocol) AS protocol,
                   min(event_start) AS event_start, max(event_end) AS event_end,
                   any_value(season_year) AS season_year, any_value(season) AS season,
                   any_value(depth_layer) AS depth_layer, any_value(cell_id) AS cell_id,
                   any_value(stratum) AS stratum,
                   max(effort) FILTER (WHERE quantity IN ('count', 'biomass')) AS effort,
                   any_value(effort_unit) FILTER (WHERE quantity IN ('count', 'biomass')) AS effort_unit,
                   any_value(data_generalizations) AS data_generalizations,
                   any_value(lat) AS lat, any_value(lon) AS lon, count(*) AS n_rows
            FROM {BASE_VIEW} WHERE {where} GROUP BY source_id, event_id ORDER BY source_id, event_start, event_id"""
    ).to_arrow_table().to_pandas()


def _cells(con: object) -> pd.DataFrame:
    kinds = [r[0] for r in con.execute(  # type: ignore[attr-defined]
        f"SELECT DISTINCT source_kind FROM {BASE_VIEW} ORDER BY 1").fetchall()]
    order = source_kinds()
    kinds = [k for k in order if k in kinds] + [k for k in kinds if k not in order]
    per_kind = ", ".join(
        f"count(DISTINCT source_id || chr(31) || event_id) FILTER (WHERE source_kind = {sql_text(k)}) AS events_{k}"
        for k in kinds)
    sql = f"""
        SELECT cell_id, count(DISTINCT source_id || chr(31) || event_id) AS events
               {', ' + per_kind if per_kind else ''},
               count(DISTINCT season_year) AS season_years, min(season_year) AS first_season_year,
               max(season_year) AS last_season_year,
               sum(value) FILTER (WHERE variable = 'fishing_hours') AS fishing_hours
        FROM {BASE_VIEW} WHERE cell_id IS NOT NULL GROUP BY cell_id ORDER BY cell_id"""
    return con.sql(sql).to_arrow_table().to_pandas()  # type: ignore[attr-defined]


def _coverage(con: object) -> pd.DataFrame:
    return con.sql(  # type: ignore[attr-defined]
        f"""SELECT cell_id, season_year, season, source_kind,
                   count(DISTINCT source_id || chr(31) || event_id) AS events
            FROM {BASE_VIEW} WHERE cell_id IS NOT NULL GROUP BY ALL ORDER BY ALL"""
    ).to_arrow_table().to_pandas()


def _gridded_cells(con: object) -> pd.DataFrame:
    return con.sql(  # type: ignore[attr-defined]
        f"""SELECT cell_id, source_id, count(DISTINCT event_id) AS cell_periods,
                   string_agg(DISTINCT variable, '|' ORDER BY variable) AS variables,
                   min(season_year) AS first_season_year, max(season_year) AS last_season_year
            FROM {BASE_VIEW} WHERE {kinds_sql(is_sample=False, is_fishing_effort=False)}
                 AND cell_id IS NOT NULL
            GROUP BY cell_id, source_id ORDER BY source_id, cell_id"""
    ).to_arrow_table().to_pandas()


def _fishing(con: object) -> pd.DataFrame:
    return con.sql(  # type: ignore[attr-defined]
        f"""SELECT any_value(cell_id) AS cell_id, source_id, event_id, any_value(protocol) AS protocol,
                   min(event_start) AS event_start, max(event_end) AS event_end,
                   any_value(season_year) AS season_year, any_value(season) AS season,
                   any_value(depth_layer) AS depth_layer,
                   sum(value) FILTER (WHERE variable = 'fishing_hours') AS fishing_hours,
                   max(n_vessels) AS n_vessels, any_value(lat) AS lat, any_value(lon) AS lon
            FROM {BASE_VIEW} WHERE {kinds_sql(is_fishing_effort=True)}
            GROUP BY source_id, event_id ORDER BY source_id, event_start, event_id"""
    ).to_arrow_table().to_pandas()


def _points(frame: pd.DataFrame) -> gpd.GeoDataFrame:
    located = frame["lat"].notna() & frame["lon"].notna()
    rows = frame[located]
    return gpd.GeoDataFrame(rows.drop(columns=["lat", "lon"]),
                            geometry=shapely.points(rows["lon"].to_numpy(float), rows["lat"].to_numpy(float)),
                            crs=CRS)


def _study_areas(study: Study) -> tuple[gpd.GeoDataFrame, gpd.GeoDataFrame]:
    domain = gpd.GeoDataFrame({"study": [study.name]}, geometry=[study.domain], crs=CRS)
    strata = gpd.GeoDataFrame({"stratum": [name for name, _ in study.strata]},
                              geometry=[geom for _, geom in study.strata], crs=CRS)
    return domain, strata


def cell_frame(study: Study, cells: pd.DataFrame) -> gpd.GeoDataFrame:
    """Cells (with a ``cell_id`` column) as WGS84 polygons with ix, iy and nominal area_km2.

    The study CRS must be equal-area for ``area_km2`` (the square of the cell size) to be
    the true area; harmonize's default EPSG:6933 is.
    """
    grid = Grid(study.crs, study.cell_size_km)
    ix, iy = Grid.parse(cells["cell_id"])
    polygons = grid.cell_polygons_lonlat(ix, iy)
    out = cells.copy()
    out.insert(1, "ix", ix)
    out.insert(2, "iy", iy)
    out.insert(3, "area_km2", float(study.cell_size_km) ** 2)
    return gpd.GeoDataFrame(out, geometry=polygons, crs=CRS)


@all_or_nothing(SUFFIXES)
def export_gpkg(study: Study, out: str | Path, filters: ExportFilters | None = None,
                disclosure: Disclosure | None = None, version: str | None = None) -> ExportResult:
    """Write the GeoPackage ``out`` (overwritten if it exists) with its provenance table.

    ``version`` is the GeoPackage version written ("1.2", "1.3" or "1.4"; default GDAL's, 1.4).
    """
    if version is not None and str(version) not in VERSIONS:
        raise HarmonizeError(f"GeoPackage version {version!r} cannot be written; choose one of {', '.join(VERSIONS)}")
    path = prepare_target(out, SUFFIXES)
    filters = filters or ExportFilters()
    with open_selection(study, filters, disclosure) as (con, counts):
        samples = _events(con, kinds_sql(is_sample=True))
        gridded = _gridded_cells(con)
        fishing = _fishing(con)
        cells = _cells(con)
        coverage = _coverage(con)
        layers: dict[str, pd.DataFrame] = {}
        domain, strata = _study_areas(study)
        layers["domain"] = domain
        layers["strata"] = strata
        layers["samples"] = _points(samples)
        layers["gridded_cells"] = cell_frame(study, gridded)
        celled = fishing["cell_id"].notna()
        layers["fishing_cells"] = cell_frame(study, fishing[celled].drop(columns=["lat", "lon"]))
        if (~celled).any():
            layers["fishing_blocks"] = _points(fishing[~celled].drop(columns=["cell_id"]))
        layers["cells"] = cell_frame(study, cells)
        layers["cell_coverage"] = coverage
        notes = [
            "the samples layer carries no taxon data",
            "gridded model and satellite values are summarised per cell in gridded_cells (values: grid export)",
            f"area_km2 is the nominal cell area in the equal-area study CRS {study.crs}",
        ]
        unplaced = len(samples) - len(layers["samples"])
        if unplaced:
            notes.append(f"{unplaced} sample events without a position are not in the samples layer")
        options = {"crs": CRS, "grid_crs": study.crs, "cell_size_km": study.cell_size_km,
                   "gpkg_version": version or "1.4",
                   "layers": {name: len(frame) for name, frame in layers.items()}}
        meta = provenance(con, study, "gpkg", filters, counts, options, notes)
    if path.exists():
        path.unlink()
    layers["export_metadata"] = _meta_table(meta)
    creation = {"VERSION": str(version)} if version is not None else {}
    for i, (name, frame) in enumerate(layers.items()):
        # an empty layer keeps its geometry type (GDAL would call it Unknown)
        kind = _GEOMETRY_TYPES.get(name) if isinstance(frame, gpd.GeoDataFrame) and frame.empty else None
        pyogrio.write_dataframe(frame, path, layer=name, driver="GPKG", geometry_type=kind,
                                dataset_options=creation if i == 0 else None)
    describe_gpkg_columns(path)  # the unit of every numeric column, in gpkg_data_columns
    return ExportResult("gpkg", path, len(layers["samples"]), meta, [path])


def _meta_table(meta: dict[str, object]) -> pd.DataFrame:
    keys = ["tool_version", "contract_version", "generated_at", "study", "caution"]
    rows = [(k, str(meta[k])) for k in keys]
    rows += [("filters", json.dumps(meta["filters"])), ("ingests", json.dumps(meta["ingests"], default=str)),
             ("rows_suppressed_confidential", str(meta["confidentiality"]["rows_suppressed"])),  # type: ignore[index]
             ("events_generalised", str(meta["confidentiality"].get("events_generalised", 0))),  # type: ignore[attr-defined]
             ("precise", str(meta["confidentiality"]["precise"]).lower()),  # type: ignore[index]
             ("provenance", json.dumps(meta, default=str))]
    return pd.DataFrame(rows, columns=["key", "value"])
