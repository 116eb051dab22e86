"""GeoPackage export (OGC 12-128r18, GeoPackage Encoding Standard): event points and grid cells.

Layers, all in WGS84 (EPSG:4326):

- ``events`` (points): one per public event at its representative point, with time, season,
  layer, cell, stratum, effort and ``data_generalizations``. As everywhere
  (:mod:`harmonize.disclosure`), withheld fishing-effort cell-periods are absent and events
  with a sensitive taxon sit at their rounded position without a cell.
- ``cells`` (polygons): the study grid cells holding public events, outlined in lon/lat with
  densified edges, with coverage attributes: events in all and per source kind, season years
  sampled, first and last season year, and total public fishing hours.
- ``cell_coverage`` (attribute table): events per cell x season_year x season x source kind.
- ``export_metadata`` (attribute table): key/value provenance, ``provenance`` holding JSON.
"""

from __future__ import annotations

import json
from pathlib import Path

import geopandas as gpd
import pandas as pd
import pyogrio
import shapely

from harmonize.disclosure import Disclosure
from harmonize.export.atomic import all_or_nothing
from harmonize.export.metadata import ExportResult, describe_gpkg_columns, provenance
from harmonize.export.selection import (
    BASE_VIEW,
    ExportFilters,
    open_selection,
    prepare_target,
    source_kinds,
    sql_text,
)
from harmonize.study import Study
from harmonize.tagging import Grid

SUFFIXES = (".gpkg",)
CRS = "EPSG:4326"


def _events(con: object) -> pd.DataFrame:
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
            FROM {BASE_VIEW} GROUP BY source_id, event_id ORDER BY source_id, event_start, event_id"""
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
                disclosure: Disclosure | None = None) -> ExportResult:
    """Write the GeoPackage ``out`` (overwritten if it exists) with its provenance table."""
    path = prepare_target(out, SUFFIXES)
    filters = filters or ExportFilters()
    with open_selection(study, filters, disclosure) as (con, counts):
        events = _events(con)
        cells = _cells(con)
        coverage = _coverage(con)
        located = events["lat"].notna() & events["lon"].notna()
        notes = [
            "the events layer carries no taxon data",
            f"area_km2 is the nominal cell area in the equal-area study CRS {study.crs}",
        ]
        if (~located).any():
            notes.append(f"{int((~located).sum())} events without a position are not in the events layer")
        options = {"crs": CRS, "grid_crs": study.crs, "cell_size_km": study.cell_size_km,
                   "layers": {"events": int(located.sum()), "cells": len(cells), "cell_coverage": len(coverage)}}
        meta = provenance(con, study, "gpkg", filters, counts, options, notes)
    if path.exists():
        path.unlink()
    ev = events[located]
    points = gpd.GeoDataFrame(ev.drop(columns=["lat", "lon"]),
                              geometry=shapely.points(ev["lon"].to_numpy(float), ev["lat"].to_numpy(float)),
                              crs=CRS)
    points.to_file(path, layer="events", driver="GPKG", engine="pyogrio")
    if len(cells):
        cell_frame(study, cells).to_file(path, layer="cells", driver="GPKG", engine="pyogrio")
    pyogrio.write_dataframe(coverage, path, layer="cell_coverage", driver="GPKG")
    pyogrio.write_dataframe(_meta_table(meta), path, layer="export_metadata", driver="GPKG")
    describe_gpkg_columns(path)  # the unit of every numeric column, in gpkg_data_columns
    return ExportResult("gpkg", path, int(located.sum()), meta, [path])


def _meta_table(meta: dict[str, object]) -> pd.DataFrame:
    keys = ["tool_version", "contract_version", "generated_at", "study", "caution"]
    rows = [(k, str(meta[k])) for k in keys]
    rows += [("filters", json.dumps(meta["filters"])), ("ingests", json.dumps(meta["ingests"], default=str)),
             ("rows_suppressed_confidential", str(meta["confidentiality"]["rows_suppressed"])),  # type: ignore[index]
             ("events_generalised", str(meta["confidentiality"].get("events_generalised", 0))),  # type: ignore[attr-defined]
             ("precise", str(meta["confidentiality"]["precise"]).lower()),  # type: ignore[index]
             ("provenance", json.dumps(meta, default=str))]
    return pd.DataFrame(rows, columns=["key", "value"])
