"""Taxon roll-up of an export selection: one SQL step over ``export_base``, before any writer.

With ``--taxon-level RANK`` each taxon is replaced by its ancestor of that rank; with
``--consistent-taxa`` each taxon recorded at different levels across the selected years or
sources (:func:`harmonize.taxonomy.resolution_changes`) is replaced by the coarsest taxon
recorded consistently. Rules (docs/exports.md has a worked example):

- Within one event, quantity, life stage, unit and effort, the values and densities of the
  members of a target (the target itself and its descendants) add up. Twins flagged
  ``probable_duplicate`` are added among themselves only, so they stay recognisable.
- A target gets a number at an event only when it is fully recorded there: every leaf of
  taxa.csv below it has a record at the event of itself or of a taxon on its way up to the
  target (a genus record covers all its species). So a zero of the target means every
  member was recorded as zero; a member that was not looked for makes the target "not
  recorded" (no row) rather than a silent undercount. The number of values left out for
  this reason is in the export's metadata (``counts.taxon_rollup``).
- Presence (quantity ``presence``) of a target is the presence of any member.
- A taxon without an ancestor of the rank asked for stays as it is; so do physical and
  effort rows.

Rolled rows carry the flag ``taxon_rolled_up`` when they combine a taxon other than the
target, ``zero_filled`` only when every member was inferred, and a new ``record_id``
(a digest of the members' ids; a target's own record alone keeps its id). Coverage is
checked per life stage: members recorded with different life stages do not cover each other.
"""

from __future__ import annotations

from typing import Any

import duckdb
import pandas as pd

from harmonize.errors import HarmonizeError
from harmonize.export.selection import BASE_VIEW, duplicate_sql
from harmonize.sql import sql_ident
from harmonize.study import Study
from harmonize.taxonomy import RANKS, Hierarchy, coarsest_targets, consistent_targets

ROLLED_FLAG = "taxon_rolled_up"
UNROLLED_VIEW = "export_unrolled"
_KEYS = ("source_id", "event_id", "quantity", "life_stage", "unit", "effort", "effort_unit")


def check_level(level: str | None) -> str | None:
    """The rank asked for, in lower case; HarmonizeError naming the valid ranks otherwise."""
    if level is None or not str(level).strip():
        return None
    rank = str(level).strip().casefold()
    if rank not in RANKS:
        raise HarmonizeError(f"taxon level {level!r} is not a rank; choose from {', '.join(RANKS)}")
    return rank


def recorded_groups(con: duckdb.DuckDBPyConnection, view: str) -> pd.DataFrame:
    """(variable, season_year, source_id, source_kind) holding taxon records in ``view``."""
    return con.execute(
        f"""SELECT DISTINCT variable, season_year, source_id, source_kind FROM {view}
            WHERE variable_kind = 'taxon' AND NOT {duplicate_sql()}""").df()


def rollup_targets(con: duckdb.DuckDBPyConnection, study: Study, level: str | None,
                   consistent: bool, view: str = BASE_VIEW) -> dict[str, str]:
    """taxon -> target for the rank and/or consistency asked for (identity pairs left out)."""
    hierarchy = Hierarchy.from_taxa(study.taxa)
    maps = []
    if level:
        maps.append(hierarchy.at_rank(level))
    if consistent:
        maps.append(consistent_targets(recorded_groups(con, view), hierarchy))
    targets = coarsest_targets(hierarchy, *maps) if maps else {}
    return dict(sorted(targets.items()))


def apply_rollup(con: duckdb.DuckDBPyConnection, study: Study, level: str | None,
                 consistent: bool) -> dict[str, Any]:
    """Redefine ``export_base`` as the rolled-up selection; returns what was done (for metadata).

    The view the selection had is kept as ``export_unrolled``.
    """
    level = check_level(level)
    if not level and not consistent:
        return {}
    targets = rollup_targets(con, study, level, consistent)
    info: dict[str, Any] = {"taxon_level": level, "consistent_taxa": bool(consistent),
                            "rolled_into": {t: x for t, x in targets.items() if t != x},
                            "values_left_out_incomplete": 0}
    if not targets:
        return info
    hierarchy = Hierarchy.from_taxa(study.taxa)
    paths = hierarchy.leaf_paths(targets)
    members = pd.DataFrame({"taxon": list(targets), "target": list(targets.values())})
    leaves = paths.groupby("target")["leaf"].nunique().rename("n_leaves").reset_index()
    for name, frame in (("rollup_members", members), ("rollup_paths", paths), ("rollup_leaves", leaves)):
        con.register(f"_{name}", frame)
        con.execute(f"CREATE OR REPLACE TEMP TABLE {name} AS SELECT * FROM _{name}")
        con.unregister(f"_{name}")
    con.execute(f"ALTER VIEW {BASE_VIEW} RENAME TO {UNROLLED_VIEW}")
    columns = [r[0] for r in con.execute(f"DESCRIBE {UNROLLED_VIEW}").fetchall()]
    con.execute(f"CREATE TEMP VIEW {BASE_VIEW} AS {rollup_sql(columns)}")
    info["values_left_out_incomplete"] = int(con.execute(
        f"SELECT count(*) FROM ({_rolled_sql(columns)}) WHERE NOT kept").fetchall()[0][0])
    return info


def _aggregate(column: str) -> str:
    """How the rows of one event and target combine into one value of ``column``."""
    c = sql_ident(column)
    rules = {
        "variable": "target",
        "variable_kind": "'taxon'",
        "value": "CASE WHEN quantity = 'presence' THEN max(value) ELSE sum(value) END",
        "density": "sum(density)",
        "zero_filled": "bool_and(zero_filled)",
        # a target's own record alone keeps its id; a combination gets a digest of its members' ids
        "record_id": ("CASE WHEN count(*) = 1 AND bool_and(variable = target) THEN min(record_id) "
                      "ELSE md5(target || ':' || string_agg(record_id, '|' ORDER BY record_id)) END"),
        "ingest_id": "CASE WHEN count(DISTINCT ingest_id) = 1 THEN min(ingest_id) END",
        "source_file": "CASE WHEN count(DISTINCT source_file) = 1 THEN min(source_file) END",
        "source_row": "CASE WHEN count(*) = 1 THEN min(source_row) END",
        # sorted, so that an export is the same file at every run
        "flags": (f"CASE WHEN bool_or(variable <> target) THEN list_append(list_sort(list_distinct(flatten("
                  f"list(coalesce(flags, []::VARCHAR[]))))), '{ROLLED_FLAG}') ELSE list_sort(list_distinct(flatten("
                  "list(coalesce(flags, []::VARCHAR[]))))) END"),
    }
    if column in _KEYS:
        return c
    return f"{rules.get(column, f'any_value({c})')} AS {c}"


def _rolled_sql(columns: list[str]) -> str:
    """Rolled rows of the targets, with ``kept`` (fully recorded, or presence)."""
    keys = ", ".join(sql_ident(k) for k in _KEYS)
    cols = ", ".join(_aggregate(c) for c in columns)
    return f"""
        WITH mapped AS (
            SELECT u.*, m.target, {duplicate_sql()} AS is_twin
            FROM {UNROLLED_VIEW} u JOIN rollup_members m ON m.taxon = u.variable
            WHERE u.variable_kind = 'taxon'
        ),
        cover AS (
            SELECT source_id, event_id, quantity, life_stage, mapped.target, count(DISTINCT p.leaf) AS n_covered
            FROM mapped JOIN rollup_paths p ON p.node = mapped.variable AND p.target = mapped.target
            GROUP BY ALL
        ),
        rolled AS (
            SELECT {cols}, target AS _target
            FROM mapped GROUP BY {keys}, target, is_twin
        )
        SELECT r.*, (r.quantity = 'presence' OR c.n_covered = l.n_leaves) AS kept
        FROM rolled r
        JOIN rollup_leaves l ON l.target = r._target
        LEFT JOIN cover c ON c.source_id = r.source_id AND c.event_id = r.event_id AND c.quantity = r.quantity
             AND c.life_stage IS NOT DISTINCT FROM r.life_stage AND c.target = r._target"""


def rollup_sql(columns: list[str]) -> str:
    """The rolled-up selection: untouched rows, then the kept rolled rows, with ``columns``."""
    cols = ", ".join(sql_ident(c) for c in columns)
    return f"""
        SELECT {cols} FROM {UNROLLED_VIEW}
        WHERE variable_kind IS DISTINCT FROM 'taxon' OR variable NOT IN (SELECT taxon FROM rollup_members)
        UNION ALL
        SELECT {cols} FROM ({_rolled_sql(columns)}) WHERE kept"""
