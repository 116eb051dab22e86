"""The long table: one row per (event, variable, quantity, life stage) with the log-effort offset.

The rows are the store's observations as they are (probable twins keep their
``probable_duplicate`` flag rather than being dropped, so the table stays complete), with
the disclosure gate applied (:mod:`harmonize.disclosure`) and ``log_effort = ln(effort)`` added: the offset of a
count or biomass model, e.g. ``glm(count ~ ... + offset(log_effort), family = poisson)``
(McCullagh and Nelder 1989, Generalized Linear Models, 2nd ed., section 6.2.3).
"""

from __future__ import annotations

import warnings
from pathlib import Path

import duckdb
import pandas as pd
import pyarrow as pa

from harmonize.disclosure import Disclosure
from harmonize.errors import HarmonizeError
from harmonize.export.atomic import all_or_nothing
from harmonize.export.geo import GEOMETRY_COLUMN, point_sql
from harmonize.export.metadata import (
    ExportResult,
    describe_columns,
    kv_metadata_sql,
    provenance,
    query_schema,
    write_sidecar,
)
from harmonize.export.safe_csv import copy_safe_csv
from harmonize.export.selection import BASE_VIEW, ExportFilters, open_selection, prepare_target
from harmonize.sql import sql_ident, sql_text
from harmonize.study import Study

SUFFIXES = (".parquet", ".csv")
ORDER = "source_id, event_start, event_id, variable, life_stage, quantity"


#: The name of the store's ``flags`` column in the long table, the API's frames and every export:
#: ``row_flags`` (``flags`` is an attribute of every pandas DataFrame, so ``frame.flags`` never
#: reached the column). The store itself keeps ``flags``.
ROW_FLAGS = "row_flags"


def _column(name: str) -> str:
    quoted = sql_ident(name)
    if name == "flags":
        warnings.warn("the long table's column 'flags' is named 'row_flags' since harmonize 0.1 (store "
                      "version 4); ask for 'row_flags'", DeprecationWarning, stacklevel=4)
        name = ROW_FLAGS
    return f'"flags" AS "{ROW_FLAGS}"' if name == ROW_FLAGS else quoted


def long_query(columns: list[str] | None = None, limit: int | None = None, ordered: bool = True,
               geometry: bool = False) -> str:
    """SELECT over ``export_base`` (optionally some columns, a row limit).

    The store's ``flags`` column comes out as ``row_flags`` (:data:`ROW_FLAGS`); asking for
    ``flags`` still works, with a DeprecationWarning.

    ``ordered`` sorts by source, time and event; file exports skip the sort (costly at
    tens of millions of rows) and keep the store's order: by source kind and season year,
    then by time and event within each stored file. ``geometry`` adds the GeoParquet point of
    the row's (already disclosed) lon/lat.
    """
    cols = ", ".join(_column(c) for c in columns) if columns else f'* RENAME ("flags" AS "{ROW_FLAGS}")'
    if geometry:
        cols += f", {point_sql('lon', 'lat')} AS {GEOMETRY_COLUMN}"
    sql = f"SELECT {cols} FROM {BASE_VIEW}" + (f" ORDER BY {ORDER}" if ordered else "")
    return sql + (f" LIMIT {int(limit)}" if limit is not None else "")


#: Integer columns become pandas' nullable Int64 (a null vessel count stays an integer column)
_NULLABLE_INTEGERS = {pa.int8(): pd.Int64Dtype(), pa.int16(): pd.Int64Dtype(), pa.int32(): pd.Int64Dtype(),
                      pa.int64(): pd.Int64Dtype()}
READERS = ("pandas", "arrow", "duckdb")


def to_pandas(table: pa.Table) -> pd.DataFrame:
    """An Arrow table as a DataFrame with nullable integers (Int64) and zone-aware UTC times."""
    return table.to_pandas(types_mapper=_NULLABLE_INTEGERS.get)


def read_long(study: Study, filters: ExportFilters | None = None, columns: list[str] | None = None,
              limit: int | None = None, disclosure: Disclosure | None = None,
              as_: str = "pandas") -> pd.DataFrame | pa.Table | duckdb.DuckDBPyRelation:
    """The long table as a DataFrame (for notebooks; use :func:`export_long` for big selections).

    Parameters
    ----------
    study
        The study whose store is read.
    filters
        Which rows; all when None.
    columns
        Which columns; all observation columns plus ``log_effort`` when None.
    limit
        At most this many rows.
    disclosure
        The disclosure rules (default: the study's; see :mod:`harmonize.disclosure`).
    as_
        ``"pandas"`` (a DataFrame with nullable integer columns), ``"arrow"`` (a pyarrow Table)
        or ``"duckdb"`` (a relation on a new in-memory DuckDB connection over that table).
    """
    if as_ not in READERS:
        raise HarmonizeError(f"as_={as_!r} is not a reader; choose one of {', '.join(READERS)}")
    filters = filters or ExportFilters()
    with open_selection(study, filters, disclosure) as (con, _counts):
        table = con.sql(long_query(columns, limit)).to_arrow_table()
    if as_ == "arrow":
        return table
    if as_ == "duckdb":
        return duckdb.connect().from_arrow(table)
    return to_pandas(table)


@all_or_nothing(SUFFIXES)
def export_long(study: Study, out: str | Path, filters: ExportFilters | None = None,
                disclosure: Disclosure | None = None) -> ExportResult:
    """Write the long table to ``out``: parquet (zstd) or CSV by the file's suffix.

    The parquet file is GeoParquet (a ``geometry`` point at each row's lon/lat, with the
    ``geo`` metadata; :mod:`harmonize.export.geo`) and carries its provenance as key-value
    metadata (key ``harmonize``); a CSV
    file gets a sidecar ``<name>-metadata.json`` and has every text cell guarded against
    formula injection (lists such as ``row_flags`` are joined with ``|``).
    """
    path = prepare_target(out, SUFFIXES)
    filters = filters or ExportFilters()
    notes = ["rows flagged probable_duplicate in row_flags (volunteer twins of another source's record) are "
             "kept with their flag; drop them before summing across sources",
             "log_effort = ln(effort); null where effort is null (presence-only, no-effort values)"]
    with open_selection(study, filters, disclosure) as (con, counts):
        meta = provenance(con, study, "long", filters, counts, notes=notes)
        parquet = path.suffix.lower() == ".parquet"
        meta["columns"] = describe_columns(query_schema(con, long_query(ordered=False, geometry=parquet)))
        files = [path]
        if parquet:
            target = sql_text(str(path))
            query = long_query(ordered=False, geometry=True)
            con.execute(f"COPY ({query}) TO {target} "
                        f"(FORMAT parquet, COMPRESSION zstd, ROW_GROUP_SIZE 500000, "
                        f"{kv_metadata_sql(meta, con, query)})")
        else:
            columns, _rows = copy_safe_csv(con, long_query(ordered=False), path)
            files.append(write_sidecar(path, meta, columns))
    return ExportResult("long", path, counts["rows_selected"], meta, files)
