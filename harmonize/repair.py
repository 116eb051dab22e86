"""Repair of a damaged store: damaged ingests leave the live set, unknown files are set aside.

Nothing is deleted. An ingest with a missing, changed or unreadable file is marked
``damaged`` (with the reason) and its rows leave the ``observations`` view; the view and the
store-wide flags are rebuilt in the same transaction. Parquet files that no manifest row names
are moved to ``store/set_aside/<time>/``. When the database is lost, every parquet file is
set aside that way and an empty database is made; the rows inside those files name the
sources and input files they came from, which the plan lists as the files to ingest again.
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass, field
from pathlib import Path

import duckdb
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from harmonize import connections, store_layout, twin_windows, twins
from harmonize.errors import StoreError
from harmonize.files import file_digest, fsync_dir
from harmonize.locks import FileLock
from harmonize.store import (
    DB_NAME,
    OBSERVATIONS_DIR,
    SEALS_DIR,
    WRITE_LOCK,
    Damage,
    Store,
    _file_problem,
)

# taking damaged ingests out recomputes the volunteer twins (the store's commit hook)
twins.install()

#: Folder of the store where repair moves files that are not live.
SET_ASIDE_DIR = "set_aside"
#: Folder of the store where a manifest rebuild moves the part files it refuses (and a damaged
#: database): ``store/refused_parts/<time>/``, keeping their paths.
REFUSED_DIR = "refused_parts"


@dataclass
class RebuildPlan:
    """What a manifest rebuild finds in the part files (``applied`` False: what it would do)."""

    #: why the database needs rebuilding ("missing", or the error opening it); None: it is sound
    database_problem: str | None = None
    #: ingests found: ingest_id, source_id, status, files, rows (observation rows)
    ingests: pd.DataFrame = field(default_factory=pd.DataFrame)
    #: refused part files (relative to the store) and why, one line each
    refused: list[tuple[str, str]] = field(default_factory=list)
    #: where the refused files (and a damaged database) went (after apply)
    refused_to: Path | None = None

    @property
    def needed(self) -> bool:
        return self.database_problem is not None


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
    #: the store folder is gone while the marker beside it says ingests were committed
    gone_store: bool = False
    #: a rebuild of the manifest from the part files (see :func:`rebuild`)
    rebuild: RebuildPlan | None = None

    @property
    def needed(self) -> bool:
        return bool(self.damage or self.unlisted or self.lost_database or self.gone_store
                     or (self.rebuild is not None and self.rebuild.needed))

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


def repair(store: Store, apply: bool = False, rebuild_manifest: bool = False) -> RepairPlan:
    """Find the damage of a store and, with ``apply``, take it out of the live set.

    Holds the store's write lock while it looks and acts (with ``apply``), so no ingest
    commits in between. With ``rebuild_manifest`` a lost or unreadable database is rebuilt
    from the part files' metadata (:func:`rebuild`) instead of being replaced by an
    empty one.
    """
    if rebuild_manifest:
        return rebuild(store, apply)
    lost = store.lost_files()
    seals = store.directory / SEALS_DIR
    if lost or (not store.exists() and seals.is_dir() and any(seals.glob("*.json"))):
        return _repair_lost(store, lost, apply)
    plan = RepairPlan()
    if not store.exists():
        if store.lost() is not None:  # the store folder is gone, the marker beside it remains
            plan.gone_store = True
            if apply:
                stamp = pd.Timestamp.now("UTC").strftime("%Y%m%dT%H%M%S")
                plan.set_aside = store.marker.with_name(f"{store.marker.name}.lost-{stamp}")
                os.replace(store.marker, plan.set_aside)
                plan.applied = True
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
            store.publish_index(con)
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
    con = connections.connect()
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
    seals = store.directory / SEALS_DIR
    sealed = [p.relative_to(store.directory).as_posix() for p in sorted(seals.glob("*.json"))] if seals.is_dir() else []
    plan.set_aside = _set_aside(store, plan.unlisted + sealed)  # the seals belong to the lost database
    # an empty database, noting what happened, so the store can be written again
    with store.connect(read_only=False, repairing=True) as db:
        db.execute("DELETE FROM store_meta WHERE key = 'lost_database_set_aside'")
        db.execute("INSERT INTO store_meta VALUES ('lost_database_set_aside', ?)",
                   [plan.set_aside.relative_to(store.directory).as_posix()])
    plan.applied = True
    return plan


def _set_aside(store: Store, relative: list[str], root: Path | None = None) -> Path:
    """Move files (paths relative to the store) under ``root`` (default ``store/set_aside/<time>/``),
    keeping their paths."""
    if root is None:
        root = store.directory / SET_ASIDE_DIR / pd.Timestamp.now("UTC").strftime("%Y%m%dT%H%M%S%f")
    folders = set()
    for rel in relative:
        target = root / rel
        target.parent.mkdir(parents=True, exist_ok=True)
        os.replace(store.directory / rel, target)
        folders.add(target.parent)
    for folder in folders:
        fsync_dir(folder)
    return root


def _database_problem(store: Store) -> str | None:
    """Why the store's database cannot serve as the manifest (one phrase), or None when it can."""
    if not store.db_path.is_file():
        return "is missing"
    try:
        con = connections.connect(str(store.db_path), read_only=True)
    except duckdb.Error as exc:
        text = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        if "lock" in text.lower():
            raise StoreError(f"the store is busy ({text}); try again when the other process has finished") from None
        return f"cannot be opened ({text})"
    try:
        for table in ("ingests", "observation_files", "store_meta"):
            con.execute(f"SELECT count(*) FROM {table}").fetchall()
    except duckdb.Error as exc:
        return f"cannot be read ({str(exc).splitlines()[0] if str(exc) else type(exc).__name__})"
    finally:
        con.close()
    return None


@dataclass
class _Part:
    rel: str
    doc: dict
    rows: int
    zero_filled: int
    sha256: str
    size_bytes: int
    mtime: float


def _read_parts(store: Store, plan: RebuildPlan) -> dict[str, list[_Part]]:
    """The readable part files with sound metadata, by ingest; the others go to ``plan.refused``."""
    from harmonize.contract import CONTRACT_VERSION

    obs = store.directory / OBSERVATIONS_DIR
    found: dict[str, list[_Part]] = {}
    for path in sorted(obs.rglob("*.parquet")) if obs.is_dir() else []:
        rel = path.relative_to(store.directory).as_posix()
        try:
            footer_rows = pq.read_metadata(path).num_rows
            doc = store_layout.read_part_metadata(path)
        except (OSError, pa.ArrowException, ValueError) as exc:
            plan.refused.append((rel, f"is unreadable ({str(exc).splitlines()[0] if str(exc) else type(exc).__name__})"))
            continue
        problem = store_layout.metadata_problem(doc, footer_rows)
        if problem is None and str(doc["contract_version"]) != CONTRACT_VERSION:
            problem = f"was written under contract version {doc['contract_version']}, this harmonize writes {CONTRACT_VERSION}"
        if problem is None:
            kind_folder = next((p[len("source_kind="):] for p in path.relative_to(obs).parts
                                if p.startswith("source_kind=")), None)
            if kind_folder is not None and kind_folder != doc["source_kind"]:
                problem = f"lies in the folder of kind {kind_folder} but its metadata says {doc['source_kind']}"
        if problem is None:
            problem = _file_problem(path, footer_rows, None, None, deep=True)
        if problem is not None:
            plan.refused.append((rel, problem))
            continue
        zero = doc.get("zero_filled")
        if zero is None:
            zero = pc.sum(pq.read_table(path, columns=["zero_filled"])["zero_filled"]).as_py() or 0
        sha, size = file_digest(path)
        found.setdefault(str(doc["ingest_id"]), []).append(
            _Part(rel, doc, footer_rows, int(zero), sha, size, path.stat().st_mtime))
    return found


def _read_seal(store: Store, ingest_id: str) -> dict | None:
    try:
        seal = json.loads((store.directory / SEALS_DIR / f"{ingest_id}.json").read_text())
        if not isinstance(seal, dict) or not isinstance(seal.get("parts"), list):
            return None
        return seal
    except (OSError, ValueError):
        return None


def _seal_record(seal: dict | None) -> dict | None:
    """The ingest's metadata as its seal holds it, when sound."""
    doc = (seal or {}).get("metadata")
    if not isinstance(doc, dict) or not isinstance(doc.get("ingest"), dict):
        return None
    if any(f not in doc["ingest"] for f in store_layout.INGEST_FIELDS):
        return None
    return doc


def _check_ingest(store: Store, ingest_id: str, found: list[_Part], refused: list[tuple[str, str]],
                  seal: dict | None) -> str | None:
    """Why an ingest's parts cannot be taken as a complete committed ingest, or None.

    Its parts must agree with each other and with its seal (``store/ingests/<id>.json``) about
    the ingest, and every file the seal lists must be present, sound and of the recorded size
    and sha256.
    """
    docs = [(p.rel, p.doc) for p in found]
    sealed = _seal_record(seal)
    if sealed is not None:
        docs.insert(0, (f"{SEALS_DIR}/{ingest_id}.json", sealed))
    for rel, doc in docs[1:]:
        for key in ("ingest", "inputs", "hook_data", "contract_version"):
            if doc.get(key) != docs[0][1].get(key):
                return f"its files disagree about the ingest ({key}: {docs[0][0]} and {rel})"
    if seal is None:
        return (f"its seal {SEALS_DIR}/{ingest_id}.json is missing or unreadable, so the set of its files "
                "cannot be told complete (or the ingest never committed)")
    try:
        listed = {p["path"]: p for p in seal["parts"]}
    except (KeyError, TypeError):
        return f"its seal {SEALS_DIR}/{ingest_id}.json is unreadable"
    refused_here = {rel for rel, _ in refused}
    present = {p.rel: p for p in found}
    for rel, entry in sorted(listed.items()):
        if rel in refused_here:
            return f"its file {rel} is refused"
        part = present.get(rel)
        if part is None:
            return f"its file {rel} is missing"
        if part.size_bytes != entry.get("size_bytes") or part.sha256 != entry.get("sha256"):
            return f"its file {rel} has changed since it was committed (sha256 or size differs from its seal)"
    extra = sorted(set(present) - set(listed))
    if extra:
        return f"its seal does not list {extra[0]}"
    return None


def rebuild(store: Store, apply: bool = False) -> RepairPlan:
    """Rebuild a lost or unreadable database (the manifest) from the part files' metadata.

    Each part file carries its ingest's record (:mod:`harmonize.store_layout`), and each
    committed ingest leaves a seal listing its files. The rebuilt ``ingests`` table holds every
    ingest found, ``complete`` when its files are all there, sound and as sealed, ``damaged``
    (with the reason) otherwise; an ingest superseded by a later ingest of the same source and
    file (path or content) is ``superseded``, as the commit would have made it. Part files
    whose metadata is missing, unreadable or inconsistent are refused: moved, never deleted,
    to ``store/refused_parts/<time>/`` (a damaged database with them). The quarantine and the
    events without values lived only in the database: they are not rebuilt, and the rebuilt
    ingests carry ``rebuilt_at`` so that the integrity check knows it (ingest them again
    with ``--replace`` to restore their quarantine).
    """
    rb = RebuildPlan(database_problem=_database_problem(store))
    plan = RepairPlan(rebuild=rb)
    if rb.database_problem is None:
        return plan
    obs, seals = store.directory / OBSERVATIONS_DIR, store.directory / SEALS_DIR
    if rb.database_problem == "is missing" and not (obs.is_dir() and any(obs.rglob("*.parquet"))) \
            and not (seals.is_dir() and any(seals.glob("*.json"))):
        rb.database_problem = None  # nothing to rebuild from (an empty study, or a deleted store folder)
        return plan
    writer = FileLock(store.directory / WRITE_LOCK)
    if apply and not writer.acquire(store.lock_timeout_s):
        raise StoreError("the store is busy (another harmonize process is writing); try again when it has finished")
    try:
        found = _read_parts(store, rb)
        seals_dir = store.directory / SEALS_DIR
        sealed = {p.stem for p in seals_dir.glob("*.json")} if seals_dir.is_dir() else set()
        rows = []
        for ingest_id in sorted(set(found) | sealed):
            found_parts = found.get(ingest_id, [])
            seal = _read_seal(store, ingest_id)
            doc = _seal_record(seal) or (found_parts[0].doc if found_parts else None)
            if doc is None:  # a seal without its record and no sound part: nothing says what it was
                rb.refused.append((f"{SEALS_DIR}/{ingest_id}.json", "is unreadable and no sound part file "
                                   "names its ingest"))
                continue
            reason = _check_ingest(store, ingest_id, found_parts, rb.refused, seal)
            ingest = doc["ingest"]
            mtimes = [p.mtime for p in found_parts] or [(seals_dir / f"{ingest_id}.json").stat().st_mtime]
            rows.append({
                **{k: ingest[k] for k in store_layout.INGEST_FIELDS},
                "started_at": pd.Timestamp(ingest["started_at"]),
                "finished_at": pd.Timestamp(max(mtimes), unit="s"),
                "records_written": sum(p.rows for p in found_parts),
                "records_zero_filled": sum(p.zero_filled for p in found_parts),
                "status": "damaged" if reason else "complete", "damage_reason": reason,
                "superseded_by": None, "parts": found_parts, "doc": doc,
            })
        _supersede(rows)
        rb.ingests = pd.DataFrame(
            [{"ingest_id": r["ingest_id"], "source_id": r["source_id"], "status": r["status"],
              "files": len(r["parts"]), "rows": r["records_written"], "damage_reason": r["damage_reason"]}
             for r in rows], columns=["ingest_id", "source_id", "status", "files", "rows", "damage_reason"])
        if not apply:
            return plan
        stamp = pd.Timestamp.now("UTC").strftime("%Y%m%dT%H%M%S%f")
        rb.refused_to = store.directory / REFUSED_DIR / stamp
        moved = [rel for rel, _ in rb.refused]
        if store.db_path.exists():
            moved += [p.name for p in store.directory.glob(DB_NAME + "*")]  # the database and its log
        if moved:
            _set_aside(store, moved, rb.refused_to)
    finally:
        if apply:
            writer.release()
    # the new database (the connection takes the write lock again; meanwhile the store, with
    # parquet files and no database, refuses every writer)
    _write_rebuilt(store, rows)
    plan.applied = True
    return plan


def _supersede(rows: list[dict]) -> None:
    """Mark superseded ingests the way the commit does: a later ingest of the same source and the
    same file (path relative to the study, or content) supersedes every earlier complete one."""
    by_start = sorted(rows, key=lambda r: (r["started_at"], r["ingest_id"]))
    for i, later in enumerate(by_start):
        if later["status"] == "damaged":
            continue
        for earlier in by_start[:i]:
            if (earlier["status"] == "complete" and earlier["source_id"] == later["source_id"]
                    and (earlier["file_path"] == later["file_path"] or earlier["inputs_sha256"] == later["inputs_sha256"])):
                earlier["status"], earlier["superseded_by"] = "superseded", later["ingest_id"]


def _write_rebuilt(store: Store, rows: list[dict]) -> None:
    """A new database holding the rebuilt manifest, the view and the store-wide flags, in one transaction."""
    now = pd.Timestamp.now("UTC").tz_localize(None)
    with store.connect(read_only=False, view=False, repairing=True) as con:
        con.execute("BEGIN TRANSACTION")
        try:
            for r in rows:
                con.execute(
                    """INSERT INTO ingests (ingest_id, source_id, source_kind, provider_type, file_name, file_sha256,
                       inputs_sha256, config_sha256, started_at, finished_at, status, rows_read, rows_accepted,
                       rows_quarantined, records_written, records_zero_filled, superseded_by, tool_version,
                       profile_file, damage_reason, file_path, rebuilt_at, row_traced, merge_rule)
                       VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)""",
                    [r["ingest_id"], r["source_id"], r["source_kind"], r["provider_type"], r["file_name"],
                     r["file_sha256"], r["inputs_sha256"], r["config_sha256"], r["started_at"], r["finished_at"],
                     r["status"], r["rows_read"], r["rows_accepted"], r["rows_quarantined"], r["records_written"],
                     r["records_zero_filled"], r["superseded_by"], r["tool_version"], r["profile_file"],
                     r["damage_reason"], r["file_path"], now, r["doc"]["ingest"].get("row_traced"),
                     r["doc"]["ingest"].get("merge_rule")])
                doc = r["doc"]
                for f in doc.get("inputs") or []:
                    con.execute("INSERT INTO ingest_files VALUES (?, ?, ?, ?, ?, ?, ?)",
                                [r["ingest_id"], f["role"], f["file_name"], f["file_sha256"], f["rows_read"],
                                 f["rows_accepted"], f["rows_quarantined"]])
                for p in r["parts"]:
                    con.execute("INSERT INTO observation_files (ingest_id, path, n_rows, sha256, size_bytes) "
                                "VALUES (?, ?, ?, ?, ?)", [r["ingest_id"], p.rel, p.rows, p.sha256, p.size_bytes])
                twin = (doc.get("hook_data") or {}).get(twin_windows.HOOK_NAME)
                if twin:
                    twins.ensure_tables(con)
                    twins.record_settings(con, r["ingest_id"], r["source_id"], twins.TwinSettings(**twin))
            con.execute("DELETE FROM store_meta WHERE key = 'manifest_rebuilt_at'")
            con.execute("INSERT INTO store_meta VALUES ('manifest_rebuilt_at', ?)", [now.isoformat()])
            store.refresh_live(con)  # views and commit hooks (the twins recomputed)
            con.execute("COMMIT")
        except BaseException:
            try:
                con.execute("ROLLBACK")
            except duckdb.Error:
                pass
            raise
        store.publish_index(con)
