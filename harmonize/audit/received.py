"""What the store received and from where: the annual report's accounting tables.

Read from the store's bookkeeping tables (``ingests``, ``ingest_files``, ``quarantine``,
``quarantine_summary``, ``store_flags``), which are small, and one pass over the events for
the effort totals. Only live ingests (status ``complete``) are counted; superseded ones are
counted apart in the provenance.
"""

from __future__ import annotations

from dataclasses import dataclass

import duckdb
import pandas as pd

from harmonize.adapters.registry import kinds
from harmonize.audit.metrics import _KEPT, DUPLICATE_FLAG, _year_filter
from harmonize.disclosure import Disclosure
from harmonize.store import has_table


def effort_total_excluded() -> tuple[str, ...]:
    """Kinds whose effort is no sampling effort worth a yearly total (gridded pixel area)."""
    return kinds(sums_effort=False)



@dataclass
class Received:
    """Tables for the report's "Data received", "Provenance" and "Effort" sections."""

    #: Per source: ingests, files, rows read / accepted / quarantined, masked values, twins.
    by_source: pd.DataFrame
    #: Per source and reason code: quarantined rows and bulk-masked values (grids, pings).
    reasons: pd.DataFrame
    #: Per live ingest: source, when, files, configuration and input hashes.
    ingests: pd.DataFrame
    #: Superseded ingests (re-ingested since), not counted anywhere.
    superseded: int
    #: Store metadata (contract version, created_by ...).
    store_meta: dict[str, str]
    #: Effort per source kind, season year and unit (one value per event, summed).
    effort: pd.DataFrame


def received(con: duckdb.DuckDBPyConnection, max_year: int | None = None, rules: Disclosure | None = None
             ) -> Received:
    """The accounting tables of a store connection (see :class:`Received`)."""
    live = "status = 'complete'"
    by_source = con.execute(
        f"""WITH i AS (SELECT * FROM ingests WHERE {live}),
                 files AS (SELECT i.source_id, count(DISTINCT f.file_sha256) AS files
                           FROM ingest_files f JOIN i USING (ingest_id) GROUP BY ALL),
                 masked AS (SELECT i.source_id, sum(m.n_values)::BIGINT AS masked_values
                            FROM quarantine_summary m JOIN i USING (ingest_id) GROUP BY ALL),
                 flagged AS (SELECT i.source_id, count(DISTINCT f.record_id) AS twins
                             FROM store_flags f JOIN i USING (ingest_id)
                             WHERE f.flag = '{DUPLICATE_FLAG}' GROUP BY ALL)
            SELECT i.source_id, any_value(i.source_kind) AS source_kind,
                   any_value(i.provider_type) AS provider_type, count(*) AS ingests,
                   coalesce(any_value(files.files), 0) AS files,
                   sum(i.rows_read)::BIGINT AS rows_read, sum(i.rows_accepted)::BIGINT AS rows_accepted,
                   sum(i.rows_quarantined)::BIGINT AS rows_quarantined,
                   coalesce(any_value(masked.masked_values), 0)::BIGINT AS masked_values,
                   sum(i.records_written)::BIGINT AS records_written,
                   coalesce(any_value(flagged.twins), 0)::BIGINT AS twins
            FROM i LEFT JOIN files USING (source_id) LEFT JOIN masked USING (source_id)
                   LEFT JOIN flagged USING (source_id)
            GROUP BY i.source_id ORDER BY source_kind, i.source_id"""
    ).df()
    reasons = con.execute(
        f"""WITH i AS (SELECT ingest_id, source_id FROM ingests WHERE {live}),
                 rows AS (SELECT i.source_id, q.reason_code, count(*)::BIGINT AS rows
                          FROM quarantine q JOIN i USING (ingest_id) GROUP BY ALL),
                 vals AS (SELECT i.source_id, m.reason_code, sum(m.n_values)::BIGINT AS masked_values
                          FROM quarantine_summary m JOIN i USING (ingest_id) GROUP BY ALL)
            SELECT source_id, reason_code, coalesce(rows.rows, 0)::BIGINT AS rows,
                   coalesce(vals.masked_values, 0)::BIGINT AS masked_values
            FROM rows FULL JOIN vals USING (source_id, reason_code) ORDER BY ALL"""
    ).df()
    ingests = con.execute(
        f"""SELECT i.ingest_id, i.source_id, i.started_at, i.config_sha256, i.inputs_sha256, i.tool_version,
                   list_sort(list_distinct(list(f.file_name))) AS files
            FROM ingests i LEFT JOIN ingest_files f USING (ingest_id)
            WHERE i.{live} GROUP BY ALL ORDER BY i.started_at"""
    ).df()
    superseded = int(con.execute(f"SELECT count(*) FROM ingests WHERE NOT ({live})").fetchall()[0][0])
    meta = (dict(con.execute("SELECT key, value FROM store_meta").fetchall())
            if has_table(con, "store_meta") else {})
    excluded = ", ".join(f"'{k}'" for k in effort_total_excluded()) or "''"
    if has_table(con, "audit_cells") and con.execute(
            "SELECT count(*) FILTER (WHERE effort_unit IS NOT NULL) FROM audit_cells").fetchall()[0][0]:
        # the audit's event pass already holds one effort value per event: no second pass
        events = f"""SELECT source_kind, season_year, effort_unit, n, effort_total AS effort FROM audit_cells
                     WHERE effort_total IS NOT NULL AND effort_unit IS NOT NULL AND season_year IS NOT NULL
                           AND source_kind NOT IN ({excluded})"""
    else:  # (the Dask engine's event table carries no effort) one pass over the events
        # a confidential fishing row is withheld whole (harmonize.disclosure): in no total either
        confidential = (rules or Disclosure()).confidential_sql()
        events = f"""SELECT * FROM (
                     SELECT any_value(source_kind) AS source_kind, any_value(season_year) AS season_year,
                            any_value(effort_unit) AS effort_unit, 1 AS n, any_value(effort) AS effort,
                            min(n_vessels) AS n_vessels
                     FROM observations
                     WHERE effort IS NOT NULL AND effort_unit IS NOT NULL AND season_year IS NOT NULL
                           AND source_kind NOT IN ({excluded}) AND {_KEPT}{_year_filter(max_year)}
                     GROUP BY hash(source_id, event_id)) WHERE NOT {confidential}"""
    effort = con.execute(
        f"""SELECT source_kind, CAST(season_year AS INTEGER) AS season_year, effort_unit,
                   sum(n)::BIGINT AS events, sum(effort) AS effort
            FROM ({events}) GROUP BY ALL ORDER BY ALL"""
    ).df()
    return Received(by_source, reasons, ingests, superseded, meta, effort)
