"""The long table: one row per (event, variable, quantity, life stage) with the log-effort offset.

The rows are the store's observations as they are (probable twins keep their
``probable_duplicate`` flag rather than being dropped, so the table stays complete), with
the disclosure gate applied (:mod:`harmonize.disclosure`) and ``log_effort = ln(effort)`` added: the offset of a
count or biomass model, e.g. ``glm(count ~ ... + offset(log_effort), family = poisson)``
(McCullagh and Nelder 1989, Generalized Linear Models, 2nd ed., section 6.2.3).
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd

from harmonize.disclosure import Disclosure
from harmonize.export.atomic import all_or_nothing
from harmonize.export.metadata import ExportResult, kv_metadata_sql, provenance, write_sidecar
from harmonize.export.safe_csv import copy_safe_csv
from harmonize.export.selection import BASE_VIEW, ExportFilters, open_selection, prepare_target
from harmonize.study import Study

SUFFIXES = (".parquet", ".csv")
ORDER = "source_id, event_start, event_id, variable, life_stage, quantity"


def long_query(columns: list[str] | None = None, limit: int | None = None, ordered: bool = True) -> str:
    """SELECT over ``export_base`` (optionally some columns, a row limit).

    ``ordered`` sorts by source, time and event; file exports skip the sort (costly at
    tens of millions of rows) and keep the store's order: by source kind and season year,
    then by time and event within each stored file.
    """
    cols = ", ".join('"' + c.replace('"', '""') + '"' for c in columns) if columns else "*"
    sql = f"SELECT {cols} FROM {BASE_VIEW}" + (f" ORDER BY {ORDER}" if ordered else "")
    return sql + (f" LIMIT {int(limit)}" if limit is not None else "")


def read_long(study: Study, filters: ExportFilters | None = None, columns: list[str] | None = None,
              limit: int | None = None, disclosure: Disclosure | None = None) -> pd.DataFrame:
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
    """
    filters = filters or ExportFilters()
    with open_selection(study, filters, disclosure) as (con, _counts):
        return con.sql(long_query(columns, limit)).to_arrow_table().to_pandas()


@all_or_nothing(SUFFIXES)
def export_long(study: Study, out: str | Path, filters: ExportFilters | None = None,
                disclosure: Disclosure | None = None) -> ExportResult:
    """Write the long table to ``out``: parquet (zstd) or CSV by the file's suffix.

    The parquet file carries its provenance as key-value metadata (key ``harmonize``); a CSV
    file gets a sidecar ``<name>-metadata.json`` and has every text cell guarded against
    formula injection (lists such as ``flags`` are joined with ``|``).
    """
    path = prepare_target(out, SUFFIXES)
    filters = filters or ExportFilters()
    notes = ["rows flagged probable_duplicate (volunteer twins of another source's record) are kept "
             "with their flag; drop them before summing across sources",
             "log_effort = ln(effort); null where effort is null (presence-only, no-effort values)"]
    with open_selection(study, filters, disclosure) as (con, counts):
        meta = provenance(con, study, "long", filters, counts, notes=notes)
        files = [path]
        if path.suffix.lower() == ".parquet":
            target = str(path).replace("'", "''")
            con.execute(f"COPY ({long_query(ordered=False)}) TO '{target}' "
                        f"(FORMAT parquet, COMPRESSION zstd, ROW_GROUP_SIZE 500000, {kv_metadata_sql(meta)})")
        else:
            columns, _rows = copy_safe_csv(con, long_query(ordered=False), path)
            files.append(write_sidecar(path, meta, columns))
    return ExportResult("long", path, counts["rows_selected"], meta, files)
