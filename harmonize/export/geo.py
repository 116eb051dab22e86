"""Geometry columns of the parquet exports (GeoParquet) and the cell centres of the grid export.

DuckDB (2.0 and later) has a core ``GEOMETRY`` type: a parquet file written by ``COPY`` with a
``GEOMETRY`` column stores it as WKB and carries the ``geo`` key-value metadata of the
GeoParquet specification (version, primary column, encoding WKB, geometry types, bbox;
GeoParquet 1.0.0, Open Geospatial Consortium, https://geoparquet.org). No ``crs`` is written,
which by that specification means OGC:CRS84: longitude, latitude on WGS84, as harmonize's
positions are. Geometries are built from columns that have already passed the disclosure gate
(:mod:`harmonize.disclosure`), never from the store's own coordinates.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from harmonize.tagging import Grid, normalise_lon

#: The geometry column of GeoParquet exports.
GEOMETRY_COLUMN = "geometry"
#: Temporary table of the grid export's cell centres (cell_id, cell_lon, cell_lat, cell_x_m, cell_y_m).
CELL_CENTRES = "export_cell_centres"
_CELL_ID = r"^x-?[0-9]+_y-?[0-9]+$"


def point_sql(lon: str, lat: str) -> str:
    """SQL: a ``GEOMETRY`` point at (lon, lat), null where either is null.

    DuckDB prints a double as the shortest text that reads back to the same double, so the
    point holds exactly the coordinates of the row.
    """
    return (f"CASE WHEN {lon} IS NOT NULL AND {lat} IS NOT NULL "
            f"THEN ('POINT(' || CAST({lon} AS DOUBLE) || ' ' || CAST({lat} AS DOUBLE) || ')')::GEOMETRY END")


def define_cell_centres(con: Any, study: Any, source: str) -> int:
    """Create :data:`CELL_CENTRES` for the distinct cell ids of ``source`` (a table or view).

    The centres come from the study grid (:class:`harmonize.tagging.Grid`, the one cell
    arithmetic): ``cell_x_m, cell_y_m`` in the study CRS, ``cell_lon, cell_lat`` in WGS84.
    Returns the number of cells.
    """
    ids = con.execute(f"SELECT DISTINCT cell_id FROM {source} "
                      f"WHERE cell_id IS NOT NULL AND regexp_matches(cell_id, '{_CELL_ID}')").df()["cell_id"]
    grid = Grid(study.crs, study.cell_size_km)
    ix, iy = Grid.parse(ids.astype(str)) if len(ids) else (np.array([], np.int64), np.array([], np.int64))
    x, y = grid.cell_centres_xy(ix, iy)
    lon, lat = grid.cell_centres_lonlat(ix, iy)
    frame = pd.DataFrame({"cell_id": ids.astype(str).to_numpy(dtype=object),
                          "cell_lon": normalise_lon(np.asarray(lon, float)), "cell_lat": np.asarray(lat, float),
                          "cell_x_m": np.asarray(x, float), "cell_y_m": np.asarray(y, float)})
    con.register("_cell_centres", frame)
    con.execute(f"CREATE OR REPLACE TEMP TABLE {CELL_CENTRES} AS SELECT CAST(cell_id AS VARCHAR) AS cell_id, "
                "cell_lon, cell_lat, cell_x_m, cell_y_m FROM _cell_centres")
    con.unregister("_cell_centres")
    return len(frame)
