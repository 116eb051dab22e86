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

ping tracks that cross file boundaries
    a vessel's track delivered as daily (or any) files is one track: the last ping of one
    file and the first of the next form an interval. A ping's hours depend only on the pings
    up to ``harmonize.tracks.RADIUS`` places from it (neighbours, position jumps, derived
    speed). Each ping file writes its parts as a lone file gives them (hours and pings of all
    its pings; ``vessel_ids`` and the ``speed_derived`` flag of its *interior* pings only,
    those more than RADIUS places from both ends of their vessel's part of the file), and
    keeps in the ``ping_edges`` table the :data:`harmonize.tracks.EDGE` pings at both ends of
    each vessel's part (the *owned* ones, within RADIUS of an end, with the hours the file
    gave them, and the pings beyond them they depend on), and in ``ping_edge_parts`` the rows
    (0 hours) of the cell-periods the owned ones lie in. The view orders the edge pings of
    all live ingests of the source per vessel by time, applies the track rules of
    :mod:`harmonize.tracks` to them (the gap cap, the speed window and the jump rule exactly
    as within a file, each ping with its file's settings), and adds one more part per
    cell-period: the joined track's hours and pings of the owned pings minus those their
    files gave them, with the joined track's vessels and flag. Cell-periods left with no
    hours are not shown. The same pings as one file or as many files cut by time or by
    vessel, in any row and ingest order, give the same hours, pings and vessel counts;
    ``--replace`` and superseding change the edges with the ingest. A ping that two files
    both hold (the same vessel and time) is counted once. Tracks of one vessel whose files
    overlap in time are joined only at the files' edges (each file's interior is its own);
    the ingest says so (:func:`overlapping_tracks`).

A value with a single part reads exactly as written. Parquet files written before the parts
existed lack these columns (they read as null): their parts merge weighted by their count of
values (gridded; exact when the pixels of a cell have equal areas) and their n_vessels by the
largest part (effort; a lower bound, so suppression errs on the safe side). Re-ingest them
with ``--replace`` for exact merges. Other source kinds pass through unchanged.
"""

from __future__ import annotations

from collections.abc import Mapping

import duckdb
import pyarrow as pa

from harmonize.contract import observation_sql_columns
from harmonize.sql import sql_in
from harmonize.tracks import track_sql

#: How the parts of a source's values merge (``ingests.merge_rule``, recorded at commit from
#: what the pipeline says of the ingest's source kind, so that the store needs no knowledge
#: of source kinds): the parts add up (fishing hours), or their area-weighted mean (a grid's
#: cell value), or the rows pass through as written (NONE). NULL: not recorded (an ingest
#: committed before store version 7), read from its part files (:func:`rules_from_parts`).
SUM = "sum"
MEAN = "mean"
NONE = "none"
MERGE_RULES = (SUM, MEAN)


def merge_rule(merges_parts: bool, parts_add_up: bool) -> str:
    """The ``ingests.merge_rule`` of an ingest whose source kind merges parts or not (see above)."""
    if not merges_parts:
        return NONE
    return SUM if parts_add_up else MEAN


def merge_rules(con: duckdb.DuckDBPyConnection) -> dict[str, str]:
    """source_kind -> merge rule (SUM or MEAN; kinds whose rows pass through are left out).

    A rule is recorded per ingest and applies to every ingest of its kind: the latest one
    recorded, as the kind's adapter says it now. A kind none of whose ingests has a rule
    recorded (a store written before version 7, read before its first writer upgrades it) takes
    the rule its part files show (:func:`rules_from_parts`).
    """
    known = con.execute("SELECT count(*) FROM duckdb_columns() WHERE table_name = 'ingests' "
                        "AND column_name = 'merge_rule'").fetchall()[0][0]
    rows = con.execute("SELECT source_kind, arg_max(merge_rule, started_at) FROM ingests "
                       "WHERE merge_rule IS NOT NULL GROUP BY ALL ORDER BY ALL").fetchall() if known else []
    recorded = {kind: rule for kind, rule in rows}
    unrecorded = con.execute(
        "SELECT DISTINCT source_kind FROM ingests WHERE status = 'complete'"
        + (" AND merge_rule IS NULL" if known else "") + " ORDER BY 1").fetchall()
    legacy = [k for (k,) in unrecorded if k not in recorded]
    if legacy:
        inferred = rules_from_parts(con, f"i.status = 'complete' AND {sql_in('i.source_kind', legacy)}")
        for ingest_kind, rule in inferred.values():
            if rule != NONE:
                recorded.setdefault(ingest_kind, rule)
    return {kind: rule for kind, rule in recorded.items() if rule in MERGE_RULES}


def rules_from_parts(con: duckdb.DuckDBPyConnection, where: str) -> dict[str, tuple[str, str]]:
    """ingest_id -> (source_kind, merge rule) read from the footers of the ingests' part files
    (``where`` selects rows of ``ingests i``): the pipeline writes the part columns only when
    the adapter gives them, the area-weighted parts (``part_weight``) for values that merge as a
    mean and the vessel lists (``vessel_ids``) for fishing hours, which add up; files with
    neither pass through (so do the files of a store written before values were stored in
    parts, as they did then). Footers only: no data page is read."""
    files = con.execute(
        f"""SELECT f.ingest_id, i.source_kind, f.path FROM observation_files f JOIN ingests i USING (ingest_id)
            WHERE {where} ORDER BY f.path""").fetchall()
    rules = {ingest: (kind, NONE) for ingest, kind, _ in files}
    if not files:
        return rules
    # the manifest's paths are relative to the store folder, the connection's file_search_path;
    # named in full (a folder name with glob characters is not globbed in a full path)
    folder = con.execute("SELECT current_setting('file_search_path')").fetchall()[0][0] or ""
    full = {path: (f"{folder.rstrip('/')}/{path}" if folder else path) for _, _, path in files}
    shown = con.execute(
        """SELECT file_name,
                  bool_or(path_in_schema = 'part_weight') AS mean,
                  bool_or(starts_with(path_in_schema, 'vessel_ids')) AS sum
           FROM parquet_metadata(?::VARCHAR[]) GROUP BY ALL""", [list(full.values())]).fetchall()
    by_file = {name: (mean, add) for name, mean, add in shown}
    for ingest, kind, path in files:
        mean, add = by_file.get(full[path], (False, False))
        if add:
            rules[ingest] = (kind, SUM)
        elif mean and rules[ingest][1] != SUM:
            rules[ingest] = (kind, MEAN)
    return rules


def _kinds(rules: Mapping[str, str], *chosen: str) -> tuple[str, ...]:
    return tuple(kind for kind, rule in rules.items() if rule in chosen)

#: Merged fishing hours at or below this are a cell-period with no fishing (the parts and
#: the joined edges cancel up to rounding); 1e-9 h is 3.6 microseconds.
ZERO_HOURS = 1e-9

#: The part columns (name, DuckDB type), written to parquet beside the contract's columns.
PART_COLUMNS = (
    ("part_sum", "DOUBLE"),
    ("part_weight", "DOUBLE"),
    ("part_steps", "DOUBLE"),
    ("vessel_ids", "VARCHAR[]"),
)


#: The ``ping_edges`` table: the pings at the edges of each vessel's part of a ping file;
#: ``file_hours`` is what an owned one counted for in its file's part (0 when not fishing).
EDGE_COLUMNS = (
    ("ingest_id", "VARCHAR NOT NULL"), ("source_id", "VARCHAR NOT NULL"), ("vessel", "VARCHAR NOT NULL"),
    ("t", "TIMESTAMP NOT NULL"), ("lat", "DOUBLE"), ("lon", "DOUBLE"), ("sog", "DOUBLE"), ("smin", "DOUBLE"),
    ("smax", "DOUBLE"), ("max_speed_kn", "DOUBLE"), ("max_gap_h", "DOUBLE"), ("source_row", "BIGINT"),
    ("owned", "BOOLEAN"), ("file_hours", "DOUBLE"), ("event_id", "VARCHAR"),
)
EDGES_TABLE = "ping_edges"
#: Observation rows (0 hours) of the cell-periods the owned edge pings of a file lie in: the
#: tags of the parts the view adds for them.
EDGE_PARTS_TABLE = "ping_edge_parts"


def ensure_tables(con: duckdb.DuckDBPyConnection) -> None:
    """Create the ``ping_edges`` and ``ping_edge_parts`` tables in a store opened for writing."""
    con.execute(f"CREATE TABLE IF NOT EXISTS {EDGES_TABLE} ("
                + ", ".join(f'"{c}" {t}' for c, t in EDGE_COLUMNS) + ")")
    cols = list(observation_sql_columns()) + list(PART_COLUMNS)
    con.execute(f"CREATE TABLE IF NOT EXISTS {EDGE_PARTS_TABLE} ("
                + ", ".join(f'"{c}" {t}' for c, t in cols) + ")")


def record_edges(con: duckdb.DuckDBPyConnection, ingest_id: str, source_id: str, edges: pa.Table,
                 templates: pa.Table | None) -> None:
    """Insert one ingest's edge pings (:data:`EDGE_COLUMNS` but the ids; ``row`` for source_row)
    and the observation rows of their cell-periods (``templates``)."""
    con.register("_incoming_edges", edges)
    try:
        names = [c for c, _ in EDGE_COLUMNS[2:]]
        select = ", ".join("row" if c == "source_row" else f'"{c}"' for c in names)
        con.execute(f"INSERT INTO {EDGES_TABLE} (ingest_id, source_id, {', '.join(names)}) "
                    f"SELECT ?, ?, {select} FROM _incoming_edges", [ingest_id, source_id])
    finally:
        con.unregister("_incoming_edges")
    if templates is not None and templates.num_rows:
        con.register("_incoming_templates", templates)
        try:
            con.execute(f"INSERT INTO {EDGE_PARTS_TABLE} BY NAME SELECT * FROM _incoming_templates")
        finally:
            con.unregister("_incoming_templates")


def overlapping_tracks(con: duckdb.DuckDBPyConnection, source_id: str, ingest_id: str) -> str | None:
    """A note when vessels of this ingest have pings within the time span of the same vessels'
    pings in other live files of the source (files that overlap in time, not a cut by time):
    those tracks are joined only at the files' edges. None when there is none."""
    rows = con.execute(f"""
        WITH seg AS (SELECT e.ingest_id, e.vessel, min(e.t) AS t0, max(e.t) AS t1
                     FROM {EDGES_TABLE} e JOIN ingests i USING (ingest_id)
                     WHERE i.status = 'complete' AND e.source_id = ? GROUP BY ALL)
        SELECT count(DISTINCT a.vessel), list_sort(list(DISTINCT i.file_name))
        FROM seg a JOIN seg b ON a.vessel = b.vessel AND b.ingest_id <> a.ingest_id AND a.t0 < b.t1 AND b.t0 < a.t1
        JOIN ingests i ON i.ingest_id = b.ingest_id
        WHERE a.ingest_id = ?""", [source_id, ingest_id]).fetchall()
    n, files = rows[0]
    if not n:
        return None
    shown = ", ".join(files[:3]) + (f" and {len(files) - 3} more" if len(files) > 3 else "")
    return (f"{n} vessel{'s' if n != 1 else ''} of this file also {'have' if n != 1 else 'has'} pings within "
            f"the same hours in {shown}: such tracks are joined only at the files' edges, not ping by ping; "
            "deliver each vessel's pings cut by time, or join the overlapping files before ingesting them")


def _live(table: str, ingests: str) -> str:
    return (f"(SELECT x.* FROM {table} x WHERE x.ingest_id IN "
            f"(SELECT ingest_id FROM {ingests} WHERE status = 'complete'))")


def seam_sql(edges: str = EDGES_TABLE, ingests: str = "ingests") -> str:
    """SELECT of what the owned edge pings of all live ingests add to their cell-periods.

    Columns: source_id, event_id, hours, n_values, vessel_ids, speed_derived. The hours and
    pings are those of the joined track (:func:`harmonize.tracks.track_sql`, each ping with
    its file's settings) minus those the files counted for the same pings on their own, so
    that the parts plus this row give the joined track's numbers; the vessels and the flag are
    the joined track's (the parts hold those of interior pings only).
    """
    live = _live(edges, ingests)
    cols = ", ".join(f'"{c}"' for c, _ in EDGE_COLUMNS if c != "source_row")
    # a ping two files both hold (same vessel and time) is one ping of the track
    deduped = f"""(SELECT {cols}, source_row AS row FROM {live}
                  QUALIFY row_number() OVER (PARTITION BY source_id, vessel, t
                                             ORDER BY owned DESC, lat, lon, sog NULLS LAST, ingest_id) = 1)"""
    track = track_sql(deduped, "source_id, vessel", "t, row", "max_speed_kn", "max_gap_h")
    joined = f"""SELECT source_id, event_id, sum(hours) AS hours, count(*) AS n,
                        list_sort(list(DISTINCT vessel)) AS vessel_ids, bool_or(sog IS NULL) AS derived
                 FROM ({track}) WHERE owned AND fishing AND NOT spike AND hours > 0
                 GROUP BY source_id, event_id"""
    alone = f"""SELECT source_id, event_id, sum(file_hours) AS hours, count(*) FILTER (WHERE file_hours > 0) AS n
                FROM {live} WHERE owned GROUP BY source_id, event_id"""
    return f"""SELECT source_id, event_id, coalesce(j.hours, 0) - coalesce(a.hours, 0) AS hours,
                      coalesce(j.n, 0) - coalesce(a.n, 0) AS n_values,
                      coalesce(j.vessel_ids, []::VARCHAR[]) AS vessel_ids, coalesce(j.derived, false) AS speed_derived
               FROM ({joined}) j FULL OUTER JOIN ({alone}) a USING (source_id, event_id)"""


def merged_sql(parts: str, rules: Mapping[str, str], edges: str | None = None) -> str:
    """SELECT of one row per value from the view ``parts`` (contract columns, then the parts).

    ``rules`` maps source kinds to their merge rule (:func:`merge_rules`). Rows of other
    kinds pass through; rows of those kinds are
    grouped by source and record_id (the record id hashes source, event, variable, life stage,
    quantity and behaviour, and no ingest or file) and merged as the module docstring says.
    ``edges`` names the ``ping_edges`` table (None for a store without it): the hours of
    ping tracks across file boundaries join their cell-period as one more part.
    """
    types = dict(observation_sql_columns())
    cols = list(types)
    merged = _kinds(rules, SUM, MEAN)
    summed = sql_in("source_kind", _kinds(rules, SUM))
    averaged = _kinds(rules, MEAN)
    single = "count(*) = 1"
    weighted = "count(part_weight) = count(*) AND sum(part_weight) > 0"
    exprs = {
        "record_id": "record_id",
        "source_id": "source_id",
        "source_kind": "source_kind",
        # one ingest of those merged (the smallest id); observation_parts lists them all
        "ingest_id": "min(ingest_id)",
        "value": f"""CASE WHEN {summed} THEN sum(value)
                          WHEN {weighted} THEN sum(part_sum) / sum(part_weight)
                          WHEN {single} THEN min(value)
                          ELSE sum(value * n_values) / nullif(sum(n_values), 0) END""",
        "effort": f"""CASE WHEN {summed} THEN sum(effort)
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
    if not merged:
        return f"SELECT {plain} FROM {parts}"
    merged_cols = ", ".join(f'CAST({exprs[c]} AS {types[c]}) AS "{c}"' for c in cols)
    # time steps of each period in the live files of a gridded source: every cell of a file
    # has its file's steps, whether or not the cell had a valid value in them
    key = "source_id, variable, depth_layer, event_start"
    steps = (f"SELECT {key}, sum(steps) AS period_steps FROM (SELECT {key}, ingest_id, max(part_steps) AS steps "
             f"FROM {parts} WHERE {sql_in('source_kind', averaged)} GROUP BY ALL) GROUP BY ALL")
    source = parts
    if edges is not None:
        templates = _live(EDGE_PARTS_TABLE, "ingests")
        # the seam's rows take their kind from the cell-period rows they join (of a ping source)
        seam = (f"SELECT r.record_id, r.source_kind, s.source_id, s.hours AS value, "
                f"s.hours AS effort, s.n_values, s.vessel_ids, "
                f"CASE WHEN s.speed_derived THEN ['speed_derived'] ELSE [] END::VARCHAR[] AS flags, "
                f"[]::BIGINT[] AS source_record_rows, false AS zero_filled "
                f"FROM ({seam_sql(edges)}) s JOIN (SELECT DISTINCT source_id, event_id, record_id, source_kind "
                f"FROM {templates}) r "
                f"USING (source_id, event_id)")
        source = f"(SELECT * FROM {parts} UNION ALL BY NAME SELECT * FROM {templates} UNION ALL BY NAME {seam})"
    joined = (f"SELECT p.*, s.period_steps FROM {source} p LEFT JOIN ({steps}) s "
              f"ON {sql_in('p.source_kind', averaged)} AND s.source_id = p.source_id AND s.variable = p.variable "
              "AND s.depth_layer = p.depth_layer AND s.event_start = p.event_start "
              f"WHERE {sql_in('p.source_kind', merged)}")
    return (f"SELECT {plain} FROM {parts} WHERE {sql_in('source_kind', merged, negate=True)} UNION ALL "
            f"SELECT {merged_cols} FROM ({joined}) GROUP BY source_kind, source_id, record_id "
            # a cell-period whose only part is a file edge's, with no hours joined to it
            f"HAVING NOT {summed} OR sum(value) > {ZERO_HOURS!r}")


def ingests_behind(con: duckdb.DuckDBPyConnection, where: str) -> list[str]:
    """Every ingest whose parts went into the merged rows of ``observations`` selected by ``where``.

    The merged row names one ingest; the provenance of an export lists them all.
    """
    kinds = _kinds(merge_rules(con), SUM, MEAN)
    if not kinds:
        return []
    rows = con.execute(
        f"""SELECT DISTINCT p.ingest_id FROM observation_parts p
            SEMI JOIN (SELECT source_id, record_id FROM observations
                       WHERE {sql_in('source_kind', kinds)} AND ({where})) s
              ON p.source_id = s.source_id AND p.record_id = s.record_id
            ORDER BY 1"""
    ).fetchall()
    return [r[0] for r in rows]
