"""The store: a DuckDB database (manifest, quarantine, views) beside a parquet dataset.

Observation rows live in a hive-partitioned parquet dataset under ``store/observations/``
(source_kind=.../season_year=.../*.parquet). The database holds the manifest of live
parquet files, the ingests, the quarantine and an ``observations`` view over the live files.

Accepted events that yield no observation row (a haul with no catch under a profile without
a zero-filling protocol, a segment whose bird rows were all quarantined) are kept in the
``events_without_values`` table, so that every input row stays accounted for.

Crash safety: an ingest writes its parquet files into ``store/staging/<ingest_id>/`` (a
folder it holds an OS lock on), then, holding the store's write lock (``flock`` on
``write.lock``), writes a journal of where the files go, syncs and moves them into place and
records them, with their sha256 and size, in one transaction. Files that are not in the
manifest are never read, so a kill at any point leaves either all or none of an ingest
visible; the next writer removes the files a dead ingest's journal names, and nothing else.

Integrity: :meth:`Store.check` verifies every live file against its recorded size and
checksum and reads it to the end; :mod:`harmonize.repair` takes damaged ingests out.

Layout: only the store knows paths, file names and partitioning (:mod:`harmonize.store_layout`);
the pipeline hands it Arrow tables (:meth:`Store.write_observations`). Every part file carries
its ingest's record as key-value metadata, each committed ingest leaves a seal
(``store/ingests/<ingest_id>.json``) listing its files, and a marker beside the store folder
(``.store.ingested``) says that ingests committed: a lost database is rebuilt from the files
(:func:`harmonize.repair.rebuild`), and a deleted store folder is told from an empty study.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import logging
import os
import re
import shutil
import time
from collections.abc import Callable, Iterable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path, PurePosixPath
from typing import Any

import duckdb
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from harmonize import (
    __version__,
    connections,
    faults,
    interrupts,
    parts,
    settings,
    store_layout,
    units,
)
from harmonize.contract import CONTRACT_VERSION, observation_sql_columns
from harmonize.errors import StoreBusyError, StoreError
from harmonize.files import file_digest, fsync_dir, fsync_file
from harmonize.locks import FileLock, is_free
from harmonize.sql import sql_text

DB_NAME = "harmonized.duckdb"
OBSERVATIONS_DIR = "observations"
STAGING_DIR = "staging"
#: Of the store: ``<ingest_id>.json`` per committed ingest (its "seal"), listing every part file
#: with its rows, sha256 and size: what a manifest rebuild checks the part files against.
SEALS_DIR = "ingests"
#: In a staging folder: the ingest's part files, laid out as under ``observations/``.
PARTS_DIR = "parts"
#: In a staging folder: the store paths its files are about to be moved to (see Store.commit).
JOURNAL_NAME = "moving.json"
#: The OS lock writers take (flock) before they open the database to write.
WRITE_LOCK = "write.lock"
#: Beside each staging folder <name>: <name>.lock, held by the process working in it.
LOCK_SUFFIX = ".lock"
#: Version of the store's tables (store_meta key ``store_version``); a store without the key
#: is version 1. 2: the ``events_without_values`` table. 3: the sha256 and size of every
#: manifest file (``observation_files.sha256``, ``size_bytes``), ``ingests.damage_reason`` and
#: ``ingests.file_path`` (the main input's path relative to the study: part of an ingest's identity).
#: A writer brings an older store up to date (tables and columns are created when missing; the
#: checksums of files an older store lists are taken when it is brought up to date).
#: 4: event times written as parquet ``timestamp[us, tz=UTC]`` (older files hold UTC wall
#: clocks: the views read them as UTC) and the persisted views name their files relative to
#: the store folder (rewritten whenever harmonize opens the store for writing).
#: 5: every part file carries ``harmonize`` key-value metadata (harmonize.store_layout; files of
#: older versions have none and are kept as they are), ``ingests.rebuilt_at`` (set on ingests
#: whose manifest rows were rebuilt from their part files by ``harmonize repair --rebuild-manifest``).
#: 6: ``ingests.row_traced`` (whether every data row of the ingest's files is traced one by one
#: to the observations or the quarantine; recorded at commit from what the pipeline says of the
#: ingest, so the store's check needs no knowledge of source kinds; NULL on older ingests).
#: 7: ``ingests.merge_rule`` (how the ingest's values merge with the parts other ingests of its
#: source wrote: harmonize.parts; recorded at commit from what the pipeline says of the ingest,
#: so the store's views need no knowledge of source kinds; on older ingests it is read from
#: their part files' footers when the first writer upgrades the store, and by readers until then).
STORE_VERSION = 7
_LOCK_RE = re.compile(r"\(PID (\d+)\)")
logger = logging.getLogger(__name__)

#: Columns of ``events_without_values``, in table order (see docs/store.md).
EVENTS_WITHOUT_VALUES_COLUMNS = (
    "ingest_id", "source_id", "source_kind", "provider_type", "protocol", "event_id", "event_start",
    "event_end", "year", "season", "season_year", "depth_layer", "lat", "lon", "cell_id", "stratum",
    "depth_min_m", "depth_max_m", "bottom_depth_m", "effort", "effort_unit", "observer_id", "flags",
    "source_file", "source_row",
)

_SCHEMA_SQL = """
CREATE TABLE IF NOT EXISTS store_meta (key VARCHAR PRIMARY KEY, value VARCHAR);
CREATE TABLE IF NOT EXISTS ingests (
    ingest_id VARCHAR PRIMARY KEY,
    source_id VARCHAR NOT NULL,
    source_kind VARCHAR NOT NULL,
    provider_type VARCHAR,
    file_name VARCHAR NOT NULL,
    file_sha256 VARCHAR NOT NULL,
    inputs_sha256 VARCHAR NOT NULL,
    config_sha256 VARCHAR NOT NULL,
    started_at TIMESTAMP NOT NULL,
    finished_at TIMESTAMP,
    status VARCHAR NOT NULL,
    rows_read BIGINT NOT NULL,
    rows_accepted BIGINT NOT NULL,
    rows_quarantined BIGINT NOT NULL,
    records_written BIGINT NOT NULL,
    records_zero_filled BIGINT NOT NULL,
    superseded_by VARCHAR,
    tool_version VARCHAR,
    profile_file VARCHAR,
    damage_reason VARCHAR,
    file_path VARCHAR,
    rebuilt_at TIMESTAMP,
    row_traced BOOLEAN,
    merge_rule VARCHAR
);
CREATE TABLE IF NOT EXISTS ingest_files (
    ingest_id VARCHAR NOT NULL,
    role VARCHAR NOT NULL,
    file_name VARCHAR NOT NULL,
    file_sha256 VARCHAR NOT NULL,
    rows_read BIGINT NOT NULL,
    rows_accepted BIGINT NOT NULL,
    rows_quarantined BIGINT NOT NULL
);
CREATE TABLE IF NOT EXISTS quarantine (
    ingest_id VARCHAR NOT NULL,
    source_file VARCHAR NOT NULL,
    source_row BIGINT,
    reason_code VARCHAR NOT NULL,
    message VARCHAR NOT NULL,
    raw VARCHAR
);
CREATE TABLE IF NOT EXISTS quarantine_summary (
    ingest_id VARCHAR NOT NULL,
    source_file VARCHAR NOT NULL,
    reason_code VARCHAR NOT NULL,
    n_values BIGINT NOT NULL,
    message VARCHAR NOT NULL
);
CREATE TABLE IF NOT EXISTS events_without_values (
    ingest_id VARCHAR NOT NULL,
    source_id VARCHAR NOT NULL,
    source_kind VARCHAR NOT NULL,
    provider_type VARCHAR,
    protocol VARCHAR,
    event_id VARCHAR,
    event_start TIMESTAMP,
    event_end TIMESTAMP,
    year INTEGER,
    season VARCHAR,
    season_year INTEGER,
    depth_layer VARCHAR,
    lat DOUBLE,
    lon DOUBLE,
    cell_id VARCHAR,
    stratum VARCHAR,
    depth_min_m DOUBLE,
    depth_max_m DOUBLE,
    bottom_depth_m DOUBLE,
    effort DOUBLE,
    effort_unit VARCHAR,
    observer_id VARCHAR,
    flags VARCHAR[],
    source_file VARCHAR,
    source_row BIGINT
);
CREATE TABLE IF NOT EXISTS store_flags (
    record_id VARCHAR NOT NULL, ingest_id VARCHAR NOT NULL, flag VARCHAR NOT NULL
);
CREATE TABLE IF NOT EXISTS observation_files (
    ingest_id VARCHAR NOT NULL,
    path VARCHAR NOT NULL,
    n_rows BIGINT NOT NULL,
    sha256 VARCHAR,
    size_bytes BIGINT
);
"""

#: Columns later store versions added to tables an older store already has.
_ADDED_COLUMNS_SQL = """
ALTER TABLE observation_files ADD COLUMN IF NOT EXISTS sha256 VARCHAR;
ALTER TABLE observation_files ADD COLUMN IF NOT EXISTS size_bytes BIGINT;
ALTER TABLE ingests ADD COLUMN IF NOT EXISTS damage_reason VARCHAR;
ALTER TABLE ingests ADD COLUMN IF NOT EXISTS file_path VARCHAR;
ALTER TABLE ingests ADD COLUMN IF NOT EXISTS rebuilt_at TIMESTAMP;
ALTER TABLE ingests ADD COLUMN IF NOT EXISTS row_traced BOOLEAN;
ALTER TABLE ingests ADD COLUMN IF NOT EXISTS merge_rule VARCHAR;
"""


#: Seconds a process waits for another to release the store (``Settings.lock_timeout_s``).
DEFAULT_LOCK_TIMEOUT_S = 60.0

#: A commit hook: ``hook(con, record)``, called inside the commit's transaction (``record``
#: is None for a change of the live set that commits no ingest, e.g. a repair).
CommitHook = Callable[[duckdb.DuckDBPyConnection, "IngestRecord | None"], None]
_COMMIT_HOOKS: dict[str, CommitHook] = {}


def register_commit_hook(name: str, hook: CommitHook) -> None:
    """Call ``hook(con, record)`` at every commit, inside its transaction.

    The hook runs after the ingest, its files, quarantine and events are recorded and the
    views are defined over the new live files, and before COMMIT: what it writes commits or
    rolls back with the ingest. It may write rows of ``store_flags`` (record_id, ingest_id,
    flag), which the ``observations`` view adds to the rows' ``flags``, and tables of its
    own (created by itself). The store knows hooks only by this interface: the layer that
    needs one registers it (the pipeline registers the volunteer twins of
    :mod:`harmonize.twins`). Registering a name again replaces its hook.
    """
    _COMMIT_HOOKS[name] = hook


def unregister_commit_hook(name: str) -> None:
    """Stop calling the hook registered under ``name`` (no-op when there is none)."""
    _COMMIT_HOOKS.pop(name, None)


def commit_hooks() -> tuple[CommitHook, ...]:
    """The registered commit hooks, in the order they were first registered."""
    return tuple(_COMMIT_HOOKS.values())


def has_table(con: duckdb.DuckDBPyConnection, name: str) -> bool:
    """Whether the database holds a table of that name (stores written by older versions may not)."""
    return bool(con.execute("SELECT count(*) FROM duckdb_tables() WHERE table_name = ?", [name]).fetchall()[0][0])


@dataclass
class IngestRecord:
    """One row of the ``ingests`` table."""

    ingest_id: str
    source_id: str
    source_kind: str
    provider_type: str
    file_name: str
    file_sha256: str
    inputs_sha256: str
    config_sha256: str
    started_at: pd.Timestamp
    finished_at: pd.Timestamp
    rows_read: int
    rows_accepted: int
    rows_quarantined: int
    records_written: int
    records_zero_filled: int
    profile_file: str
    status: str = "complete"
    #: what the commit hooks need to know of this ingest, by hook (e.g. the twin windows of a
    #: volunteer source under "twins"); the store itself never reads it
    hook_data: dict[str, Any] = field(default_factory=dict)
    #: the main input's path relative to the study folder (as given when outside it)
    file_path: str | None = None
    #: whether every data row of the input files is accepted or quarantined one by one (checked by
    #: :meth:`Store.check`); false for inputs counted in bulk (grid values, pings)
    row_traced: bool = True
    #: how the values merge with other ingests' parts of them (:data:`harmonize.parts.MERGE_RULES`);
    #: None: the rows are read as written
    merge_rule: str | None = None


@dataclass(frozen=True)
class Damage:
    """A live manifest file that is missing, changed since it was committed, or unreadable."""

    ingest_id: str
    path: str  # relative to the store folder
    problem: str

    def __str__(self) -> str:
        return f"ingest {self.ingest_id}: file {self.path} {self.problem}"


class Store:
    """The store of one study.

    Parameters
    ----------
    directory
        The ``store/`` folder of the study.
    lock_timeout_s
        How long to wait for another harmonize process to release the database.
    """

    def __init__(self, directory: str | Path, lock_timeout_s: float | None = None) -> None:
        self.directory = Path(directory).resolve()
        self.db_path = self.directory / DB_NAME
        if "?" in str(self.db_path):
            # DuckDB 2.0 cuts a database path at '?' when it names the write-ahead log
            # ("a?b/x.duckdb" -> "a.wal?b/x.duckdb"): commits would fail half-way.
            raise StoreError(
                f"cannot use the store {self.db_path}: DuckDB does not accept a '?' in a database "
                "path; rename the folder without '?'"
            )
        if lock_timeout_s is None:
            lock_timeout_s = _lock_timeout(settings.current().lock_timeout_s)
        self.lock_timeout_s = lock_timeout_s
        self._staging_locks: dict[Path, FileLock] = {}

    # ------------------------------------------------------------------ connections
    def exists(self) -> bool:
        return self.db_path.is_file()

    @contextmanager
    def connect(self, read_only: bool = True, view: bool = True,
                repairing: bool = False) -> Iterator[duckdb.DuckDBPyConnection]:
        """A connection; waits while another process holds the database.

        A read-only connection to a store that does not exist yet raises StoreError. With
        ``view=False`` a connection does not define the observations view (which reads every
        live parquet file): the integrity check and the repair use it to find bad files.
        A store whose database is lost while parquet files remain is refused, for reading
        and writing, unless ``repairing`` (see :mod:`harmonize.repair`).
        """
        if not self.exists():
            lost = self.lost()
            if lost and not repairing:
                raise StoreError(lost)
            if read_only:
                raise StoreError(f"no store at {self.directory}; ingest a file first ('harmonize ingest')")
        self.directory.mkdir(parents=True, exist_ok=True)
        writer = None
        if not read_only:
            # writers queue on an OS lock first (released by the kernel if the holder dies)
            writer = FileLock(self.directory / WRITE_LOCK)
            if not writer.acquire(self.lock_timeout_s):
                who = writer.holder()
                raise StoreBusyError(
                    f"the store is busy (another harmonize process{', ' + who if who else ''}, is writing); "
                    f"waited {self.lock_timeout_s:g} s. Try again when it has finished."
                )
        try:
            con = self._open(read_only)
        except BaseException:
            if writer is not None:
                writer.release()
            raise
        interrupts.track(con)
        try:
            # times are read and shown in UTC whatever the machine's zone
            con.execute("SET TimeZone = 'UTC'")
            self._search_here(con)
            if read_only:
                if view:
                    self._define_view(con, temporary=True)
            else:
                con.execute(_SCHEMA_SQL)
                parts.ensure_tables(con)
                self._check_version(con)
                if view:
                    self._define_view(con, temporary=False)
            if not repairing:
                self._refresh_marker(con)
            yield con
        finally:
            interrupts.untrack(con)
            con.close()
            if writer is not None:
                writer.release()

    def _open(self, read_only: bool) -> duckdb.DuckDBPyConnection:
        deadline = time.monotonic() + self.lock_timeout_s
        delay = 0.05
        while True:
            try:
                return connections.connect(str(self.db_path), read_only=read_only)
            except duckdb.IOException as exc:
                text = str(exc)
                if "lock" not in text.lower():
                    raise StoreError(f"cannot open the store {self.db_path}: {text}") from None
                if time.monotonic() >= deadline:
                    pid = _LOCK_RE.search(text)
                    who = f"another harmonize process, PID {pid.group(1)}" if pid else "another process"
                    raise StoreBusyError(
                        f"the store is busy ({who}); waited {self.lock_timeout_s:g} s. "
                        "Try again when it has finished."
                    ) from None
                time.sleep(delay)
                delay = min(delay * 2, 1.0)

    def _check_version(self, con: duckdb.DuckDBPyConnection) -> None:
        row = con.execute("SELECT value FROM store_meta WHERE key = 'contract_version'").fetchall()
        if not row:
            con.execute(
                "INSERT INTO store_meta VALUES ('contract_version', ?), ('created_by', ?), ('created_at', ?)",
                [CONTRACT_VERSION, f"harmonize {__version__}", pd.Timestamp.now("UTC").isoformat()],
            )
        elif row[0][0] != CONTRACT_VERSION:
            raise StoreError(
                f"the store at {self.directory} uses contract version {row[0][0]}, this harmonize "
                f"{__version__} writes version {CONTRACT_VERSION}"
            )
        # the tables of _SCHEMA_SQL exist now (created when missing): record the store version
        found = con.execute("SELECT value FROM store_meta WHERE key = 'store_version'").fetchall()
        version = int(found[0][0]) if found else 1
        if version > STORE_VERSION:
            raise StoreError(
                f"the store at {self.directory} was written by a newer harmonize (store version {version}, "
                f"this harmonize {__version__} knows version {STORE_VERSION}); upgrade harmonize"
            )
        if version < STORE_VERSION:
            self._migrate(con, version)
            con.execute("DELETE FROM store_meta WHERE key = 'store_version'")
            con.execute("INSERT INTO store_meta VALUES ('store_version', ?)", [str(STORE_VERSION)])

    def _migrate(self, con: duckdb.DuckDBPyConnection, version: int) -> None:
        """Bring a store of an older ``version`` up to :data:`STORE_VERSION` (tables exist already)."""
        con.execute(_ADDED_COLUMNS_SQL)
        if version < 3:
            # Checksums of the files an older store lists, taken now: they protect the files from
            # this moment on (a file damaged before cannot be told from its checksum; the row
            # count of its footer and a full read still are checked).
            missing = con.execute("SELECT DISTINCT path FROM observation_files WHERE sha256 IS NULL").fetchall()
            for (rel,) in missing:
                path = self.directory / rel
                if path.is_file():
                    sha, size = file_digest(path)
                    con.execute("UPDATE observation_files SET sha256 = ?, size_bytes = ? WHERE path = ?",
                                [sha, size, rel])
            con.execute("DELETE FROM store_meta WHERE key = 'checksums_since'")
            con.execute("INSERT INTO store_meta VALUES ('checksums_since', ?)",
                        [pd.Timestamp.now("UTC").isoformat()])
        if version < 7:
            # the merge rule of each ingest, read from its part files' footers (the views read it
            # so until now: recorded, later readers need not open the footers)
            try:
                inferred = parts.rules_from_parts(con, "i.status = 'complete' AND i.merge_rule IS NULL")
            except duckdb.Error:
                inferred = {}  # unreadable files: the readers infer again; 'status --check' names them
            if inferred:
                con.executemany("UPDATE ingests SET merge_rule = ? WHERE ingest_id = ?",
                                [[rule, ingest] for ingest, (_, rule) in inferred.items()])
        if version < 4:
            # the persisted views of an older store name absolute paths and cast naive times in
            # the session's zone: rewritten now (relative paths, naive times read as UTC); a
            # store whose files cannot be read keeps them until a writer with the view runs
            try:
                self._define_view(con, temporary=False)
            except StoreError:
                pass

    def live_paths(self, con: duckdb.DuckDBPyConnection) -> list[str]:
        """The parquet files of the complete ingests, relative to the store folder (sorted)."""
        return self._live_paths(con)

    def _parts_gone(self, con: duckdb.DuckDBPyConnection, missing: Sequence[str] | None = None,
                    n_live: int | None = None) -> str | None:
        """One line when live parquet files listed in the manifest are missing (None otherwise).

        Without ``missing``, says so only when the ``observations/`` folder is gone while live
        files are listed (one line instead of one per file; :meth:`_scrub` names single files).
        """
        if missing is None:
            if (self.directory / OBSERVATIONS_DIR).is_dir():
                return None
            try:
                paths = self._live_paths(con)
            except duckdb.CatalogException:
                return None
            missing, n_live = paths, len(paths)
        if not missing:
            return None
        n_ingests = con.execute(
            "SELECT count(DISTINCT ingest_id) FROM observation_files WHERE path = ANY(?::VARCHAR[])",
            [list(missing)]).fetchall()[0][0]
        folder = self.directory / OBSERVATIONS_DIR
        where = f"{folder} is missing" if not folder.is_dir() else f"e.g. {missing[0]}"
        return (f"the store's parquet files are gone: {len(missing):,} of the {n_live:,} live file(s) of "
                f"{n_ingests:,} ingest(s) the manifest lists are missing ({where}); the store is damaged, not "
                "empty: 'harmonize status --check' names the files, 'harmonize repair' takes their ingests out")

    def _live_paths(self, con: duckdb.DuckDBPyConnection) -> list[str]:
        rows = con.execute(
            """SELECT f.path FROM observation_files f JOIN ingests i USING (ingest_id)
               WHERE i.status = 'complete' ORDER BY f.path"""
        ).fetchall()
        # relative to the store folder (the connection's file_search_path): the persisted
        # views still read when the study folder moves
        return [r[0] for r in rows]

    def _search_here(self, con: duckdb.DuckDBPyConnection) -> None:
        """Resolve relative parquet paths against the store folder (the views name their files
        relative to it, so that a moved study folder still reads)."""
        folder = sql_text(str(self.directory))
        con.execute(f"SET file_search_path = {folder}")

    def _define_view(self, con: duckdb.DuckDBPyConnection, temporary: bool, flagged: bool = True) -> None:
        """(Re)define the observations views over the live files (``flagged=False``: only
        ``observation_parts`` and ``observations_base``, which the commit hooks read)."""
        sqls = self._base_view_sql(con)
        if flagged:
            sqls |= _flagged_view_sqls(con)
        self._create_views(con, sqls, temporary)

    def _base_view_sql(self, con: duckdb.DuckDBPyConnection) -> dict[str, str]:
        """The SELECTs of ``observation_parts`` and ``observations_base`` over the live files."""
        self._search_here(con)
        try:
            paths = self._live_paths(con)
        except duckdb.CatalogException:
            paths = []
        cols = observation_sql_columns()
        present: set[str] = set()
        if paths:
            missing_files = [p for p in paths if not (self.directory / p).is_file()]
            if missing_files:
                raise StoreError(self._parts_gone(con, missing_files, len(paths)) or "")
            if _GLOB_CHARS.search(str(self.directory)):
                # DuckDB globs the folders of file_search_path ("glob[1]*{a,b}" finds nothing):
                # such a store names its files by their full paths, which DuckDB finds as they are
                # (the views then break when the study folder moves)
                paths = [str(self.directory / p) for p in paths]
            try:
                naive = _naive_time_files(con, paths)
            except duckdb.Error:
                naive = set()  # unreadable files: reported by the DESCRIBE below
            source = _parquet_source([p for p in paths if p not in naive])
            if naive:
                # files of a store written before times carried their zone (store version < 4)
                # hold UTC wall clocks: timezone('UTC', ...) reads them as UTC in any session zone
                old = _parquet_source(sorted(naive))
                fix = ", ".join(f"timezone('UTC', \"{c}\") AS \"{c}\"" for c in _TIME_COLUMNS)
                old = f"(SELECT * REPLACE ({fix}) FROM {old})"
                source = f"(SELECT * FROM {source} UNION ALL BY NAME SELECT * FROM {old})" if len(naive) < len(paths) else old
            # Files written before a column joined the contract lack it: it reads as null.
            try:
                present = {r[0] for r in con.execute(f"DESCRIBE SELECT * FROM {source}").fetchall()}
            except duckdb.Error as exc:
                raise StoreError(
                    f"the store's parquet files cannot be read ({str(exc).splitlines()[0]}); "
                    "run 'harmonize status --check' to see which files are missing or damaged, and "
                    "'harmonize repair' to take them out of the store"
                ) from None
        else:
            source = "(SELECT 1 LIMIT 0)"
        missing = {
            # files written before density_unit joined the contract: derived from their units
            "density_unit": f"CASE WHEN density IS NOT NULL THEN {units.density_unit_sql('unit', 'effort_unit')} END",
        }
        select = ", ".join(
            f'CAST("{c}" AS {t}) AS "{c}"' if c in present
            else f'CAST({missing[c] if c in missing and paths else "NULL"} AS {t}) AS "{c}"'
            for c, t in cols + list(parts.PART_COLUMNS)
        )
        # the parquet rows as written (with the mergeable parts of values that span files);
        # observations_base holds one row per value, the parts of gridded and effort values
        # merged across the live ingests of their source (harmonize.parts)
        edges = parts.EDGES_TABLE if has_table(con, parts.EDGES_TABLE) else None
        return {"observation_parts": f"SELECT {select} FROM {source}",
                "observations_base": parts.merged_sql("observation_parts", parts.merge_rules(con), edges)}

    def _create_views(self, con: duckdb.DuckDBPyConnection, sqls: dict[str, str], temporary: bool) -> None:
        """Create the views ``sqls`` (name -> SELECT), skipping those the database holds already.

        Creating a view binds its whole stack of views down to the parquet footers (about a
        quarter of a second on the demo store, paid by every command). The SELECT of each
        persisted view is recorded by its digest in ``store_meta``; a view whose SELECT is
        unchanged is not created again, and a reading connection whose views are all current
        uses the persisted ones instead of defining temporary ones. Any change of the live
        files, of the flags' kinds or of the code that writes the SELECTs changes the text and
        so the digest.
        """
        digests = {name: hashlib.sha256(sql.encode()).hexdigest() for name, sql in sqls.items()}
        recorded = _recorded_view_digests(con)
        if temporary:
            if any(recorded.get(name) != d for name, d in digests.items()):
                for name, sql in sqls.items():
                    con.execute(f"CREATE OR REPLACE TEMP VIEW {name} AS {sql}")
            return
        for name, sql in sqls.items():
            if recorded.get(name) == digests[name]:
                continue
            con.execute(f"CREATE OR REPLACE VIEW {name} AS {sql}")
            con.execute("DELETE FROM store_meta WHERE key = ?", [_VIEW_KEY + name])
            con.execute("INSERT INTO store_meta VALUES (?, ?)", [_VIEW_KEY + name, digests[name]])

    def _define_flagged_view(self, con: duckdb.DuckDBPyConnection, temporary: bool) -> None:
        """(Re)define ``observations`` (and ``current``): ``observations_base`` with the
        store-wide flags of the ``store_flags`` table (which the commit hooks write, e.g.
        probable_duplicate and high_count of harmonize.twins) added to ``flags``."""
        self._create_views(con, _flagged_view_sqls(con), temporary)

    # ------------------------------------------------------------------ ingest support
    def previous_ingests(self, source_id: str, file_path: str, inputs_sha256: str) -> pd.DataFrame:
        """Complete ingests of this source that read the same file (path relative to the study) or content.

        An ingest is identified by its source, its main input's path relative to the study
        and the content of its inputs: another file that shares only the base name
        (``2019/hauls.csv`` after ``2020/hauls.csv``) is a new ingest. Ingests recorded before
        paths were kept (store version < 3) are matched by base name.
        """
        if not self.exists():
            return pd.DataFrame(columns=["ingest_id", "inputs_sha256", "config_sha256", "file_name", "file_path",
                                         "started_at"])
        with self.connect(read_only=True, view=False) as con:
            return self._previous(con, source_id, file_path, inputs_sha256)

    @staticmethod
    def _previous(con: duckdb.DuckDBPyConnection, source_id: str, file_path: str, inputs_sha256: str) -> pd.DataFrame:
        columns = {r[0] for r in con.execute("DESCRIBE ingests").fetchall()}
        path_col = "file_path" if "file_path" in columns else "CAST(NULL AS VARCHAR)"
        return con.execute(
            f"""SELECT ingest_id, inputs_sha256, config_sha256, file_name, {path_col} AS file_path, started_at
                FROM ingests
                WHERE status = 'complete' AND source_id = ?
                  AND (inputs_sha256 = ? OR coalesce({path_col} = ?, file_name = ?))
                ORDER BY started_at""",
            [source_id, inputs_sha256, file_path, PurePosixPath(file_path).name],
        ).df()

    def staging_dir(self, ingest_id: str) -> Path:
        """A private folder for one ingest's files, locked (``<ingest_id>.lock`` beside it) while
        this process works in it; :meth:`discard` removes both."""
        staging = self.directory / STAGING_DIR
        staging.mkdir(parents=True, exist_ok=True)
        lock = FileLock(staging / f"{ingest_id}{LOCK_SUFFIX}")
        if not lock.try_acquire():
            raise StoreError(f"staging folder {ingest_id} is in use by another process")
        path = staging / ingest_id
        try:
            path.mkdir(exist_ok=False)
        except BaseException:
            lock.release()
            raise
        self._staging_locks[path] = lock
        return path

    def write_observations(self, staged: Path, blocks: Iterable[pa.Table], record: IngestRecord,
                           files: Sequence[dict[str, object]]) -> tuple[int, int]:
        """Write an ingest's observation rows (Arrow tables) into its staging folder.

        The store alone decides the layout (:mod:`harmonize.store_layout`): partition folders,
        file names, and the key-value metadata each file carries (``record`` and the input
        ``files``, so that a file read alone says where it came from). Returns (rows written,
        zero-filled rows written); :meth:`commit` then moves the files into place.
        """
        return store_layout.write_blocks(blocks, staged / PARTS_DIR, provenance(record, files))

    def commit(
        self,
        record: IngestRecord,
        files: Sequence[dict[str, object]],
        staged: Path,
        quarantine: pd.DataFrame,
        supersede: Sequence[str],
        on_conflict: callable,  # type: ignore[valid-type]
        masked: pd.DataFrame | None = None,
        events_without_values: pa.Table | None = None,
        track_edges: pa.Table | None = None,
        edge_parts: pa.Table | None = None,
    ) -> list[str]:
        """Move staged parquet files into place and record the ingest in one transaction.

        ``on_conflict(previous)`` is called under the write lock with the ingests that now
        match this one (another process may have committed meanwhile); it returns the ids
        to supersede or raises. Returns the superseded ingest ids.

        ``events_without_values`` (columns :data:`EVENTS_WITHOUT_VALUES_COLUMNS` but
        ingest_id) are the ingest's accepted events that yield no observation row; they are
        recorded in the same transaction; so are ``track_edges``, the pings at the edges of
        a ping file, and ``edge_parts``, the rows of their cell-periods (harmonize.parts).
        """
        with self.connect(read_only=False) as con:
            self._remove_leftovers(con)
            previous = self._previous(con, record.source_id, record.file_path or record.file_name,
                                      record.inputs_sha256)
            supersede = list(on_conflict(previous))
            moved: list[tuple[str, int, str, int]] = []
            parts = sorted((staged / PARTS_DIR).rglob("*.parquet"))
            # the journal: where this ingest's files go, written before the first one moves, so
            # that whoever cleans up after a kill deletes these files and no others
            journal = [(Path(OBSERVATIONS_DIR) / p.relative_to(staged / PARTS_DIR)).as_posix() for p in parts]
            seal_rel = f"{SEALS_DIR}/{record.ingest_id}.json"
            journal.append(seal_rel)
            (staged / JOURNAL_NAME).write_text(json.dumps(journal))
            fsync_file(staged / JOURNAL_NAME)
            fsync_dir(staged)
            folders: set[Path] = set()
            for part in parts:
                rel = Path(OBSERVATIONS_DIR) / part.relative_to(staged / PARTS_DIR)
                target = self.directory / rel
                for folder in (target.parent, target.parent.parent, target.parent.parent.parent):
                    if not folder.is_dir():
                        folders.add(folder.parent)  # a new folder's own entry lives in its parent
                target.parent.mkdir(parents=True, exist_ok=True)
                n_rows = con.execute("SELECT count(*) FROM read_parquet(?)", [str(part)]).fetchall()[0][0]
                sha, size = file_digest(part)
                fsync_file(part)  # the bytes on the disk before the manifest names them
                os.replace(part, target)
                folders.add(target.parent)
                moved.append((rel.as_posix(), int(n_rows), sha, size))
                faults.point("moving")
            # the seal: the complete list of the ingest's files, moved in last (a manifest rebuild
            # takes an ingest whose seal is missing for one that never committed)
            seal = staged / "seal.json"
            seal.write_text(json.dumps({"version": store_layout.METADATA_VERSION, "ingest_id": record.ingest_id,
                                        "parts": [{"path": rel, "rows": n, "sha256": sha, "size_bytes": size}
                                                  for rel, n, sha, size in moved],
                                        "metadata": provenance(record, files)}, indent=1, default=str) + "\n")
            fsync_file(seal)
            (self.directory / SEALS_DIR).mkdir(exist_ok=True)
            os.replace(seal, self.directory / seal_rel)
            folders.update({self.directory / SEALS_DIR, self.directory})
            for folder in sorted(folders, key=lambda f: len(f.parts), reverse=True):
                fsync_dir(folder)  # the renames durable before the commit that makes them live
            faults.point("before_transaction")
            with interrupts.deferred():  # an interrupt waits for the commit or the rollback
                return self._record(con, record, files, moved, staged, quarantine, supersede, masked,
                                    events_without_values, track_edges, edge_parts)

    def _record(self, con: duckdb.DuckDBPyConnection, record: IngestRecord, files: Sequence[dict[str, object]],
                moved: list[tuple[str, int, str, int]], staged: Path, quarantine: pd.DataFrame,
                supersede: list[str], masked: pd.DataFrame | None,
                events_without_values: pa.Table | None, track_edges: pa.Table | None = None,
                edge_parts: pa.Table | None = None) -> list[str]:
        """The commit's one transaction: the ingest, its files, quarantine and events, the view."""
        con.execute("BEGIN TRANSACTION")
        try:
            if supersede:
                con.execute(
                    "UPDATE ingests SET status = 'superseded', superseded_by = ? WHERE ingest_id = ANY(?::VARCHAR[])",
                    [record.ingest_id, list(supersede)],
                )
            con.execute(
                """INSERT INTO ingests (ingest_id, source_id, source_kind, provider_type, file_name,
                   file_sha256, inputs_sha256, config_sha256, started_at, finished_at, status,
                   rows_read, rows_accepted, rows_quarantined, records_written,
                   records_zero_filled, superseded_by, tool_version, profile_file, file_path, row_traced,
                   merge_rule)
                   VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, NULL, ?, ?, ?, ?, ?)""",
                [record.ingest_id, record.source_id, record.source_kind, record.provider_type,
                 record.file_name, record.file_sha256, record.inputs_sha256, record.config_sha256,
                 record.started_at, record.finished_at, record.status, record.rows_read,
                 record.rows_accepted, record.rows_quarantined, record.records_written,
                 record.records_zero_filled, __version__, record.profile_file,
                 record.file_path or record.file_name, bool(record.row_traced), record.merge_rule],
            )
            for f in files:
                con.execute(
                    "INSERT INTO ingest_files VALUES (?, ?, ?, ?, ?, ?, ?)",
                    [record.ingest_id, f["role"], f["file_name"], f["file_sha256"],
                     f["rows_read"], f["rows_accepted"], f["rows_quarantined"]],
                )
            for rel, n_rows, sha, size in moved:
                con.execute("INSERT INTO observation_files (ingest_id, path, n_rows, sha256, size_bytes) "
                            "VALUES (?, ?, ?, ?, ?)", [record.ingest_id, rel, n_rows, sha, size])
            if len(quarantine):
                q = quarantine[["source_file", "source_row", "reason_code", "message", "raw"]].copy()
                q.insert(0, "ingest_id", record.ingest_id)
                con.register("_incoming_quarantine", q)
                con.execute("INSERT INTO quarantine SELECT * FROM _incoming_quarantine")
                con.unregister("_incoming_quarantine")
            if masked is not None and len(masked):
                m = masked[["source_file", "reason_code", "n_values", "message"]].copy()
                m.insert(0, "ingest_id", record.ingest_id)
                con.register("_incoming_masked", m)
                con.execute("INSERT INTO quarantine_summary SELECT * FROM _incoming_masked")
                con.unregister("_incoming_masked")
            if events_without_values is not None and events_without_values.num_rows:
                con.register("_incoming_events", events_without_values)
                names = ", ".join(f'"{c}"' for c in EVENTS_WITHOUT_VALUES_COLUMNS[1:])
                con.execute(f"INSERT INTO events_without_values (ingest_id, {names}) "
                            f"SELECT ?, {names} FROM _incoming_events", [record.ingest_id])
                con.unregister("_incoming_events")
                faults.point("events_without_values")
            if track_edges is not None and track_edges.num_rows:
                parts.record_edges(con, record.ingest_id, record.source_id, track_edges, edge_parts)
            self.refresh_live(con, record)
            faults.point("before_commit")
            con.execute("COMMIT")
            faults.point("after_commit")
        except BaseException:
            _rollback(con)
            raise
        self.publish_index(con)
        self._write_marker(record.ingest_id)
        shutil.rmtree(staged, ignore_errors=True)
        return supersede

    def refresh_live(self, con: duckdb.DuckDBPyConnection, record: IngestRecord | None = None) -> None:
        """After the live set changed, inside the caller's transaction: redefine the views over
        the live files and run the commit hooks (``record``: the ingest being committed, None
        for a change that commits no ingest, such as a repair)."""
        self._define_view(con, temporary=False, flagged=False)
        # what spans sources and ingests (the volunteer twins) is recomputed over the whole
        # store by the commit hooks, in this transaction
        for hook in commit_hooks():
            hook(con, record)
        self._define_flagged_view(con, temporary=False)

    def publish_index(self, con: duckdb.DuckDBPyConnection) -> None:
        """After a commit that changed the live set: rewrite ``store/index/`` (the store-wide
        flags and the live part files as plain parquet, for readers without harmonize)."""
        try:
            store_layout.write_index(con, self.directory, STORE_VERSION, CONTRACT_VERSION)
        except (OSError, pa.ArrowException, duckdb.Error) as exc:
            # the commit stands; the index is derived and 'status --check' rewrites it
            logger.warning("store/%s/ not rewritten after the commit (%s); 'harmonize status --check' "
                           "rewrites it", store_layout.INDEX_DIR, exc)

    def _remove_leftovers(self, con: duckdb.DuckDBPyConnection) -> None:
        """Delete what ingests that died left behind: their staging folders, and the files
        their journals say they moved into place without committing them.

        Runs under the write lock, so no other process is moving files into place. A parquet
        file that no manifest row and no journal names is never deleted here: it is not known
        to be a leftover (``harmonize repair`` lists such files and sets them aside).
        """
        staging = self.directory / STAGING_DIR
        if not staging.is_dir():
            return
        known: set[str] | None = None
        for folder in staging.iterdir():
            if not folder.is_dir():
                if folder.suffix == LOCK_SUFFIX and not (staging / folder.stem).exists() and is_free(folder):
                    folder.unlink(missing_ok=True)  # a lock whose folder is gone
                continue
            lock = self._abandoned(folder)
            if lock is None:
                continue
            try:
                planned = json.loads((folder / JOURNAL_NAME).read_text())
            except (OSError, ValueError):
                planned = []
            if planned:
                if known is None:
                    known = {r[0] for r in con.execute("SELECT path FROM observation_files").fetchall()}
                    known |= {f"{SEALS_DIR}/{r[0]}.json" for r in con.execute("SELECT ingest_id FROM ingests").fetchall()}
                for rel in planned:
                    if isinstance(rel, str) and rel not in known and _inside(self.directory, rel):
                        (self.directory / rel).unlink(missing_ok=True)
            shutil.rmtree(folder, ignore_errors=True)
            lock.path.unlink(missing_ok=True)
            lock.release()

    def _abandoned(self, folder: Path) -> FileLock | None:
        """The lock of a staging folder whose process is gone, taken; None while it works.

        The lock file is made before the folder, so a folder without one was left by a
        harmonize older than the locks (it marked its folders with a ``.pid`` file).
        """
        lock = FileLock(folder.parent / f"{folder.name}{LOCK_SUFFIX}")
        if lock.path.exists():
            return lock if lock.try_acquire() else None
        try:
            pid = int((folder / ".pid").read_text())
        except (OSError, ValueError):
            pid = -1
        if pid != os.getpid() and not _alive(pid):
            return lock if lock.try_acquire() else None
        return None

    def unlisted_files(self) -> list[str]:
        """Parquet files under ``observations/`` that no manifest row names (paths relative to the store)."""
        obs_dir = self.directory / OBSERVATIONS_DIR
        if not obs_dir.is_dir():
            return []
        on_disk = {p.relative_to(self.directory).as_posix() for p in obs_dir.rglob("*.parquet")}
        if not self.exists():
            return sorted(on_disk)
        with self.connect(view=False) as con:
            known = {r[0] for r in con.execute("SELECT path FROM observation_files").fetchall()}
        return sorted(on_disk - known)

    def discard(self, staged: Path) -> None:
        """Remove a staging folder of this process and release its lock."""
        shutil.rmtree(staged, ignore_errors=True)
        lock = self._staging_locks.pop(staged, None)
        if lock is not None:
            lock.path.unlink(missing_ok=True)  # still ours while held: nobody else removes it
            lock.release()

    # ------------------------------------------------------------------ reading
    def ingests(self, include_superseded: bool = True) -> pd.DataFrame:
        """The ingests table (``include_superseded=False``: complete ingests only)."""
        with self.connect(view=False) as con:
            if not has_table(con, "ingests"):
                # a database a first writer created and was interrupted before it made the
                # tables: no ingest yet (the next writer makes them)
                return pd.DataFrame(columns=["ingest_id", "source_id", "status", "started_at"])
            where = "" if include_superseded else "WHERE status = 'complete'"
            return con.execute(f"SELECT * FROM ingests {where} ORDER BY started_at").df()

    def summary(self, by: Sequence[str] = ("source_kind", "season_year", "season", "depth_layer")) -> pd.DataFrame:
        """Observation rows and events grouped by the given columns."""
        cols = ", ".join(f'"{c}"' for c in by)
        with self.connect() as con:
            return con.execute(
                f"""SELECT {cols}, count(*) AS rows, count(DISTINCT source_id || '/' || event_id) AS events,
                           sum(CASE WHEN zero_filled THEN 1 ELSE 0 END) AS zero_filled
                    FROM observations GROUP BY ALL ORDER BY ALL"""
            ).df()

    def masked_summary(self) -> pd.DataFrame:
        """Values rejected in bulk (grid values, pings) per source, file and reason."""
        with self.connect(view=False) as con:
            return con.execute(
                """SELECT i.source_id, m.source_file, m.reason_code, sum(m.n_values)::BIGINT AS n_values,
                          any_value(m.message) AS message
                   FROM quarantine_summary m JOIN ingests i USING (ingest_id)
                   WHERE i.status = 'complete' GROUP BY ALL ORDER BY ALL"""
            ).df()

    def events_without_values(self, ingest_id: str | None = None, source_id: str | None = None) -> pd.DataFrame:
        """Accepted events of complete ingests that yield no observation row.

        One row per event, with its tags, effort, flags and input row (columns
        :data:`EVENTS_WITHOUT_VALUES_COLUMNS`); empty for a store written before the table
        existed (store version 1). Superseded ingests' events are left out, as their
        observations are.
        """
        cols = ", ".join(f'e."{c}"' for c in EVENTS_WITHOUT_VALUES_COLUMNS)
        with self.connect(view=False) as con:
            if not has_table(con, "events_without_values"):
                return pd.DataFrame({c: pd.Series(dtype=object) for c in EVENTS_WITHOUT_VALUES_COLUMNS})
            sql = f"""SELECT {cols} FROM events_without_values e JOIN ingests i USING (ingest_id)
                      WHERE i.status = 'complete'"""
            params: list[object] = []
            for col, value in (("e.ingest_id", ingest_id), ("e.source_id", source_id)):
                if value is not None:
                    sql += f" AND {col} = ?"
                    params.append(value)
            sql += " ORDER BY e.source_kind, e.source_id, e.event_start, e.event_id"
            return con.execute(sql, params).df()

    def quarantine(self, ingest_id: str | None = None, reason: str | None = None,
                   source_id: str | None = None, limit: int | None = None) -> pd.DataFrame:
        """Rejected rows of complete ingests (newest ingest first), optionally filtered."""
        sql = """SELECT q.ingest_id, i.source_id, q.source_file, q.source_row, q.reason_code, q.message, q.raw
                 FROM quarantine q JOIN ingests i USING (ingest_id)
                 WHERE i.status = 'complete'"""
        params: list[object] = []
        for col, value in (("q.ingest_id", ingest_id), ("q.reason_code", reason), ("i.source_id", source_id)):
            if value is not None:
                sql += f" AND {col} = ?"
                params.append(value)
        sql += " ORDER BY i.started_at DESC, q.source_file, q.source_row"
        if limit is not None:
            sql += f" LIMIT {int(limit)}"
        with self.connect(view=False) as con:  # readable even while a parquet file is damaged
            return con.execute(sql, params).df()

    def lost_files(self) -> list[Path]:
        """Parquet files under ``observations/`` while the database is missing (a lost database).

        Empty when the database exists, or when no parquet file does (an empty study; staging
        folders of an unfinished first ingest are no store yet).
        """
        if self.exists():
            return []
        obs_dir = self.directory / OBSERVATIONS_DIR
        return sorted(obs_dir.rglob("*.parquet")) if obs_dir.is_dir() else []

    @property
    def marker(self) -> Path:
        """Beside the store folder, ``.<folder name>.ingested``: written after every commit, so that
        a store folder deleted later is told apart from a study never ingested."""
        return self.directory.with_name(f".{self.directory.name}.ingested")

    def _folder_identity(self) -> list[int] | None:
        try:
            st = os.stat(self.directory.parent)
        except OSError:
            return None
        return [st.st_dev, st.st_ino]

    def _marker_applies(self, doc: dict) -> bool:
        """Whether a marker was written for this folder: the folder holding it has the recorded
        path or the recorded device and inode (it was moved). A copy of the study made without
        its store folder has neither: it is a new, empty study."""
        return (doc.get("folder") == str(self.directory.parent)
                or (doc.get("folder_id") is not None and doc.get("folder_id") == self._folder_identity()))

    def _refresh_marker(self, con: duckdb.DuckDBPyConnection) -> None:
        """Write the marker when it is missing or was written for another folder (a store of an
        older version, or a study copied with its store) while the store holds ingests."""
        try:
            doc = json.loads(self.marker.read_text())
            if isinstance(doc, dict) and self._marker_applies(doc):
                return
        except (OSError, ValueError):
            pass
        try:
            last = con.execute("SELECT max(ingest_id) FROM ingests").fetchall()[0][0]
        except duckdb.Error:
            return
        if last is not None:
            self._write_marker(last, quiet=True)  # a read-only study folder is no error for a reader

    def _write_marker(self, ingest_id: str, quiet: bool = False) -> None:
        text = json.dumps({"store": self.directory.name, "last_ingest": ingest_id,
                           "committed_at": pd.Timestamp.now("UTC").isoformat(),
                           "folder": str(self.directory.parent), "folder_id": self._folder_identity()})
        tmp = self.marker.with_name(self.marker.name + ".tmp")
        try:
            tmp.write_text(text + "\n")
            os.replace(tmp, self.marker)
        except OSError as exc:  # the commit stands; only the evidence of it outside the store is missing
            try:
                tmp.unlink(missing_ok=True)
            except OSError:
                pass
            log = logger.debug if quiet else logger.warning
            log("could not write %s (%s); a deleted store folder would look like an empty study",
                self.marker, exc.strerror or exc)

    def lost(self) -> str | None:
        """Why the store is lost (one line), or None: an empty study and a sound store are not lost.

        Lost: the database is missing while parquet files remain (:meth:`lost_files`), or the
        database and every parquet file are missing while the marker beside the store folder
        says ingests were committed here (the store folder was deleted; a copy of the study made without its store is not lost). A store whose database
        remains but whose parquet files are gone is found by :meth:`check` and refused by
        every reading connection (see :meth:`_define_view`).
        """
        if self.exists():
            return None
        files = self.lost_files()
        seals = self.directory / SEALS_DIR
        if files or (seals.is_dir() and any(seals.glob("*.json"))):
            return self._lost_message(files)
        if self.marker.is_file():
            try:
                doc = json.loads(self.marker.read_text())
                if not isinstance(doc, dict):
                    raise ValueError("not an object")
            except (OSError, ValueError):
                doc = {}
            if doc and not self._marker_applies(doc):
                logger.info("%s was written for %s: a copy of the study without its store is an empty study",
                            self.marker, doc.get("folder"))
                return None
            last = doc.get("last_ingest", "?")
            return (f"the store at {self.directory} is gone (no database, no parquet files), but this study has "
                    f"committed ingests (the last: {last}, recorded in {self.marker.name}); it is a lost store, not "
                    "an empty study: restore the store folder from a backup, or run 'harmonize repair' to see what "
                    "it would do")
        return None

    def _lost_message(self, lost: Sequence[Path]) -> str:
        return (f"the store's database {self.db_path} is missing, but {len(lost):,} parquet file(s) remain "
                f"under {self.directory / OBSERVATIONS_DIR} (and the seals of its ingests under "
                f"{self.directory / SEALS_DIR}); nothing is written until the store is repaired: run 'harmonize "
                "repair --rebuild-manifest' to see how the database would be rebuilt from them, or 'harmonize "
                "repair' to set them aside and start an empty store")

    def store_version(self) -> int:
        """The version of the store's tables (1 when the store predates the key; 0 when the
        database holds no tables yet: its first writer was stopped before it created them)."""
        with self.connect(view=False) as con:
            if not has_table(con, "store_meta"):
                return 0
            found = con.execute("SELECT value FROM store_meta WHERE key = 'store_version'").fetchall()
        return int(found[0][0]) if found else 1

    def upgrade(self) -> bool:
        """Bring an older store up to :data:`STORE_VERSION`; False when it cannot be written now."""
        if self.store_version() >= STORE_VERSION:
            return True
        try:
            with self.connect(read_only=False, view=False):
                pass
        except (StoreError, OSError, duckdb.Error):
            return False
        return True

    def damage(self, deep: bool = True) -> list[Damage]:
        """Live manifest files that are missing, changed or unreadable (see :meth:`check`)."""
        with self.connect(view=False) as con:
            return self._scrub(con, deep)

    def _scrub(self, con: duckdb.DuckDBPyConnection, deep: bool = True) -> list[Damage]:
        columns = {r[0] for r in con.execute("DESCRIBE observation_files").fetchall()}
        digests = "f.sha256, f.size_bytes" if "sha256" in columns else "NULL, NULL"  # store version < 3
        files = con.execute(
            f"""SELECT f.ingest_id, f.path, f.n_rows, {digests} FROM observation_files f
                JOIN ingests i USING (ingest_id) WHERE i.status = 'complete' ORDER BY f.path, f.ingest_id"""
        ).fetchall()
        found: list[Damage] = []
        for ingest_id, rel, n_rows, sha_recorded, size_recorded in files:
            problem = _file_problem(self.directory / rel, n_rows, sha_recorded, size_recorded, deep)
            if problem:
                found.append(Damage(ingest_id, rel, problem))
        return found

    def check(self, deep: bool = True, legacy_row_traced_kinds: Sequence[str] = ()) -> list[str]:
        """Integrity problems (empty list = the store is sound).

        Checks that the database is there when parquet files are (a lost database is a
        problem, an empty study is not); that every live manifest file exists, has the size
        and sha256 recorded when it was committed, is readable to the last page (``deep``)
        and holds the rows the manifest says; that every complete ingest satisfies
        rows_read = rows_accepted + rows_quarantined and records_written = rows in its files;
        and that every data row of every input file of the ingests recorded as row-traced
        (``ingests.row_traced``, written at commit) is found among the accepted rows or in the
        quarantine. Ingests committed before store version 6 did not record it: theirs are traced
        when their source kind is among ``legacy_row_traced_kinds`` (the caller, which knows the
        adapters, passes the row-traced kinds; the store knows no source kind). A store of an older
        version is brought up to date first (which records the checksums of its files) when the
        store can be written.
        """
        lost = self.lost()
        if lost:
            return [lost]
        if not self.exists():
            return []
        self.upgrade()
        with self.connect(view=False) as con:
            gone = self._parts_gone(con)
            if gone:
                return [gone]
            problems = [str(d) for d in self._scrub(con, deep)]
            if problems:
                return problems
            stale = store_layout.index_problem(con, self.directory)
        if stale:
            problems += self._renew_index(stale)
        with self.connect(view=False) as con:
            self._define_view(con, temporary=True)
            bad = con.execute(
                """SELECT ingest_id, rows_read, rows_accepted, rows_quarantined FROM ingests
                   WHERE status = 'complete' AND rows_read <> rows_accepted + rows_quarantined"""
            ).fetchall()
            problems += [f"ingest {i}: rows_read {r} <> accepted {a} + quarantined {q}" for i, r, a, q in bad]
            bad = con.execute(
                f"""SELECT i.ingest_id, i.rows_quarantined,
                          (SELECT count(*) FROM quarantine q WHERE q.ingest_id = i.ingest_id)
                          + (SELECT coalesce(sum(n_values), 0) FROM quarantine_summary m WHERE m.ingest_id = i.ingest_id) AS n
                   FROM ingests i WHERE i.status = 'complete' AND i.rows_quarantined <> n AND {_not_rebuilt(con, 'i')}"""
            ).fetchall()
            problems += [f"ingest {i}: rows_quarantined {a} but {b} quarantined rows and values" for i, a, b in bad]
            bad = con.execute(
                """SELECT i.ingest_id, i.records_written, coalesce(sum(f.n_rows), 0)
                   FROM ingests i LEFT JOIN observation_files f USING (ingest_id)
                   WHERE i.status = 'complete' GROUP BY ALL HAVING i.records_written <> coalesce(sum(f.n_rows), 0)"""
            ).fetchall()
            problems += [f"ingest {i}: records_written {a} but {b} rows in its files" for i, a, b in bad]
            if has_table(con, "events_without_values"):
                # an event is either in the observations or among the events without values
                both = con.execute(
                    """SELECT e.ingest_id, e.event_id FROM events_without_values e
                       JOIN ingests i USING (ingest_id)
                       WHERE i.status = 'complete' AND EXISTS (SELECT 1 FROM observations_base o
                             WHERE o.ingest_id = e.ingest_id AND o.event_id = e.event_id)
                       ORDER BY ALL LIMIT 20"""
                ).fetchall()
                problems += [f"ingest {i}: event {e} is among the events without values but has observation rows"
                             for i, e in both]
            problems += self._row_accounting(con, legacy_row_traced_kinds)
        return problems

    def _renew_index(self, stale: str) -> list[str]:
        """Rewrite an index that is missing or out of date (a crash after a commit, or a store
        written by an older version); a problem only when the store cannot be written now."""
        try:
            with self.connect(read_only=False, view=False) as con:
                store_layout.write_index(con, self.directory, STORE_VERSION, CONTRACT_VERSION)
        except StoreBusyError:  # a writer is committing: it writes the index itself
            logger.info("store/%s: left to the writer that holds the store", stale)
            return []
        except (StoreError, OSError, pa.ArrowException, duckdb.Error) as exc:
            return [f"store/{stale}, and it cannot be rewritten now ({exc}); run 'harmonize status --check' "
                    "where the store can be written"]
        logger.info("store/%s: rewritten from the database", stale)
        return []

    def rebuilt_note(self) -> str | None:
        """One line when complete ingests were rebuilt from their part files (their quarantine is unknown)."""
        if not self.exists():
            return None
        with self.connect(view=False) as con:
            if _not_rebuilt(con, "i") == "TRUE":
                return None
            n, when = con.execute("SELECT count(*), max(rebuilt_at) FROM ingests i "
                                  "WHERE status = 'complete' AND rebuilt_at IS NOT NULL").fetchall()[0]
        if not n:
            return None
        return (f"{n:,} ingest(s) were rebuilt from their part files on {pd.Timestamp(when):%Y-%m-%d %H:%M} UTC: "
                "their observation rows are checked, their quarantined rows are not in the store (ingest "
                "their files again with --replace to restore them)")

    @staticmethod
    def _row_accounting(con: duckdb.DuckDBPyConnection, legacy_kinds: Sequence[str]) -> list[str]:
        """Every data row 1..rows_read of each row-traced input file is accepted or quarantined.

        Accepted rows are found in the observations (events row, records rows) and, for
        accepted events that yield no observation row, in ``events_without_values``.
        """
        # the kinds are bound as a parameter (the only one of the query)
        traced = "i.row_traced OR (i.row_traced IS NULL AND i.source_kind = ANY(?::VARCHAR[]))"
        no_values = ("UNION SELECT ingest_id, source_file, source_row FROM events_without_values "
                     "WHERE source_row IS NOT NULL" if has_table(con, "events_without_values") else "")
        rows = con.execute(
            f"""
            WITH files AS (
                SELECT f.ingest_id, f.role, f.file_name, f.rows_read
                FROM ingest_files f JOIN ingests i USING (ingest_id)
                WHERE i.status = 'complete' AND ({traced}) AND {_not_rebuilt(con, 'i')}
            ),
            seen AS (
                SELECT ingest_id, source_file AS file_name, source_row AS row FROM observations
                WHERE source_row IS NOT NULL
                UNION
                SELECT o.ingest_id, f.file_name, unnest(o.source_record_rows) AS row
                FROM observations o JOIN files f ON f.ingest_id = o.ingest_id AND f.role IN ('records', 'rows')
                UNION
                SELECT ingest_id, source_file, source_row FROM quarantine
                {no_values}
            )
            SELECT f.ingest_id, f.file_name, f.rows_read, count(DISTINCT s.row) AS found
            FROM files f LEFT JOIN seen s ON s.ingest_id = f.ingest_id AND s.file_name = f.file_name
                 AND s.row BETWEEN 1 AND f.rows_read
            GROUP BY ALL HAVING count(DISTINCT s.row) <> f.rows_read
            """, [list(legacy_kinds)]
        ).fetchall()
        return [f"ingest {i}: {name} has {n} data rows but only {k} are accepted or quarantined"
                for i, name, n, k in rows]


_TIME_COLUMNS = ("event_start", "event_end")
#: Characters DuckDB reads as a glob pattern in a file path.
_GLOB_CHARS = re.compile(r"[*?\[\]{}]")


def provenance(record: IngestRecord, files: Sequence[dict[str, object]]) -> dict[str, object]:
    """What every part file of an ingest says about it (:data:`store_layout.METADATA_KEY` metadata).

    Versioned by ``version``; enough to rebuild the ingest's manifest rows
    (:func:`harmonize.repair.rebuild`): the ``ingests`` row but the counts only the
    whole set of files knows, the ``ingest_files`` rows (``inputs``) and the twin windows.
    """
    ingest = {
        "ingest_id": record.ingest_id, "source_id": record.source_id, "source_kind": record.source_kind,
        "provider_type": record.provider_type, "file_name": record.file_name,
        "file_path": record.file_path or record.file_name, "file_sha256": record.file_sha256,
        "inputs_sha256": record.inputs_sha256, "config_sha256": record.config_sha256,
        "started_at": pd.Timestamp(record.started_at).isoformat(), "rows_read": int(record.rows_read),
        "rows_accepted": int(record.rows_accepted), "rows_quarantined": int(record.rows_quarantined),
        "profile_file": record.profile_file, "tool_version": __version__,
        "row_traced": bool(record.row_traced), "merge_rule": record.merge_rule,
    }
    hooks = {name: dataclasses.asdict(v) if dataclasses.is_dataclass(v) and not isinstance(v, type) else v
             for name, v in record.hook_data.items()}
    return {
        "version": store_layout.METADATA_VERSION, "contract_version": CONTRACT_VERSION,
        "store_version": STORE_VERSION, "tool_version": __version__, "ingest_id": record.ingest_id,
        "source_id": record.source_id, "source_kind": record.source_kind, "ingest": ingest,
        "inputs": [{k: (int(v) if isinstance(v, (int, np.integer)) else v) for k, v in f.items()} for f in files],
        # what the commit hooks were given (e.g. the twin windows of a volunteer source)
        "hook_data": hooks,
    }


def _parquet_source(paths: Sequence[str]) -> str:
    listing = ", ".join(sql_text(p) for p in paths)
    return (f"read_parquet([{listing}], hive_partitioning = true, "
            "hive_types = {'source_kind': VARCHAR, 'season_year': INTEGER}, union_by_name = true)")


def _naive_time_files(con: duckdb.DuckDBPyConnection, paths: Sequence[str]) -> set[str]:
    """The files (as listed in ``paths``) whose event times are timestamps without a zone.

    Read from the parquet footers (isAdjustedToUTC=0): files of store versions 1 to 3.
    """
    listing = ", ".join(sql_text(p) for p in paths)
    found = {r[0] for r in con.execute(
        f"""SELECT DISTINCT file_name FROM parquet_schema([{listing}])
            WHERE name = 'event_start' AND logical_type LIKE '%isAdjustedToUTC=0%'""").fetchall()}
    if not found:
        return set()
    # parquet_schema names files by their resolved path
    return {p for p in paths if p in found or str(Path(p)) in found
            or any(f.endswith("/" + p) for f in found)}


def _not_rebuilt(con: duckdb.DuckDBPyConnection, alias: str) -> str:
    """SQL condition: the ingest's manifest rows were not rebuilt from its part files (whose
    quarantine, kept only in the database, is then unknown)."""
    columns = {r[0] for r in con.execute("DESCRIBE ingests").fetchall()}
    return f"{alias}.rebuilt_at IS NULL" if "rebuilt_at" in columns else "TRUE"


def _rollback(con: duckdb.DuckDBPyConnection) -> None:
    """Roll back; when the failure was the COMMIT itself there is nothing to roll back, and the
    original error (not "no transaction is active") is the one to report."""
    try:
        con.execute("ROLLBACK")
    except duckdb.Error:
        pass


def _lock_timeout(text: str | None) -> float:
    """The lock timeout of the run's settings (``HARMONIZE_LOCK_TIMEOUT`` on the command line)."""
    if text is None:
        return DEFAULT_LOCK_TIMEOUT_S
    try:
        value = float(text)
    except ValueError:
        value = -1.0
    if not value >= 0:
        raise StoreError(f"HARMONIZE_LOCK_TIMEOUT={text!r} is not a number of seconds; write e.g. 60, or unset it")
    return value


#: store_meta key prefix of the digest of each persisted view's SELECT (see Store._create_views)
_VIEW_KEY = "view_sql:"


def _recorded_view_digests(con: duckdb.DuckDBPyConnection) -> dict[str, str]:
    """The digests of the persisted views' SELECTs (name -> sha256), of views that exist."""
    try:
        rows = con.execute(
            "SELECT substr(m.key, ?), m.value FROM store_meta m JOIN duckdb_views() v "
            "ON v.view_name = substr(m.key, ?) AND NOT v.temporary AND v.schema_name = 'main' "
            "WHERE starts_with(m.key, ?)", [len(_VIEW_KEY) + 1, len(_VIEW_KEY) + 1, _VIEW_KEY]).fetchall()
    except duckdb.CatalogException:  # no store_meta yet
        return {}
    return dict(rows)


def _flagged_view_sqls(con: duckdb.DuckDBPyConnection) -> dict[str, str]:
    """The SELECTs of ``observations`` and ``current`` (see :meth:`Store._define_flagged_view`)."""
    # current: the name docs/store.md gives readers without harmonize (the live rows, every flag)
    return {"observations": _flagged_view_sql(con, "observations_base"),
            "current": "SELECT * FROM observations"}


def _flagged_view_sql(con: duckdb.DuckDBPyConnection, base: str) -> str:
    """SELECT for the observations view: ``base`` with the store-wide flags added to ``flags``.

    The join with ``store_flags`` is confined to the source kinds that have flagged rows (the
    hive partitions of the volunteer kinds), so a query over other kinds never pays for it
    (about 20x faster on a flag filter over 20 M rows, measured on 2 cores).
    """
    if not has_table(con, "store_flags"):
        return f"SELECT * FROM {base}"
    cols = [c for c, _ in observation_sql_columns()]
    plain = ", ".join(f'"{c}"' for c in cols)
    flagged = [r[0] for r in con.execute(
        "SELECT DISTINCT i.source_kind FROM store_flags f JOIN ingests i USING (ingest_id) ORDER BY 1").fetchall()]
    if not flagged:
        return f"SELECT {plain} FROM {base}"
    kinds = ", ".join(sql_text(k) for k in flagged)
    select = ", ".join(
        'CASE WHEN f.extra IS NULL THEN b.flags ELSE list_sort(list_distinct(list_concat(b.flags, f.extra))) END AS "flags"'
        if c == "flags" else f'b."{c}"' for c in cols)
    return (f"SELECT {plain} FROM {base} WHERE source_kind IS NULL OR source_kind NOT IN ({kinds}) UNION ALL "
            f"SELECT {select} FROM {base} b LEFT JOIN "
            "(SELECT record_id, ingest_id, list(DISTINCT flag) AS extra FROM store_flags GROUP BY ALL) f "
            f"ON f.record_id = b.record_id AND f.ingest_id = b.ingest_id WHERE b.source_kind IN ({kinds})")


def _inside(root: Path, rel: str) -> bool:
    """Whether a relative path from a journal stays inside the store folder."""
    target = (root / rel).resolve()
    if target.suffix == ".json":  # the ingest's seal
        return target.parent == (root / SEALS_DIR).resolve()
    return target.is_relative_to(root.resolve()) and target.suffix == ".parquet"


def _alive(pid: int) -> bool:
    if pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def _file_problem(path: Path, n_rows: int, sha_recorded: str | None, size_recorded: int | None,
                  deep: bool) -> str | None:
    """What is wrong with one manifest file, or None. The words follow "file <path> "."""
    if not path.is_file():
        return "is missing"
    try:
        sha, size = file_digest(path)
    except OSError as exc:
        return f"is unreadable ({exc.strerror or exc})"
    if size_recorded is not None and size != size_recorded:
        return f"has {size:,} bytes, the manifest recorded {size_recorded:,} (truncated or overwritten)"
    if sha_recorded is not None and sha != sha_recorded:
        return "has changed since it was committed (its sha256 differs from the manifest's)"
    try:
        parquet = pq.ParquetFile(path)
        actual = parquet.metadata.num_rows
        if deep:  # decode every page: a damaged page fails here, not in the next export
            for _ in parquet.iter_batches(batch_size=65_536):
                pass
    except (OSError, pa.ArrowException) as exc:
        return f"is unreadable ({str(exc).splitlines()[0] if str(exc) else type(exc).__name__})"
    if actual != n_rows:
        return f"holds {actual:,} rows, the manifest says {n_rows:,}"
    return None
