"""The coverage audit's two heavy aggregations, defined once; each engine implements them.

Over the *kept* rows of the store (rows not flagged ``probable_duplicate``: a volunteer twin
of another record is not a sample of its own), up to an optional last season year:

1. **events**: one row per (source_id, event_id) with the event's tags
   (:data:`EVENT_TAGS`, any of its rows' values: they are equal within an event),
   ``effort_bearing`` (any row whose quantity is not presence), ``biological`` (any taxon row)
   and ``n_vessels`` (the least over its rows);
2. **records**: the taxon rows grouped by :data:`RECORD_KEYS`, with ``records`` (rows) and
   ``encounters`` (rows whose value is above zero).

DuckDB computes them in SQL from :func:`event_aggregates_sql` and :func:`records_sql`
(:mod:`harmonize.audit.metrics`); Dask from the same lists in pandas
(:mod:`harmonize.engines.dask_engine`). The audit chooses the implementation by name
(:mod:`harmonize.audit.engines`); a golden test compares them on one input.
"""

from __future__ import annotations

#: The flag that keeps a row out of the audit's counts (set by the volunteer twin finder).
DUPLICATE_FLAG = "probable_duplicate"
#: SQL: the row counts in the audit (not a probable duplicate).
KEPT_SQL = f"NOT list_contains(coalesce(flags, []::VARCHAR[]), '{DUPLICATE_FLAG}')"
#: An event's identity.
EVENT_KEYS = ("source_id", "event_id")
#: Tags of an event (one value per event; the audit takes any of its rows' values).
EVENT_TAGS = ("source_kind", "protocol", "provider_type", "season_year", "season", "depth_layer", "cell_id",
              "stratum")
#: Per-event flags and counts beyond the tags: name -> (SQL aggregate, the pandas reduction of
#: the per-row value it aggregates).
EVENT_MEASURES = {
    "effort_bearing": ("bool_or(quantity <> 'presence')", "max"),
    "biological": ("bool_or(variable_kind = 'taxon')", "max"),
    "n_vessels": ("min(n_vessels)", "min"),
}
#: Keys of the taxon records table the encounters are counted from.
RECORD_KEYS = ("variable", "season", "depth_layer", "season_year", "source_kind", "provider_type", "source_id",
               "quantity")
#: Columns of the observation rows the two aggregations read.
INPUT_COLUMNS = ("record_id", "ingest_id", "source_id", "protocol", "provider_type", "event_id", "season",
                 "depth_layer", "cell_id", "stratum", "variable", "variable_kind", "quantity", "value", "unit",
                 "n_vessels", "flags")


def year_filter_sql(max_year: int | None) -> str:
    """SQL condition (with a leading AND) leaving out season years after ``max_year``."""
    return "" if max_year is None else f" AND season_year <= {int(max_year)}"


def event_aggregates_sql() -> str:
    """SQL select list of the per-event aggregation (to GROUP BY the event), without its keys."""
    tags = [f'any_value("{t}") AS "{t}"' for t in EVENT_TAGS]
    return ", ".join(tags + [f'{sql} AS "{name}"' for name, (sql, _) in EVENT_MEASURES.items()])


def records_sql(source: str, max_year: int | None = None) -> str:
    """SQL: the records aggregation over the observation rows of ``source`` (a table or view)."""
    keys = ", ".join(f'"{k}"' for k in RECORD_KEYS)
    return (f"SELECT {keys}, count(*) AS records, count(*) FILTER (WHERE value > 0) AS encounters "
            f"FROM {source} WHERE variable_kind = 'taxon' AND {KEPT_SQL}{year_filter_sql(max_year)} "
            f"GROUP BY {keys}")
