"""The wide table: one row per sample event, one column per taxon, plus event covariates.

This is the site x species matrix that multivariate ordination and joint species
distribution models take (e.g. Warton et al. 2015, "So many variables: joint modeling in
community ecology", Trends Ecol. Evol. 30:766-779). Rules:

- Rows are the events of the sample kinds (trawl, plankton, transect, opportunistic);
  gridded cell-periods and fishing-effort cells are not samples of organisms.
- A taxon cell holds the event's density (value / effort, summed over life stages unless
  ``by_life_stage``) for one quantity (count by default), or the plain value where the
  event has no effort (then ``effort_unit`` is null on that row).
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

import importlib
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa

from harmonize.errors import HarmonizeError
from harmonize.export.metadata import ExportResult, kv_metadata_sql, provenance, write_sidecar
from harmonize.export.safe_csv import copy_safe_csv
from harmonize.export.selection import (
    BASE_VIEW,
    SAMPLE_KINDS,
    ExportFilters,
    duplicate_sql,
    open_selection,
    prepare_target,
    sql_ident,
    sql_text,
)
from harmonize.study import Study

SUFFIXES = (".parquet", ".csv")
QUANTITIES = ("count", "biomass")
EVENT_COLUMNS = (
    "source_id", "event_id", "source_kind", "provider_type", "protocol", "event_start", "event_end",
    "year", "season_year", "season", "depth_layer", "lat", "lon", "cell_id", "stratum",
    "depth_min_m", "depth_max_m", "bottom_depth_m", "effort", "effort_unit", "log_effort",
    "detected_presence_only",
)
_COVARIATES_VIEW = "export_linked_covariates"


def _samples_sql() -> str:
    kinds = ", ".join(sql_text(k) for k in SAMPLE_KINDS)
    return f"source_kind IN ({kinds})"


def _taxon_key(by_life_stage: bool) -> str:
    return "variable || coalesce(' [' || life_stage || ']', '')" if by_life_stage else "variable"


def wide_query(con: Any, quantity: str = "count", by_life_stage: bool = False,
               covariate_columns: Sequence[str] = ()) -> tuple[str, list[str], list[str]]:
    """The SQL of the wide table over ``export_base``, its taxon columns and covariate columns.

    ``covariate_columns`` are the columns of the temporary view ``export_linked_covariates``
    (keyed by source_id, event_id) to join, when such a view was registered.
    """
    if quantity not in QUANTITIES:
        raise HarmonizeError(f"wide export quantity {quantity!r} is not one of {', '.join(QUANTITIES)}")
    dup = duplicate_sql()
    key = _taxon_key(by_life_stage)
    taxon_rows = (f"FROM {BASE_VIEW} WHERE {_samples_sql()} AND variable_kind = 'taxon' "
                  f"AND quantity = {sql_text(quantity)} AND NOT {dup}")
    taxa = [r[0] for r in con.execute(f"SELECT DISTINCT {key} AS k {taxon_rows} ORDER BY k").fetchall()]
    physical_rows = f"FROM {BASE_VIEW} WHERE {_samples_sql()} AND variable_kind = 'physical'"
    physical = [r[0] for r in con.execute(f"SELECT DISTINCT variable {physical_rows} ORDER BY 1").fetchall()]
    clash = set(taxa + physical) & set(EVENT_COLUMNS)
    if clash:
        raise HarmonizeError(f"variable name {sorted(clash)[0]!r} is also an event column of the wide table; "
                             "rename it in the taxa list or the profile")
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
               string_agg(DISTINCT variable, '|' ORDER BY variable)
                   FILTER (WHERE quantity = 'presence' AND NOT {dup}) AS detected_presence_only
        FROM {BASE_VIEW} WHERE {_samples_sql()} GROUP BY source_id, event_id"""
    parts = [f"WITH ev AS ({events})"]
    joins = []
    if taxa:
        measure = "CASE WHEN effort IS NOT NULL THEN density ELSE value END"
        parts.append(f""", tx AS (FROM (SELECT source_id, event_id, {key} AS k, sum({measure}) AS m
                                      {taxon_rows} GROUP BY ALL)
                          PIVOT (sum(m) FOR k IN ({', '.join(sql_text(t) for t in taxa)})
                                 GROUP BY source_id, event_id))""")
        joins.append("LEFT JOIN tx USING (source_id, event_id)")
    if physical:
        parts.append(f""", ph AS (FROM (SELECT source_id, event_id, variable, value {physical_rows})
                          PIVOT (avg(value) FOR variable IN ({', '.join(sql_text(p) for p in physical)})
                                 GROUP BY source_id, event_id))""")
        joins.append("LEFT JOIN ph USING (source_id, event_id)")
    if covariate_columns:
        joins.append(f"LEFT JOIN {_COVARIATES_VIEW} USING (source_id, event_id)")
    cols = [f"ev.{sql_ident(c)}" for c in EVENT_COLUMNS]
    cols += [sql_ident(c) for c in (*physical, *covariate_columns, *taxa)]
    sql = (" ".join(parts) + f" SELECT {', '.join(cols)} FROM ev {' '.join(joins)} "
           "ORDER BY ev.source_id, ev.event_start, ev.event_id")
    return sql, taxa, [*physical, *covariate_columns]


def linked_covariates(study: Study, events: pd.DataFrame, variables: Sequence[str]) -> pd.DataFrame | None:
    """Gridded values linked to sample events by :mod:`harmonize.colocate`, one column each.

    Columns are named ``gridded_<variable>``, or ``gridded_<variable>__<source_id>`` where
    several gridded sources provide a variable. Returns None when there is nothing to link
    (no gridded variables, no events, or no ``harmonize.colocate`` in this installation).
    """
    if not len(variables) or events.empty:
        return None
    try:
        module = importlib.import_module("harmonize.colocate")
    except ModuleNotFoundError as exc:
        if exc.name != "harmonize.colocate":
            raise
        return None
    long = module.colocate(study, list(variables), events)
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
        "SELECT DISTINCT variable FROM observations WHERE source_kind = 'gridded' ORDER BY 1").fetchall()]
    events = con.sql(f"""SELECT source_id, event_id, min(event_start) AS event_start, any_value(lat) AS lat,
                                any_value(lon) AS lon, any_value(cell_id) AS cell_id,
                                any_value(depth_layer) AS depth_layer
                         FROM {BASE_VIEW} WHERE {_samples_sql()} GROUP BY ALL""").to_arrow_table().to_pandas()
    linked = linked_covariates(study, events, gridded)
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
              link_gridded: bool = True) -> pd.DataFrame:
    """The wide table as a DataFrame; see the module docstring and :func:`export_wide`."""
    filters = filters or ExportFilters()
    with open_selection(study, filters) as (con, _counts):
        covariates, _notes = _resolve_covariates(con, study, covariates, link_gridded)
        extra = _register_covariates(con, covariates)
        sql, _taxa, _cov = wide_query(con, quantity, by_life_stage, extra)
        return con.sql(sql).to_arrow_table().to_pandas()


def export_wide(study: Study, out: str | Path, filters: ExportFilters | None = None, quantity: str = "count",
                by_life_stage: bool = False, covariates: pd.DataFrame | None = None,
                link_gridded: bool = True) -> ExportResult:
    """Write the wide table to ``out`` (parquet or CSV by suffix) with its provenance.

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
    """
    path = prepare_target(out, SUFFIXES)
    filters = filters or ExportFilters()
    with open_selection(study, filters) as (con, counts):
        notes = []
        covariates, linked_notes = _resolve_covariates(con, study, covariates, link_gridded)
        notes += linked_notes
        extra = _register_covariates(con, covariates)
        sql, taxa, covs = wide_query(con, quantity, by_life_stage, extra)
        dups = con.execute(f"SELECT count(*) FROM {BASE_VIEW} WHERE {_samples_sql()} AND variable_kind = 'taxon' "
                           f"AND {duplicate_sql()}").fetchall()[0][0]
        notes += [
            f"taxon columns hold {quantity} per unit effort (value / effort, in the row's effort_unit); "
            "where effort_unit is null the event has no effort and the plain value is given",
            "null = not recorded at the event; 0 = recorded or inferred absence",
            "presence-only records are not numbers: their taxa are listed in detected_presence_only",
            f"{dups} taxon rows flagged probable_duplicate were left out",
        ]
        options = {"quantity": quantity, "by_life_stage": by_life_stage, "taxon_columns": taxa,
                   "covariate_columns": covs, "rows_probable_duplicate_excluded": int(dups)}
        meta = provenance(con, study, "wide", filters, counts, options, notes)
        files = [path]
        if path.suffix.lower() == ".parquet":
            target = str(path).replace("'", "''")
            n_events = con.execute(f"COPY ({sql}) TO '{target}' "
                                   f"(FORMAT parquet, COMPRESSION zstd, {kv_metadata_sql(meta)})").fetchall()[0][0]
        else:
            columns, n_events = copy_safe_csv(con, sql, path)
            files.append(write_sidecar(path, meta, columns))
    return ExportResult("wide", path, int(n_events), meta, files)
