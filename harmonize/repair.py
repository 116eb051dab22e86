"""Repair of a damaged store: damaged ingests leave the live set, unknown files are set aside.

Nothing is deleted. An ingest with a missing, changed or unreadable file is marked
``damaged`` (with the reason) and its rows leave the ``observations`` view; the view and the
store-wide flags are rebuilt in the same transaction. Parquet files that no manifest row names
are moved to ``store/set_aside/<time>/``. When the database is lost, every parquet file is
set aside that way and an empty database is made; the rows inside those files name the
sources and input files they came from, which the plan lists as the files to ingest again.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from pathlib import Path

import duckdb
import pandas as pd

from harmonize import twins
from harmonize.files import fsync_dir
from harmonize.store import Damage, Store

# taking damaged ingests out recomputes the volunteer twins (the store's commit hook)
twins.install()

#: Folder of the store where repair moves files that are not live.
SET_ASIDE_DIR = "set_aside"


@dataclass
class RepairPlan:
    """What a repair does (``applied`` False: what it would do)."""

    #: the damaged files of live ingests
    damage: list[Damage] = field(default_factory=list)
    #: the ingests that leave the live set: ingest_id, source_id, profile_file, files (input names)
    ingests: pd.DataFrame = field(default_factory=pd.DataFrame)
    #: parquet files (relative to the store) that no manifest row names
    unlisted: list[str] = field(default_factory=list)
    #: the database is missing while parquet files remain
    lost_database: bool = False
    #: where the set-aside files went (after apply)
    set_aside: Path | None = None
    applied: bool = False

    @property
    def needed(self) -> bool:
        return bool(self.damage or self.unlisted or self.lost_database)

    def to_ingest_again(self) -> list[str]:
        """One line per input to ingest again: source, profile, input file names, old ingest."""
        lines = []
        for r in self.ingests.itertuples():
            profile = f" with profile {r.profile_file}" if isinstance(r.profile_file, str) and r.profile_file else ""
            lines.append(f"source {r.source_id}{profile}: {r.files} (was ingest {r.ingest_id})")
        return lines


def plan_repair(store: Store) -> RepairPlan:
    """What :func:`repair` would do, without changing anything."""
    return repair(store, apply=False)


def repair(store: Store, apply: bool = False) -> RepairPlan:
    """Find the damage of a store and, with ``apply``, take it out of the live set.

    Holds the store's write lock while it looks and acts (with ``apply``), so no ingest
    commits in between.
    """
    lost = store.lost_files()
    if lost:
        return _repair_lost(store, lost, apply)
    plan = RepairPlan()
    if not store.exists():
        return plan
    if apply:
        store.upgrade()  # an older store records its checksums first
    with store.connect(read_only=not apply, view=False) as con:
        plan.damage = store._scrub(con)
        damaged = sorted({d.ingest_id for d in plan.damage})
        plan.ingests = _describe_ingests(con, damaged)
        known = {r[0] for r in con.execute("SELECT path FROM observation_files").fetchall()}
        obs_dir = store.directory / "observations"
        on_disk = {p.relative_to(store.directory).as_posix() for p in obs_dir.rglob("*.parquet")} if obs_dir.is_dir() else set()
        plan.unlisted = sorted(on_disk - known)
        if not apply or not plan.needed:
            return plan
        if damaged:
            reasons = {i: "; ".join(f"{d.path} {d.problem}" for d in plan.damage if d.ingest_id == i) for i in damaged}
            con.execute("BEGIN TRANSACTION")
            try:
                for ingest_id, reason in reasons.items():
                    con.execute("UPDATE ingests SET status = 'damaged', damage_reason = ? WHERE ingest_id = ?",
                                [reason, ingest_id])
                store.refresh_live(con)
                con.execute("COMMIT")
            except BaseException:
                con.execute("ROLLBACK")
                raise
        if plan.unlisted:
            plan.set_aside = _set_aside(store, plan.unlisted)
    plan.applied = True
    return plan


def _describe_ingests(con: duckdb.DuckDBPyConnection, ingest_ids: list[str]) -> pd.DataFrame:
    if not ingest_ids:
        return pd.DataFrame(columns=["ingest_id", "source_id", "profile_file", "files"])
    return con.execute(
        """SELECT i.ingest_id, i.source_id, i.profile_file,
                  coalesce(string_agg(f.role || ' ' || f.file_name, ', ' ORDER BY f.role), i.file_name) AS files
           FROM ingests i LEFT JOIN ingest_files f USING (ingest_id)
           WHERE i.ingest_id = ANY(?::VARCHAR[]) GROUP BY i.ingest_id, i.source_id, i.profile_file, i.file_name
           ORDER BY i.ingest_id""",
        [ingest_ids],
    ).df()


def _repair_lost(store: Store, lost: list[Path], apply: bool) -> RepairPlan:
    """The database is gone: list what the files hold; with ``apply``, set them aside, start anew."""
    plan = RepairPlan(lost_database=True,
                      unlisted=[p.relative_to(store.directory).as_posix() for p in lost])
    con = duckdb.connect()
    found = []
    try:
        for path in lost:
            try:
                found.append(con.execute(
                    """SELECT DISTINCT ingest_id, source_id, source_file FROM read_parquet(?)""",
                    [str(path)]).df())
            except duckdb.Error:
                plan.damage.append(Damage("(unknown: the database is lost)", path.relative_to(store.directory).as_posix(),
                                          "is unreadable"))
    finally:
        con.close()
    if found:
        rows = pd.concat(found, ignore_index=True).drop_duplicates()
        plan.ingests = (rows.groupby(["ingest_id", "source_id"], as_index=False)
                        .agg(files=("source_file", lambda s: ", ".join(sorted(map(str, s.dropna().unique()))))))
        plan.ingests["profile_file"] = None
        plan.ingests = plan.ingests[["ingest_id", "source_id", "profile_file", "files"]]
    else:
        plan.ingests = pd.DataFrame(columns=["ingest_id", "source_id", "profile_file", "files"])
    if not apply:
        return plan
    plan.set_aside = _set_aside(store, plan.unlisted)
    # an empty database, noting what happened, so the store can be written again
    with store.connect(read_only=False) as db:
        db.execute("DELETE FROM store_meta WHERE key = 'lost_database_set_aside'")
        db.execute("INSERT INTO store_meta VALUES ('lost_database_set_aside', ?)",
                   [plan.set_aside.relative_to(store.directory).as_posix()])
    plan.applied = True
    return plan


def _set_aside(store: Store, relative: list[str]) -> Path:
    """Move files (paths relative to the store) under ``store/set_aside/<time>/``, keeping their paths."""
    stamp = pd.Timestamp.now("UTC").strftime("%Y%m%dT%H%M%S%f")
    root = store.directory / SET_ASIDE_DIR / stamp
    folders = set()
    for rel in relative:
        target = root / rel
        target.parent.mkdir(parents=True, exist_ok=True)
        os.replace(store.directory / rel, target)
        folders.add(target.parent)
    for folder in folders:
        fsync_dir(folder)
    return root
