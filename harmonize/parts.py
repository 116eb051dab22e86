"""Values that span files: stored as mergeable parts, read as one merged row per value.

A source is a series of files. A gridded product delivered as yearly files has winter 2020
in two of them (December 2019 in the first, January and February 2020 in the second); daily
ping files put one cell and season's fishing in hundreds of files. Each ingest (one file)
therefore writes, for every value it touches, its *part* of that value, and the store's
``observations`` view merges the parts of all live (complete, not superseded) ingests of the
source into one row per (source, record_id):

gridded (area-weighted mean per cell, period and layer)
    each part carries ``part_sum`` = sum(w_i x_i), ``part_weight`` = sum(w_i) (valid pixel
    area times level thickness) and ``part_steps`` = time steps of the period in the file
    times the layer's total level thickness; the merged value is
    sum(part_sum) / sum(part_weight), the merged effort (valid area per time step)
    sum(part_weight) over the steps of the period in all live files of the source (a file
    counts its steps for every cell, valid or not, as a single file does), n_values the sum.
    A measurement is never summed. A file in which every cell of a period is masked writes
    no part, so its steps of that period are not counted (one file would count them).
effort (fishing hours per cell, season, gear and layer)
    hours add up; ``vessel_ids`` holds the (salted, pseudonymous) vessels behind a part, and
    the merged n_vessels counts the distinct vessels of the union, so the rule of three is
    judged per cell-period, not per file.

A value with a single part reads exactly as written. Parquet files written before the parts
existed lack these columns (they read as null): their parts merge weighted by their count of
values (gridded; exact when the pixels of a cell have equal areas) and their n_vessels by the
largest part (effort; a lower bound, so suppression errs on the safe side). Re-ingest them
with ``--replace`` for exact merges. Other source kinds pass through unchanged.
"""

from __future__ import annotations

import duckdb

from harmonize.contract import observation_sql_columns


def merged_kinds() -> tuple[str, ...]:
    """Kinds whose values span files and are merged across ingests (``Adapter.merges_parts``)."""
    from harmonize.adapters.registry import kinds  # the adapters' class attributes say which

    return kinds(merges_parts=True)


def _kinds_sql() -> str:
    return ", ".join("'" + k.replace("'", "''") + "'" for k in merged_kinds())

#: The part columns (name, DuckDB type), written to parquet beside the contract's columns.
PART_COLUMNS = (
    ("part_sum", "DOUBLE"),
    ("part_weight", "DOUBLE"),
    ("part_steps", "DOUBLE"),
    ("vessel_ids", "VARCHAR[]"),
)


def merged_sql(parts: str) -> str:
    """SELECT of one row per value from the view ``parts`` (contract columns, then the parts).

    Rows of kinds other than :func:`merged_kinds` pass through; rows of those kinds are
    grouped by source and record_id (the record id hashes source, event, variable, life stage,
    quantity and behaviour, and no ingest or file) and merged as the module docstring says.
    """
    types = dict(observation_sql_columns())
    cols = list(types)
    kinds = _kinds_sql()
    single = "count(*) = 1"
    weighted = "count(part_weight) = count(*) AND sum(part_weight) > 0"
    exprs = {
        "record_id": "record_id",
        "source_id": "source_id",
        "source_kind": "source_kind",
        # one ingest of those merged (the smallest id); observation_parts lists them all
        "ingest_id": "min(ingest_id)",
        "value": f"""CASE WHEN source_kind = 'effort' THEN sum(value)
                          WHEN {weighted} THEN sum(part_sum) / sum(part_weight)
                          WHEN {single} THEN min(value)
                          ELSE sum(value * n_values) / nullif(sum(n_values), 0) END""",
        "effort": f"""CASE WHEN source_kind = 'effort' THEN sum(effort)
                           WHEN {weighted} AND count(period_steps) = count(*) THEN sum(part_weight) / min(period_steps)
                           WHEN {single} THEN min(effort)
                           ELSE sum(effort * n_values) / nullif(sum(n_values), 0) END""",
        "density": f"CASE WHEN {single} THEN min(density) END",
        "density_unit": f"CASE WHEN {single} THEN min(density_unit) END",
        "zero_filled": "bool_or(zero_filled)",
        "n_values": "sum(n_values)",
        "n_vessels": f"""CASE WHEN {single} THEN min(n_vessels)
                              WHEN count(vessel_ids) = count(*) THEN len(list_distinct(flatten(list(vessel_ids))))
                              ELSE max(n_vessels) END""",
        "flags": "list_sort(list_distinct(flatten(list(flags))))",
        "source_record_rows": "list_sort(flatten(list(source_record_rows)))",
        "source_file": """CASE WHEN count(DISTINCT source_file) <= 1 THEN min(source_file)
                               ELSE min(source_file) || ' and ' || (count(DISTINCT source_file) - 1)
                                    || ' more file' || CASE WHEN count(DISTINCT source_file) > 2 THEN 's' ELSE '' END
                          END""",
    }
    for c in cols:
        exprs.setdefault(c, f'min("{c}")')
    plain = ", ".join(f'"{c}"' for c in cols)
    if not kinds:
        return f"SELECT {plain} FROM {parts}"
    merged = ", ".join(f'CAST({exprs[c]} AS {types[c]}) AS "{c}"' for c in cols)
    # time steps of each period in the live files of a gridded source: every cell of a file
    # has its file's steps, whether or not the cell had a valid value in them
    key = "source_id, variable, depth_layer, event_start"
    steps = (f"SELECT {key}, sum(steps) AS period_steps FROM (SELECT {key}, ingest_id, max(part_steps) AS steps "
             f"FROM {parts} WHERE source_kind = 'gridded' GROUP BY ALL) GROUP BY ALL")
    joined = (f"SELECT p.*, s.period_steps FROM {parts} p LEFT JOIN ({steps}) s "
              "ON p.source_kind = 'gridded' AND s.source_id = p.source_id AND s.variable = p.variable "
              "AND s.depth_layer = p.depth_layer AND s.event_start = p.event_start "
              f"WHERE p.source_kind IN ({kinds})")
    return (f"SELECT {plain} FROM {parts} WHERE source_kind NOT IN ({kinds}) UNION ALL "
            f"SELECT {merged} FROM ({joined}) GROUP BY source_kind, source_id, record_id")


def ingests_behind(con: duckdb.DuckDBPyConnection, where: str) -> list[str]:
    """Every ingest whose parts went into the merged rows of ``observations`` selected by ``where``.

    The merged row names one ingest; the provenance of an export lists them all.
    """
    kinds = _kinds_sql()
    if not kinds:
        return []
    rows = con.execute(
        f"""SELECT DISTINCT p.ingest_id FROM observation_parts p
            SEMI JOIN (SELECT source_id, record_id FROM observations
                       WHERE source_kind IN ({kinds}) AND ({where})) s
              ON p.source_id = s.source_id AND p.record_id = s.record_id
            ORDER BY 1"""
    ).fetchall()
    return [r[0] for r in rows]
