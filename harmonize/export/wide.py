"""The wide table: one row per sample event, one column per taxon, plus event covariates.

This is the site x species matrix that multivariate ordination and joint species
distribution models take (e.g. Warton et al. 2015, "So many variables: joint modeling in
community ecology", Trends Ecol. Evol. 30:766-779). Rules:

- Rows are the events of the sample kinds (trawl, plankton, transect, opportunistic);
  gridded cell-periods and fishing-effort cells are not samples of organisms.
- A taxon column holds one quantity (count by default) in one unit, never a mix: one column
  per taxon and effort unit, named by its unit: ``"Taxon (per km2)"`` holds densities (value
  / effort, summed over life stages unless ``by_life_stage``) of events whose effort is in
  km2, ``"Taxon (per m3)"`` those in m3, ``"Taxon (per h)"`` those per hour observed; values
  sampled without effort (an incomplete checklist, seabirds in flight counted continuously)
  go to ``"Taxon (count, no effort)"`` and never into a density column. Each taxon column's
  unit is in the metadata (``taxon_units``), the CSV sidecar (CSVW ``titles``, ``unit``) and
  the parquet field metadata (key ``unit``).
- Null means "not recorded at this event"; 0 means a recorded or inferred absence
  (complete-catch protocols, ``zero_filled`` in the long table).
- Presence-only records (quantity ``presence``) never become numbers: their taxa are listed,
  as text, in ``detected_presence_only``.
- Rows flagged ``probable_duplicate`` (volunteer twins of another source's record) are left
  out of the taxon columns; their number is in the metadata.
- Physical values measured at the event (e.g. bottom temperature during a haul) become
  covariate columns (mean per event); values of gridded sources in the event's cell and
  period are linked by :mod:`harmonize.colocate` as ``gridded_<variable>`` columns (or any
  frame keyed by source_id, event_id passed as ``covariates``).
"""

from __future__ import annotations

import json
import shutil
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from harmonize import settings
from harmonize.adapters.registry import kinds_sql
from harmonize.disclosure import Disclosure
from harmonize.errors import HarmonizeError
from harmonize.export.atomic import all_or_nothing
from harmonize.export.metadata import (
    PARQUET_KEY,
    ExportResult,
    describe_columns,
    provenance,
    query_schema,
    unit_field_metadata,
    write_sidecar,
)
from harmonize.export.safe_csv import copy_safe_csv
from harmonize.export.selection import (
    BASE_VIEW,
    ExportFilters,
    bounded_memory,
    duplicate_sql,
    open_selection,
    prepare_target,
    sample_kinds,
)
from harmonize.sql import sql_ident, sql_text
from harmonize.study import Study

SUFFIXES = (".parquet", ".csv")
QUANTITIES = ("count", "biomass")
EVENT_COLUMNS = (
    "source_id", "event_id", "source_kind", "provider_type", "protocol", "event_start", "event_end",
    "year", "season_year", "season", "depth_layer", "lat", "lon", "cell_id", "stratum",
    "depth_min_m", "depth_max_m", "bottom_depth_m", "effort", "effort_unit", "log_effort",
    "detected_presence_only", "data_generalizations",
)
_COVARIATES_VIEW = "export_linked_covariates"
#: Sample rows of the selection above which the wide table is pivoted in runs (see :func:`wide_runs`).
DEFAULT_RUN_ROWS = 5_000_000
#: Environment variable overriding :data:`DEFAULT_RUN_ROWS` on the command line (:mod:`harmonize.settings`).
RUN_ROWS_ENV = settings.ENVIRONMENT["wide_run_rows"]
#: Sort key of a null season year (its rows have no start time: they sort last).
_NULL_YEAR = 2**31 - 1
#: Rows per Arrow batch when runs are streamed into one parquet file (DuckDB's row group size).
_BATCH_ROWS = 122_880


def _samples_sql() -> str:
    kinds = ", ".join(sql_text(k) for k in sample_kinds())
    return f"source_kind IN ({kinds})"


def _taxon_key(by_life_stage: bool) -> str:
    return "variable || coalesce(' [' || life_stage || ']', '')" if by_life_stage else "variable"


def _unit_sql(quantity: str) -> str:
    """SQL: the unit of a taxon row's measure: density per effort unit, or the value without effort."""
    per = "" if quantity == "count" else "kg "
    plain = "count" if quantity == "count" else "kg"
    return f"CASE WHEN density IS NOT NULL THEN '{per}per ' || effort_unit ELSE '{plain}, no effort' END"


def _column_sql(quantity: str, by_life_stage: bool) -> str:
    """SQL: the wide column of a taxon row, e.g. 'Ostravix keldensis (per km2)'."""
    return f"{_taxon_key(by_life_stage)} || ' (' || {_unit_sql(quantity)} || ')'"


def _unit_text(quantity: str, label: str) -> str:
    """The unit of a column from its label ('per km2' -> '1/km2'; 'kg per m3' -> 'kg/m3')."""
    if label.endswith(", no effort"):
        return "1" if quantity == "count" else "kg"
    return ("1/" if quantity == "count" else "kg/") + label.rsplit("per ", 1)[1]


def wide_columns(con: Any, quantity: str = "count", by_life_stage: bool = False) -> tuple[list[str], list[str]]:
    """The taxon columns (one per taxon and unit) and physical covariate columns of the wide
    table over the whole selection.

    One cheap DISTINCT query each, so that every run of a wide table pivoted in runs has the
    same columns. Raises HarmonizeError on an unknown quantity or a name clash.
    """
    if quantity not in QUANTITIES:
        raise HarmonizeError(f"wide export quantity {quantity!r} is not one of {', '.join(QUANTITIES)}")
    key = _column_sql(quantity, by_life_stage)
    taxa = [r[0] for r in con.execute(
        f"SELECT DISTINCT {key} AS k {_taxon_rows(quantity, by_life_stage)} ORDER BY k").fetchall()]
    physical = [r[0] for r in con.execute(
        f"SELECT DISTINCT variable {_physical_rows()} ORDER BY 1").fetchall()]
    clash = set(taxa + physical) & set(EVENT_COLUMNS)
    if clash:
        raise HarmonizeError(f"variable name {sorted(clash)[0]!r} is also an event column of the wide table; "
                             "rename it in the taxa list or the profile")
    return taxa, physical


def _taxon_rows(quantity: str, by_life_stage: bool, where: str = "TRUE") -> str:
    return (f"FROM {BASE_VIEW} WHERE {_samples_sql()} AND variable_kind = 'taxon' "
            f"AND quantity = {sql_text(quantity)} AND NOT {duplicate_sql()} AND ({where})")


def _physical_rows(where: str = "TRUE") -> str:
    return f"FROM {BASE_VIEW} WHERE {_samples_sql()} AND variable_kind = 'physical' AND ({where})"


def wide_sql(taxa: Sequence[str], physical: Sequence[str], covariate_columns: Sequence[str] = (),
             quantity: str = "count", by_life_stage: bool = False, where: str = "TRUE") -> str:
    """The SQL of the wide table over the rows of ``export_base`` that meet ``where``.

    ``taxa`` and ``physical`` are the columns from :func:`wide_columns`; a column whose
    variable has no row under ``where`` is null throughout. ``where`` must take whole events
    (every row of an event or none), as the runs of :func:`wide_runs` do.
    """
    dup = duplicate_sql()
    key = _column_sql(quantity, by_life_stage)
    sampled = "quantity IN ('count', 'biomass')"
    events = f"""
        SELECT source_id, event_id, any_value(source_kind) AS source_kind,
               any_value(provider_type) AS provider_type, any_value(protocol) AS protocol,
               min(event_start) AS event_start, max(event_end) AS event_end, min(year) AS year,
               any_value(season_year) AS season_year, any_value(season) AS season,
               any_value(depth_layer) AS depth_layer, any_value(lat) AS lat, any_value(lon) AS lon,
               any_value(cell_id) AS cell_id, any_value(stratum) AS stratum,
               any_value(depth_min_m) AS depth_min_m, any_value(depth_max_m) AS depth_max_m,
               any_value(bottom_depth_m) AS bottom_depth_m,
               max(effort) FILTER (WHERE {sampled}) AS effort,
               any_value(effort_unit) FILTER (WHERE {sampled} AND effort IS NOT NULL) AS effort_unit,
               max(log_effort) FILTER (WHERE {sampled}) AS log_effort,
               any_value(data_generalizations) AS data_generalizations
        FROM {BASE_VIEW} WHERE {_samples_sql()} AND ({where}) GROUP BY source_id, event_id"""
    # presence-only taxa from the (few) presence rows alone: a DISTINCT, ordered aggregate
    # over every row of the selection costs more than the rest of the event table
    presence = f"""
        SELECT source_id, event_id, string_agg(DISTINCT variable, '|' ORDER BY variable) AS detected_presence_only
        FROM {BASE_VIEW} WHERE {_samples_sql()} AND quantity = 'presence' AND NOT {dup} AND ({where})
        GROUP BY source_id, event_id"""
    parts = [f"WITH ev AS ({events}), pr AS ({presence})"]
    joins = ["LEFT JOIN pr USING (source_id, event_id)"]
    if taxa:
        # the column key carries the unit: a density and a value without effort never share one
        measure = "CASE WHEN density IS NOT NULL THEN density ELSE value END"
        parts.append(f""", tx AS (FROM (SELECT source_id, event_id, {key} AS k, sum({measure}) AS m
                                      {_taxon_rows(quantity, by_life_stage, where)} GROUP BY ALL)
                          PIVOT (sum(m) FOR k IN ({', '.join(sql_text(t) for t in taxa)})
                                 GROUP BY source_id, event_id))""")
        joins.append("LEFT JOIN tx USING (source_id, event_id)")
    if physical:
        parts.append(f""", ph AS (FROM (SELECT source_id, event_id, variable, value {_physical_rows(where)})
                          PIVOT (avg(value) FOR variable IN ({', '.join(sql_text(p) for p in physical)})
                                 GROUP BY source_id, event_id))""")
        joins.append("LEFT JOIN ph USING (source_id, event_id)")
    if covariate_columns:
        joins.append(f"LEFT JOIN {_COVARIATES_VIEW} USING (source_id, event_id)")
    cols = [f"pr.{sql_ident(c)}" if c == "detected_presence_only" else f"ev.{sql_ident(c)}" for c in EVENT_COLUMNS]
    cols += [sql_ident(c) for c in (*physical, *covariate_columns, *taxa)]
    return (" ".join(parts) + f" SELECT {', '.join(cols)} FROM ev {' '.join(joins)} "
            "ORDER BY ev.source_id, ev.event_start, ev.event_id")


def wide_run_rows(run_rows: int | None = None) -> int:
    """Selection rows per run: the number given, else the run's setting (``HARMONIZE_WIDE_RUN_ROWS``
    on the command line), else 5 million."""
    if run_rows is None:
        text = (settings.current().wide_run_rows or "").strip()
        try:
            run_rows = int(float(text)) if text else DEFAULT_RUN_ROWS
        except ValueError:
            raise HarmonizeError(f"{RUN_ROWS_ENV}={text!r} is not a number of rows; "
                                 "write a whole number such as 5000000, or unset it") from None
    if run_rows < 1:
        raise HarmonizeError(f"wide export run size {run_rows} must be at least 1 row")
    return int(run_rows)


def wide_runs(con: Any, run_rows: int | None = None) -> list[str]:
    """Conditions splitting the sample rows of ``export_base`` into runs for the pivot, in output order.

    A selection of at most ``run_rows`` sample rows is one run (``["TRUE"]``). A larger one
    is cut into consecutive stretches of (source_id, season_year) partitions of about
    ``run_rows`` rows, so that the pivot never holds the whole selection. A cut is only made
    where it cannot change the table: between two sources, or between two season years of a
    source when every event before it starts strictly before every event after it (and no
    row before it lacks a start time) and no event has rows on both sides (an event id
    repeated by two ingests of the source in different season years). Concatenating the
    runs' tables then gives the one-pass table, row for row.
    """
    run_rows = wide_run_rows(run_rows)
    groups = con.execute(f"""
        SELECT source_id, coalesce(season_year, {_NULL_YEAR}) AS y, count(*) AS n,
               min(event_start) AS t0, max(event_start) AS t1, count(*) - count(event_start) AS no_start,
               list(DISTINCT ingest_id) AS ingests
        FROM {BASE_VIEW} WHERE {_samples_sql()} GROUP BY ALL ORDER BY source_id, y""").fetchall()
    if sum(g[2] for g in groups) <= run_rows:
        return ["TRUE"]
    ingests: dict[str, set[str]] = {}
    for g in groups:
        ingests.setdefault(g[0], set()).update(g[6])
    several = sorted(s for s, ids in ingests.items() if len(ids) > 1)
    spans: dict[str, list[tuple[int, int]]] = {}
    if several:
        # events repeated across ingests of a source may sit in several season years
        for source, lo, hi in con.execute(f"""
                SELECT DISTINCT source_id, lo, hi FROM (
                    SELECT source_id, event_id, min(coalesce(season_year, {_NULL_YEAR})) AS lo,
                           max(coalesce(season_year, {_NULL_YEAR})) AS hi
                    FROM {BASE_VIEW}
                    WHERE {_samples_sql()} AND source_id IN ({', '.join(sql_text(s) for s in several)})
                    GROUP BY source_id, event_id)
                WHERE lo < hi""").fetchall():
            spans.setdefault(source, []).append((lo, hi))
    safe = _safe_cuts(groups, spans)
    runs: list[list[tuple[str, int]]] = [[]]
    rows = 0
    for i, g in enumerate(groups):
        runs[-1].append((g[0], g[1]))
        rows += g[2]
        if rows >= run_rows and safe[i] and i + 1 < len(groups):
            runs.append([])
            rows = 0
    return [_run_condition(run) for run in runs]


def _safe_cuts(groups: list[tuple[Any, ...]], spans: dict[str, list[tuple[int, int]]]) -> list[bool]:
    """For each (source, year) group: may a run end after it? (see :func:`wide_runs`)."""
    safe = [True] * len(groups)
    by_source: dict[str, list[int]] = {}
    for i, g in enumerate(groups):
        by_source.setdefault(g[0], []).append(i)
    for source, idx in by_source.items():
        # the latest start before each cut, the earliest start after it
        latest, no_start = [], []
        t_max, missing = None, False
        for i in idx:
            t1 = groups[i][4]
            t_max = t1 if t_max is None or (t1 is not None and t1 > t_max) else t_max
            missing = missing or groups[i][5] > 0
            latest.append(t_max)
            no_start.append(missing)
        earliest: list[Any] = [None] * len(idx)
        t_min = None
        for k in range(len(idx) - 1, -1, -1):
            t0 = groups[idx[k]][3]
            t_min = t0 if t_min is None or (t0 is not None and t0 < t_min) else t_min
            earliest[k] = t_min
        for k in range(len(idx) - 1):
            after = earliest[k + 1]
            before_year, after_year = groups[idx[k]][1], groups[idx[k + 1]][1]
            ordered = not no_start[k] and (after is None or latest[k] < after)
            split = any(lo <= before_year and hi >= after_year for lo, hi in spans.get(source, ()))
            safe[idx[k]] = ordered and not split
    return safe


def _run_condition(run: list[tuple[str, int]]) -> str:
    """SQL condition taking the rows of the (source_id, season-year key) groups of one run."""
    years: dict[str, list[int]] = {}
    for source, year in run:
        years.setdefault(source, []).append(year)
    parts = []
    for source, ys in years.items():
        known = [y for y in ys if y != _NULL_YEAR]
        cond = []
        if known:
            cond.append(f"season_year BETWEEN {min(known)} AND {max(known)}")
        if _NULL_YEAR in ys:
            cond.append("season_year IS NULL")
        parts.append(f"(source_id = {sql_text(source)} AND ({' OR '.join(cond)}))")
    return " OR ".join(parts)


def linked_covariates(study: Study, events: pd.DataFrame, variables: Sequence[str],
                      con: Any = None) -> pd.DataFrame | None:
    """Gridded values linked to sample events by :mod:`harmonize.colocate`, one column each.

    Columns are named ``gridded_<variable>``, or ``gridded_<variable>__<source_id>`` where
    several gridded sources provide a variable. Returns None when there is nothing to link
    (no gridded variables or no events). ``con``: the export's store connection, shared.
    """
    if not len(variables) or events.empty:
        return None
    from harmonize.colocate import colocate

    long = colocate(study, list(variables), events, con=con)
    if long.empty:
        return None
    n_sources = long.groupby("variable")["gridded_source_id"].transform("nunique")
    long = long.assign(column="gridded_" + long["variable"].astype(str)
                       + np.where(n_sources > 1, "__" + long["gridded_source_id"].astype(str), ""))
    wide = long.pivot_table(index=["source_id", "event_id"], columns="column", values="value",
                            aggfunc="first", dropna=False).reset_index()
    wide.columns.name = None
    return wide


def _resolve_covariates(con: Any, study: Study, covariates: pd.DataFrame | None,
                        link_gridded: bool) -> tuple[pd.DataFrame | None, list[str]]:
    """The covariates given, or the linked gridded values when asked; with notes for metadata."""
    if covariates is not None or not link_gridded:
        return covariates, []
    gridded = [r[0] for r in con.execute(
        f"SELECT DISTINCT variable FROM observations WHERE {kinds_sql(grid_values=True)} ORDER BY 1").fetchall()]
    events = con.sql(f"""SELECT source_id, event_id, min(event_start) AS event_start, any_value(lat) AS lat,
                                any_value(lon) AS lon, any_value(cell_id) AS cell_id,
                                any_value(depth_layer) AS depth_layer
                         FROM {BASE_VIEW} WHERE {_samples_sql()} GROUP BY ALL""").to_arrow_table().to_pandas()
    linked = linked_covariates(study, events, gridded, con)
    if linked is None:
        return None, ["no gridded values were linked to events (no gridded variables in the store, "
                      "or harmonize.colocate is not installed)"]
    return linked, ["gridded_* columns: values of gridded sources in the event's cell and period "
                    "(harmonize.colocate); null where the cell had no valid value"]


def _register_covariates(con: Any, covariates: pd.DataFrame | None) -> list[str]:
    if covariates is None or covariates.empty:
        return []
    missing = {"source_id", "event_id"} - set(covariates.columns)
    if missing:
        raise HarmonizeError(f"linked covariates need the columns source_id and event_id; missing {sorted(missing)}")
    extra = [c for c in covariates.columns if c not in ("source_id", "event_id")]
    clash = [c for c in extra if c in EVENT_COLUMNS]
    if clash:
        raise HarmonizeError(f"linked covariate column {clash[0]!r} is also an event column; rename it")
    con.register("_linked", pa.Table.from_pandas(covariates, preserve_index=False))
    con.execute(f"CREATE OR REPLACE TEMP VIEW {_COVARIATES_VIEW} AS SELECT * FROM _linked")
    return extra


def read_wide(study: Study, filters: ExportFilters | None = None, quantity: str = "count",
              by_life_stage: bool = False, covariates: pd.DataFrame | None = None,
              link_gridded: bool = True, memory_limit: str | None = None,
              run_rows: int | None = None, disclosure: Disclosure | None = None) -> pd.DataFrame:
    """The wide table as a DataFrame; see the module docstring and :func:`export_wide`."""
    filters = filters or ExportFilters()
    with open_selection(study, filters, disclosure) as (con, _counts), bounded_memory(con, memory_limit):
        covariates, _notes = _resolve_covariates(con, study, covariates, link_gridded)
        extra = _register_covariates(con, covariates)
        taxa, physical = wide_columns(con, quantity, by_life_stage)
        tables = [con.sql(wide_sql(taxa, physical, extra, quantity, by_life_stage, where)).to_arrow_table()
                  for where in wide_runs(con, run_rows)]
        return pa.concat_tables(tables).to_pandas()


@all_or_nothing(SUFFIXES)
def export_wide(study: Study, out: str | Path, filters: ExportFilters | None = None, quantity: str = "count",
                by_life_stage: bool = False, covariates: pd.DataFrame | None = None,
                link_gridded: bool = True, memory_limit: str | None = None,
                run_rows: int | None = None, disclosure: Disclosure | None = None) -> ExportResult:
    """Write the wide table to ``out`` (parquet or CSV by suffix) with its provenance.

    DuckDB works within ``memory_limit`` and spills to a folder beside the output (deleted
    afterwards; never inside the store). A selection of more than ``run_rows`` sample rows is pivoted
    in runs of consecutive season years per source (:func:`wide_runs`), each run written to
    the file in turn: the file is the same as a one-pass export, row for row and column for
    column, but the pivot never holds the whole selection.

    Parameters
    ----------
    study
        The study whose store is read.
    out
        Target file, ``.parquet`` or ``.csv``.
    filters
        Which observation rows.
    quantity
        ``count`` (default) or ``biomass``: the quantity in the taxon columns.
    by_life_stage
        One column per taxon and life stage (``"Taxon [larva]"``) instead of one per taxon.
    covariates
        Extra event covariates keyed by source_id, event_id (e.g. linked gridded values).
    link_gridded
        Link the values of every gridded variable in the store to the events (through
        ``harmonize.colocate``) when no ``covariates`` are given.
    memory_limit
        DuckDB's working memory, as DuckDB writes sizes (``"2GB"``, ``"512MB"``); default
        the environment variable ``HARMONIZE_EXPORT_MEMORY_LIMIT``, else ``"2GB"``.
    run_rows
        Sample rows per run of the pivot; default ``HARMONIZE_WIDE_RUN_ROWS``, else 5 million.
    disclosure
        The disclosure rules (default: the study's; see :mod:`harmonize.disclosure`).
    """
    path = prepare_target(out, SUFFIXES)
    filters = filters or ExportFilters()
    with open_selection(study, filters, disclosure) as (con, counts), \
            bounded_memory(con, memory_limit, beside=path) as spill:
        notes = []
        covariates, linked_notes = _resolve_covariates(con, study, covariates, link_gridded)
        notes += linked_notes
        extra = _register_covariates(con, covariates)
        taxa, physical = wide_columns(con, quantity, by_life_stage)
        covs = [*physical, *extra]
        runs = [wide_sql(taxa, physical, extra, quantity, by_life_stage, where) for where in wide_runs(con, run_rows)]
        dups = con.execute(f"SELECT count(*) FROM {BASE_VIEW} WHERE {_samples_sql()} AND variable_kind = 'taxon' "
                           f"AND {duplicate_sql()}").fetchall()[0][0]
        units = {t: _unit_text(quantity, t[t.rindex("(") + 1:-1]) for t in taxa}
        covariate_units = _covariate_units(con, physical, extra)
        notes += [
            f"one column per taxon and unit: 'Taxon (per km2)' holds {quantity} per unit effort (value / effort) of "
            "events whose effort is in km2, and so on for each effort unit; 'Taxon (count, no effort)' (or kg) holds "
            "values sampled without effort, which never enter a density column; each column's unit is in "
            "options.taxon_units",
            "null = not recorded at the event; 0 = recorded or inferred absence",
            "presence-only records are not numbers: their taxa are listed in detected_presence_only",
            f"{dups} taxon rows flagged probable_duplicate were left out",
        ]
        options = {"quantity": quantity, "by_life_stage": by_life_stage, "taxon_columns": taxa, "taxon_units": units,
                   "covariate_columns": covs, "rows_probable_duplicate_excluded": int(dups)}
        meta = provenance(con, study, "wide", filters, counts, options, notes)
        # every column with its unit (the taxon columns' from their labels, the event columns' fixed)
        meta["columns"] = describe_columns(query_schema(con, runs[0]), {**covariate_units, **units})
        files = [path]
        if path.suffix.lower() == ".parquet":
            # written by Arrow in every case, so that each field carries its unit
            n_events = _write_parquet_runs(con, runs, path, meta, spill, {**covariate_units, **units})
        else:
            columns, n_events = _write_csv_runs(con, runs, path, spill)
            files.append(write_sidecar(path, meta, columns, {**covariate_units, **units}))
    return ExportResult("wide", path, int(n_events), meta, files)


def _covariate_units(con: Any, physical: Sequence[str], extra: Sequence[str]) -> dict[str, str]:
    """Units of the physical columns (the store's unit of the variable) and of the linked
    ``gridded_<variable>[__<source>]`` columns (the gridded variable's unit); covariates a
    caller gives have no unit harmonize knows."""
    rows = con.execute(f"""SELECT variable, {kinds_sql(grid_values=True)} AS gridded,
                                  string_agg(DISTINCT unit, ' or ' ORDER BY unit) AS unit
                           FROM observations WHERE variable_kind = 'physical' AND unit IS NOT NULL
                           GROUP BY ALL""").fetchall()
    own = {v: u for v, g, u in rows if not g}
    grid = {v: u for v, g, u in rows if g}
    out = {p: own[p] for p in physical if p in own}
    for column in extra:
        variable = column.removeprefix("gridded_").split("__", 1)[0]
        if column.startswith("gridded_") and variable in grid:
            out[column] = grid[variable]
    return out


def _write_parquet_runs(con: Any, runs: list[str], path: Path, meta: dict[str, Any], spill: Path,
                        units: dict[str, str] | None = None) -> int:
    """Write the runs' tables, in order, into one zstd parquet file carrying ``meta`` and each
    taxon field's unit (field metadata ``unit``); returns rows."""
    # the column types DuckDB's own parquet writer gives the table, so that the file reads
    # back exactly as a one-pass export (written by DuckDB) does
    probe = spill / "schema.parquet"
    con.execute(f"COPY (SELECT * FROM ({runs[0]}) LIMIT 0) TO '{str(probe).replace(chr(39), chr(39) * 2)}' "
                "(FORMAT parquet)")
    schema = pq.read_schema(probe).remove_metadata()
    probe.unlink()
    # the event keys are required by the contract; a one-pass COPY marks them so (from the
    # store's statistics), an empty probe cannot
    for key in ("source_id", "event_id"):
        i = schema.get_field_index(key)
        schema = schema.set(i, schema.field(i).with_nullable(False))
    schema = unit_field_metadata(schema, units)
    n = 0
    with pq.ParquetWriter(path, schema.with_metadata({PARQUET_KEY: json.dumps(meta, default=str)}),
                          compression="zstd", compression_level=3) as writer:   # DuckDB's zstd level
        for sql in runs:
            reader = con.sql(sql).to_arrow_reader(_BATCH_ROWS)
            for batch in reader:
                if not batch.schema.equals(schema, check_metadata=True):
                    batch = pa.RecordBatch.from_arrays(batch.columns, schema=schema) \
                        if batch.schema.equals(schema) else batch.cast(schema)
                writer.write_batch(batch)
                n += batch.num_rows
    return n


def _write_csv_runs(con: Any, runs: list[str], path: Path, spill: Path) -> tuple[list[tuple[str, str]], int]:
    """Write the runs' tables, in order, into one guarded CSV file; returns its columns and rows."""
    if len(runs) == 1:
        return copy_safe_csv(con, runs[0], path)
    n = 0
    columns: list[tuple[str, str]] = []
    part = spill / "run.csv"
    with path.open("wb") as out:
        for i, sql in enumerate(runs):
            columns, rows = copy_safe_csv(con, sql, part, header=(i == 0))
            n += rows
            with part.open("rb") as src:
                shutil.copyfileobj(src, out, 2**20)
            part.unlink()
    return columns, n
