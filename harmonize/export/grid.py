"""The grid table: cell x season_year x season x depth_layer x variable summaries for gridded models.

One row per (source_kind, cell_id, season_year, season, depth_layer, variable, quantity,
effort_unit). Values of one event are first summed over life stages, so each event counts
once per variable; then per group:

- ``events``: sample events (or cell-periods) behind the row;
- ``total_effort``: summed effort of those events (km2, m3, h ... in ``effort_unit``);
- ``mean_density``: mean of the events' densities (value / effort);
- ``share_zero``: share of events where the taxon was recorded or inferred absent
  (count and biomass only);
- ``total_value`` and ``mean_value``: for physical measurements and fishing hours;
- ``cell_lon``, ``cell_lat`` (WGS84 degrees) and ``cell_x_m``, ``cell_y_m`` (metres in the
  study CRS): the cell's centre, from the study grid (:class:`harmonize.tagging.Grid`); null
  where the cell is null. The parquet file also has ``geometry``, the centre as a GeoParquet
  point (:mod:`harmonize.export.geo`).

Densities of different effort units and source kinds are never averaged together. Probable
twins (``probable_duplicate``) and presence-only records are left out. The rows are the
public rows of :mod:`harmonize.disclosure`: withheld fishing-effort rows are in no group
(nowhere else is a total published that they could be recovered from by difference), and
events with a sensitive taxon have no cell (their rows group under an empty cell_id).
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd

from harmonize.disclosure import Disclosure
from harmonize.export.atomic import all_or_nothing
from harmonize.export.geo import CELL_CENTRES, GEOMETRY_COLUMN, define_cell_centres, point_sql
from harmonize.export.metadata import (
    ExportResult,
    describe_columns,
    kv_metadata_sql,
    provenance,
    query_schema,
    write_sidecar,
)
from harmonize.export.safe_csv import copy_safe_csv
from harmonize.export.selection import (
    BASE_VIEW,
    ExportFilters,
    duplicate_sql,
    open_selection,
    prepare_target,
)
from harmonize.sql import sql_text
from harmonize.study import Study
from harmonize.units import density_unit_sql

SUFFIXES = (".parquet", ".csv")
GROUP = ("source_kind", "cell_id", "season_year", "season", "depth_layer", "variable", "variable_kind",
         "quantity", "unit", "effort_unit")


CELL_COLUMNS = ("cell_lon", "cell_lat", "cell_x_m", "cell_y_m")


def grid_query(geometry: bool = False) -> str:
    """The SQL of the grid table over ``export_base`` (and :data:`CELL_CENTRES`, see
    :func:`harmonize.export.geo.define_cell_centres`); ``geometry`` adds the GeoParquet column."""
    group = ", ".join(GROUP)
    per_event = f"""
        SELECT {group}, source_id, event_id,
               sum(value) AS value, max(effort) AS effort, sum(density) AS density
        FROM {BASE_VIEW}
        WHERE quantity <> 'presence' AND NOT {duplicate_sql()}
        GROUP BY {group}, source_id, event_id"""
    first = GROUP[: GROUP.index("cell_id") + 1]
    rest = GROUP[GROUP.index("cell_id") + 1:]
    columns = ", ".join([*(f"g.{c}" for c in first), *(f"c.{c}" for c in CELL_COLUMNS), *(f"g.{c}" for c in rest),
                         "g.* EXCLUDE (" + ", ".join(GROUP) + ")"])
    if geometry:
        columns += f", {point_sql('c.cell_lon', 'c.cell_lat')} AS {GEOMETRY_COLUMN}"
    return f"""
        WITH per_event AS ({per_event}), summary AS (
        SELECT {group},
               CASE WHEN quantity IN ('count', 'biomass') THEN {density_unit_sql('unit', 'effort_unit')} END
                   AS density_unit,
               count(*) AS events,
               sum(effort) AS total_effort,
               avg(density) AS mean_density,
               CASE WHEN any_value(quantity) IN ('count', 'biomass')
                    THEN avg(CASE WHEN value = 0 THEN 1.0 WHEN value > 0 THEN 0.0 END) END AS share_zero,
               sum(value) AS total_value,
               avg(value) AS mean_value
        FROM per_event
        GROUP BY {group})
        SELECT {columns}
        FROM summary g LEFT JOIN {CELL_CENTRES} c ON c.cell_id = g.cell_id
        ORDER BY g.source_kind, g.variable, g.quantity, g.season_year, g.season, g.depth_layer, g.cell_id"""


def read_grid(study: Study, filters: ExportFilters | None = None,
              disclosure: Disclosure | None = None) -> pd.DataFrame:
    """The grid table as a DataFrame."""
    filters = filters or ExportFilters()
    with open_selection(study, filters, disclosure) as (con, _counts):
        define_cell_centres(con, study, BASE_VIEW)
        return con.sql(grid_query()).to_arrow_table().to_pandas()


@all_or_nothing(SUFFIXES)
def export_grid(study: Study, out: str | Path, filters: ExportFilters | None = None,
                disclosure: Disclosure | None = None) -> ExportResult:
    """Write the grid table to ``out`` (parquet or CSV by suffix) with its provenance."""
    path = prepare_target(out, SUFFIXES)
    filters = filters or ExportFilters()
    with open_selection(study, filters, disclosure) as (con, counts):
        notes = [
            "values of one event are summed over life stages before averaging",
            "densities of different source kinds and effort units are kept in separate rows",
            "presence-only records and rows flagged probable_duplicate are left out",
            "rows of events with a sensitive taxon are grouped under an empty cell_id (their cell is withheld)",
            "cell_lon, cell_lat (WGS84) and cell_x_m, cell_y_m (study CRS, metres) are the cell's centre",
        ]
        define_cell_centres(con, study, BASE_VIEW)
        options = {"cell_size_km": study.cell_size_km, "crs": study.crs}
        meta = provenance(con, study, "grid", filters, counts, options, notes)
        parquet = path.suffix.lower() == ".parquet"
        meta["columns"] = describe_columns(query_schema(con, grid_query(geometry=parquet)))
        files = [path]
        if parquet:
            target = sql_text(str(path))
            query = grid_query(geometry=True)
            n = con.execute(f"COPY ({query}) TO {target} "
                            f"(FORMAT parquet, COMPRESSION zstd, {kv_metadata_sql(meta, con, query)})"
                            ).fetchall()[0][0]
        else:
            columns, n = copy_safe_csv(con, grid_query(), path)
            files.append(write_sidecar(path, meta, columns))
    return ExportResult("grid", path, int(n), meta, files)
