"""The store: a DuckDB database (manifest, quarantine, views) beside a parquet dataset.

Observation rows live in a hive-partitioned parquet dataset under ``store/observations/``
(source_kind=.../season_year=.../*.parquet). The database holds the manifest of live
parquet files, the ingests, the quarantine and an ``observations`` view over the live files.

Accepted events that yield no observation row (a haul with no catch under a profile without
a zero-filling protocol, a segment whose bird rows were all quarantined) are kept in the
``events_without_values`` table, so that every input row stays accounted for.

Crash safety: an ingest writes its parquet files into ``store/staging/<ingest_id>/``
without any lock, then, holding the database's write lock, moves them into place and
records them in one transaction. Files that are not in the manifest are never read, so a
kill at any point leaves either all or none of an ingest visible; the next writer removes
the leftovers.
"""

from __future__ import annotations

import os
import re
import shutil
import time
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import duckdb
import pandas as pd
import pyarrow as pa

from harmonize import __version__, parts, twins, units
from harmonize.contract import CONTRACT_VERSION, observation_sql_columns
from harmonize.errors import StoreBusyError, StoreError

DB_NAME = "harmonized.duckdb"
OBSERVATIONS_DIR = "observations"
STAGING_DIR = "staging"
PARTITION_COLUMNS = ("source_kind", "season_year")
#: Version of the store's tables (store_meta key ``store_version``); a store without the key
#: is version 1. 2: the ``events_without_values`` table. A writer brings an older store up to
#: date (the tables are created when missing); readers of an older store see no such events.
#: 3: event times written as parquet ``timestamp[us, tz=UTC]`` (older files hold UTC wall
#: clocks and are read as UTC by the views) and the persisted views name their files relative
#: to the store folder (rewritten by the first writer that opens an older store).
STORE_VERSION = 3
_LOCK_RE = re.compile(r"\(PID (\d+)\)")

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
    profile_file VARCHAR
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
CREATE TABLE IF NOT EXISTS observation_files (
    ingest_id VARCHAR NOT NULL,
    path VARCHAR NOT NULL,
    n_rows BIGINT NOT NULL
);
"""


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
    #: opportunistic sources: the twin windows of the profile (harmonize.twins)
    duplicates: twins.TwinSettings | None = None


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
            lock_timeout_s = float(os.environ.get("HARMONIZE_LOCK_TIMEOUT", "60"))
        self.lock_timeout_s = lock_timeout_s

    # ------------------------------------------------------------------ connections
    def exists(self) -> bool:
        return self.db_path.is_file()

    @contextmanager
    def connect(self, read_only: bool = True, view: bool = True) -> Iterator[duckdb.DuckDBPyConnection]:
        """A connection; waits while another process holds the database.

        A read-only connection to a store that does not exist yet raises StoreError. With
        ``view=False`` a read-only connection does not define the observations view (which
        reads every live parquet file): the integrity check uses it to find bad files.
        """
        if read_only and not self.exists():
            raise StoreError(f"no store at {self.directory}; ingest a file first ('harmonize ingest')")
        self.directory.mkdir(parents=True, exist_ok=True)
        con = self._open(read_only)
        try:
            # times are read and shown in UTC whatever the machine's zone
            con.execute("SET TimeZone = 'UTC'")
            self._search_here(con)
            if read_only:
                if view:
                    self._define_view(con, temporary=True)
            else:
                con.execute(_SCHEMA_SQL)
                twins.ensure_tables(con)
                self._check_version(con)
                self._define_view(con, temporary=False)
            yield con
        finally:
            con.close()

    def _open(self, read_only: bool) -> duckdb.DuckDBPyConnection:
        deadline = time.monotonic() + self.lock_timeout_s
        delay = 0.05
        while True:
            try:
                return duckdb.connect(str(self.db_path), read_only=read_only)
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
            con.execute("DELETE FROM store_meta WHERE key = 'store_version'")
            con.execute("INSERT INTO store_meta VALUES ('store_version', ?)", [str(STORE_VERSION)])

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
        folder = str(self.directory).replace("'", "''")
        con.execute(f"SET file_search_path = '{folder}'")

    def _define_view(self, con: duckdb.DuckDBPyConnection, temporary: bool) -> None:
        self._search_here(con)
        try:
            paths = self._live_paths(con)
        except duckdb.CatalogException:
            paths = []
        cols = observation_sql_columns()
        present: set[str] = set()
        if paths:
            try:
                naive = _naive_time_files(con, paths)
            except duckdb.Error:
                naive = set()  # unreadable files: reported by the DESCRIBE below
            source = _parquet_source([p for p in paths if p not in naive])
            if naive:
                # files of a store written before times carried their zone (store version < 3)
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
                    "run 'harmonize status --check' to see which files are missing or damaged"
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
        kind = "TEMP VIEW" if temporary else "VIEW"
        # the parquet rows as written (with the mergeable parts of values that span files);
        # observations_base holds one row per value, the parts of gridded and effort values
        # merged across the live ingests of their source (harmonize.parts); the observations
        # view adds the store-wide flags (probable_duplicate, high_count) that harmonize.twins
        # recomputes at each commit
        con.execute(f"CREATE OR REPLACE {kind} observation_parts AS SELECT {select} FROM {source}")
        con.execute(f"CREATE OR REPLACE {kind} observations_base AS {parts.merged_sql('observation_parts')}")
        con.execute(f"CREATE OR REPLACE {kind} observations AS {twins.flagged_view_sql(con, 'observations_base')}")
        # the name docs/store.md gives readers without harmonize: the live rows with every flag
        con.execute(f"CREATE OR REPLACE {kind} current AS SELECT * FROM observations")

    # ------------------------------------------------------------------ ingest support
    def previous_ingests(self, source_id: str, file_names: Sequence[str], inputs_sha256: str) -> pd.DataFrame:
        """Complete ingests of this source that read the same file name(s) or content."""
        if not self.exists():
            return pd.DataFrame(columns=["ingest_id", "inputs_sha256", "config_sha256", "file_name"])
        with self.connect(read_only=True) as con:
            return self._previous(con, source_id, file_names, inputs_sha256)

    @staticmethod
    def _previous(con: duckdb.DuckDBPyConnection, source_id: str, file_names: Sequence[str], inputs_sha256: str) -> pd.DataFrame:
        return con.execute(
            """SELECT ingest_id, inputs_sha256, config_sha256, file_name FROM ingests
               WHERE status = 'complete' AND source_id = ?
                 AND (inputs_sha256 = ? OR file_name = ANY(?::VARCHAR[]))
               ORDER BY started_at""",
            [source_id, inputs_sha256, list(file_names)],
        ).df()

    def staging_dir(self, ingest_id: str) -> Path:
        """A private folder for one ingest's files, marked with this process's PID."""
        path = self.directory / STAGING_DIR / ingest_id
        path.mkdir(parents=True, exist_ok=False)
        (path / ".pid").write_text(str(os.getpid()))
        return path

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
    ) -> list[str]:
        """Move staged parquet files into place and record the ingest in one transaction.

        ``on_conflict(previous)`` is called under the write lock with the ingests that now
        match this one (another process may have committed meanwhile); it returns the ids
        to supersede or raises. Returns the superseded ingest ids.

        ``events_without_values`` (columns :data:`EVENTS_WITHOUT_VALUES_COLUMNS` but
        ingest_id) are the ingest's accepted events that yield no observation row; they are
        recorded in the same transaction.
        """
        with self.connect(read_only=False) as con:
            self._remove_leftovers(con)
            previous = self._previous(con, record.source_id, [record.file_name], record.inputs_sha256)
            supersede = list(on_conflict(previous))
            moved: list[tuple[str, int]] = []
            for part in sorted((staged / "parts").rglob("*.parquet")):
                rel = Path(OBSERVATIONS_DIR) / part.relative_to(staged / "parts")
                target = self.directory / rel
                target.parent.mkdir(parents=True, exist_ok=True)
                n_rows = con.execute("SELECT count(*) FROM read_parquet(?)", [str(part)]).fetchall()[0][0]
                os.replace(part, target)
                moved.append((rel.as_posix(), int(n_rows)))
                _crash_point("moving")
            _crash_point("before_transaction")
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
                       records_zero_filled, superseded_by, tool_version, profile_file)
                       VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, NULL, ?, ?)""",
                    [record.ingest_id, record.source_id, record.source_kind, record.provider_type,
                     record.file_name, record.file_sha256, record.inputs_sha256, record.config_sha256,
                     record.started_at, record.finished_at, record.status, record.rows_read,
                     record.rows_accepted, record.rows_quarantined, record.records_written,
                     record.records_zero_filled, __version__, record.profile_file],
                )
                for f in files:
                    con.execute(
                        "INSERT INTO ingest_files VALUES (?, ?, ?, ?, ?, ?, ?)",
                        [record.ingest_id, f["role"], f["file_name"], f["file_sha256"],
                         f["rows_read"], f["rows_accepted"], f["rows_quarantined"]],
                    )
                for rel, n_rows in moved:
                    con.execute("INSERT INTO observation_files VALUES (?, ?, ?)", [record.ingest_id, rel, n_rows])
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
                    _crash_point("events_without_values")
                if record.duplicates is not None:
                    twins.record_settings(con, record.ingest_id, record.source_id, record.duplicates)
                self._define_view(con, temporary=False)
                # twins span sources and ingests: recomputed over the whole store, in this transaction
                twins.refresh(con)
                _crash_point("before_commit")
                con.execute("COMMIT")
                _crash_point("after_commit")
            except BaseException:
                con.execute("ROLLBACK")
                raise
            shutil.rmtree(staged, ignore_errors=True)
            return supersede

    def _remove_leftovers(self, con: duckdb.DuckDBPyConnection) -> None:
        """Delete parquet files no manifest row names, and staging folders of dead processes.

        Runs under the write lock, so no other process is moving files into place.
        """
        known = {r[0] for r in con.execute("SELECT path FROM observation_files").fetchall()}
        obs_dir = self.directory / OBSERVATIONS_DIR
        if obs_dir.is_dir():
            for part in obs_dir.rglob("*.parquet"):
                if part.relative_to(self.directory).as_posix() not in known:
                    part.unlink(missing_ok=True)
        staging = self.directory / STAGING_DIR
        if staging.is_dir():
            for folder in staging.iterdir():
                pid_file = folder / ".pid"
                try:
                    pid = int(pid_file.read_text())
                except (OSError, ValueError):
                    pid = -1
                if pid != os.getpid() and not _alive(pid):
                    shutil.rmtree(folder, ignore_errors=True)

    def discard(self, staged: Path) -> None:
        shutil.rmtree(staged, ignore_errors=True)

    # ------------------------------------------------------------------ reading
    def ingests(self, include_superseded: bool = True) -> pd.DataFrame:
        with self.connect() as con:
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
        with self.connect() as con:
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
            if not twins.has_table(con, "events_without_values"):
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
        with self.connect() as con:
            return con.execute(sql, params).df()

    def check(self) -> list[str]:
        """Integrity problems (empty list = the store is sound).

        Checks that every manifest file exists and holds the rows the manifest says, that
        every complete ingest satisfies rows_read = rows_accepted + rows_quarantined and
        records_written = rows in its files, and that every data row of every input file is
        found among the accepted rows or in the quarantine.
        """
        problems: list[str] = []
        with self.connect(view=False) as con:
            files = con.execute(
                """SELECT f.ingest_id, f.path, f.n_rows FROM observation_files f
                   JOIN ingests i USING (ingest_id) WHERE i.status = 'complete'"""
            ).fetchall()
            for ingest_id, rel, n_rows in files:
                path = self.directory / rel
                if not path.is_file():
                    problems.append(f"ingest {ingest_id}: file {rel} is missing")
                    continue
                try:
                    actual = con.execute("SELECT count(*) FROM read_parquet(?)", [str(path)]).fetchall()[0][0]
                except duckdb.Error as exc:
                    problems.append(f"ingest {ingest_id}: file {rel} is unreadable ({str(exc).splitlines()[0]})")
                    continue
                if actual != n_rows:
                    problems.append(f"ingest {ingest_id}: file {rel} holds {actual} rows, manifest says {n_rows}")
            if problems:
                return problems
            self._define_view(con, temporary=True)
            bad = con.execute(
                """SELECT ingest_id, rows_read, rows_accepted, rows_quarantined FROM ingests
                   WHERE status = 'complete' AND rows_read <> rows_accepted + rows_quarantined"""
            ).fetchall()
            problems += [f"ingest {i}: rows_read {r} <> accepted {a} + quarantined {q}" for i, r, a, q in bad]
            bad = con.execute(
                """SELECT i.ingest_id, i.rows_quarantined,
                          (SELECT count(*) FROM quarantine q WHERE q.ingest_id = i.ingest_id)
                          + (SELECT coalesce(sum(n_values), 0) FROM quarantine_summary m WHERE m.ingest_id = i.ingest_id) AS n
                   FROM ingests i WHERE i.status = 'complete' AND i.rows_quarantined <> n"""
            ).fetchall()
            problems += [f"ingest {i}: rows_quarantined {a} but {b} quarantined rows and values" for i, a, b in bad]
            bad = con.execute(
                """SELECT i.ingest_id, i.records_written, coalesce(sum(f.n_rows), 0)
                   FROM ingests i LEFT JOIN observation_files f USING (ingest_id)
                   WHERE i.status = 'complete' GROUP BY ALL HAVING i.records_written <> coalesce(sum(f.n_rows), 0)"""
            ).fetchall()
            problems += [f"ingest {i}: records_written {a} but {b} rows in its files" for i, a, b in bad]
            if twins.has_table(con, "events_without_values"):
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
            problems += self._row_accounting(con)
        return problems

    @staticmethod
    def _row_accounting(con: duckdb.DuckDBPyConnection) -> list[str]:
        """Every data row 1..rows_read of each row-traced input file is accepted or quarantined.

        Accepted rows are found in the observations (events row, records rows) and, for
        accepted events that yield no observation row, in ``events_without_values``.
        """
        no_values = ("UNION SELECT ingest_id, source_file, source_row FROM events_without_values "
                     "WHERE source_row IS NOT NULL" if twins.has_table(con, "events_without_values") else "")
        rows = con.execute(
            f"""
            WITH files AS (
                SELECT f.ingest_id, f.role, f.file_name, f.rows_read
                FROM ingest_files f JOIN ingests i USING (ingest_id)
                WHERE i.status = 'complete' AND i.source_kind IN ('trawl', 'plankton', 'transect', 'opportunistic')
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
            """
        ).fetchall()
        return [f"ingest {i}: {name} has {n} data rows but only {k} are accepted or quarantined"
                for i, name, n, k in rows]


_TIME_COLUMNS = ("event_start", "event_end")


def _parquet_source(paths: Sequence[str]) -> str:
    listing = ", ".join("'" + p.replace("'", "''") + "'" for p in paths)
    return (f"read_parquet([{listing}], hive_partitioning = true, "
            "hive_types = {'source_kind': VARCHAR, 'season_year': INTEGER}, union_by_name = true)")


def _naive_time_files(con: duckdb.DuckDBPyConnection, paths: Sequence[str]) -> set[str]:
    """The files (as listed in ``paths``) whose event times are timestamps without a zone.

    Read from the parquet footers (isAdjustedToUTC=0): files of store versions 1 and 2.
    """
    listing = ", ".join("'" + p.replace("'", "''") + "'" for p in paths)
    found = {r[0] for r in con.execute(
        f"""SELECT DISTINCT file_name FROM parquet_schema([{listing}])
            WHERE name = 'event_start' AND logical_type LIKE '%isAdjustedToUTC=0%'""").fetchall()}
    if not found:
        return set()
    # parquet_schema names files by their resolved path
    return {p for p in paths if p in found or str(Path(p)) in found
            or any(f.endswith("/" + p) for f in found)}


def _crash_point(name: str) -> None:
    """Test hook: HARMONIZE_CRASH_AT=<name> kills the process here (crash-safety tests)."""
    if os.environ.get("HARMONIZE_CRASH_AT") == name:
        os.kill(os.getpid(), 9)


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
