"""The store's physical layout: partition folders, part files and the metadata each part carries.

Only the store (:mod:`harmonize.store`, :mod:`harmonize.repair`) uses this module: the
pipeline hands Arrow tables to :meth:`harmonize.store.Store.write_observations` and knows no
path, file name or partitioning.

Observation rows are written as hive-partitioned zstd parquet,
``source_kind=<kind>/season_year=<year>/part-<uuid>.parquet``. Every part file carries one
key-value metadata entry, :data:`METADATA_KEY` (``"harmonize"``), holding JSON versioned by its
own ``version`` field (the way GeoParquet versions its ``"geo"`` entry): the contract and store
versions, the ingest that wrote the file with its provenance (source, input files and their
sha256, configuration digest, row accounting), and the file's own row count. A file read
alone says where it came from, and the manifest can be rebuilt from the files
(:func:`harmonize.repair.rebuild`).
"""

from __future__ import annotations

import json
import os
import queue
import re
import threading
import uuid
from collections.abc import Iterable, Mapping
from pathlib import Path
from typing import Any

import duckdb
import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from harmonize import connections
from harmonize.sql import sql_text

#: The key of the part files' key-value metadata.
METADATA_KEY = "harmonize"
#: Version of the JSON under :data:`METADATA_KEY` (major.minor: a reader refuses another major).
METADATA_VERSION = "1.0"
#: Fields every part file's metadata holds (see docs/store.md, "Part-file metadata").
REQUIRED_FIELDS = ("version", "contract_version", "store_version", "tool_version", "ingest_id",
                   "source_id", "source_kind", "rows", "ingest")
#: Fields of the ``ingest`` object: one row of the ``ingests`` table, less what only the whole
#: set of files knows (records_written, records_zero_filled: the sums over the files).
INGEST_FIELDS = ("ingest_id", "source_id", "source_kind", "provider_type", "file_name", "file_path",
                 "file_sha256", "inputs_sha256", "config_sha256", "started_at", "rows_read",
                 "rows_accepted", "rows_quarantined", "profile_file", "tool_version")

_PLAIN_PARTITION = re.compile(r"[A-Za-z0-9_.-]+")
_ROW_GROUP_ROWS = 500_000


def part_metadata(provenance: Mapping[str, Any], rows: int | None, zero_filled: int | None) -> str:
    """The JSON text of one part file's metadata: the ingest's ``provenance`` and the file's counts."""
    doc = dict(provenance)
    doc["rows"] = rows
    doc["zero_filled"] = zero_filled
    return json.dumps(doc, sort_keys=True, default=str)


def read_part_metadata(path: str | Path) -> dict[str, Any] | None:
    """The metadata of one part file, or None when it has none (a file of store version < 5).

    Raises OSError / ArrowException when the footer cannot be read, ValueError when the
    entry is not JSON.
    """
    kv = pq.read_metadata(path).metadata or {}
    raw = kv.get(METADATA_KEY.encode())
    if raw is None:
        return None
    doc = json.loads(raw.decode("utf-8"))
    if not isinstance(doc, dict):
        raise ValueError(f"the {METADATA_KEY!r} metadata is not a JSON object")
    return doc


def metadata_problem(doc: dict[str, Any] | None, footer_rows: int) -> str | None:
    """Why a part file's metadata cannot rebuild its manifest entry, or None (words follow "file <path> ")."""
    if doc is None:
        return f"has no {METADATA_KEY!r} key-value metadata (written before store version 5)"
    missing = [f for f in REQUIRED_FIELDS if f not in doc]
    if missing:
        return f"has {METADATA_KEY!r} metadata without {', '.join(missing)}"
    major = str(doc["version"]).split(".")[0]
    if major != METADATA_VERSION.split(".")[0]:
        return f"has {METADATA_KEY!r} metadata of version {doc['version']}, this harmonize reads {METADATA_VERSION}"
    ingest = doc["ingest"]
    if not isinstance(ingest, dict) or any(f not in ingest for f in INGEST_FIELDS):
        return f"has {METADATA_KEY!r} metadata with an incomplete ingest record"
    for field in ("ingest_id", "source_id", "source_kind"):
        if ingest[field] != doc[field]:
            return f"has {METADATA_KEY!r} metadata whose {field} ({doc[field]}) differs from its ingest's ({ingest[field]})"
    if doc["rows"] is not None and int(doc["rows"]) != footer_rows:
        return f"holds {footer_rows:,} rows, its {METADATA_KEY!r} metadata says {int(doc['rows']):,}"
    return None


def write_partitions(table: pa.Table, folder: Path, provenance: Mapping[str, Any] | None = None,
                     con: duckdb.DuckDBPyConnection | None = None) -> None:
    """Write observation rows as hive-partitioned zstd parquet under ``folder``.

    Rows are sorted by source_kind, season_year, event_start, event_id (nulls last). A
    table in that order already (as the ingest's blocks are) is sliced as it is; otherwise
    only the sort keys and a row index go through DuckDB's sort, the rows are then taken in
    that order by Arrow, and each partition, a contiguous slice, is written to its own file
    by Arrow's parquet writer (straight from the Arrow columns: a DuckDB COPY of the slice
    took twice the time and held a second copy of the rows; BENCHMARKS.md). Sorting the
    whole rows inside a partitioned COPY held about 3.5x the table in memory. With
    ``provenance`` each file carries :data:`METADATA_KEY` metadata (:func:`part_metadata`).
    ``con``: a connection to use (one is opened otherwise).
    """
    if table.num_rows == 0:
        return
    own = con is None
    con = connections.connect() if con is None else con
    try:
        parts = _sorted_partitions(table)
        if parts is not None:
            ordered = table
        else:
            keys = pa.table({"i": np.arange(table.num_rows, dtype=np.int64), "k": table["source_kind"],
                             "y": table["season_year"], "t": table["event_start"], "e": table["event_id"]})
            con.register("sort_keys", keys)
            parts = con.execute("SELECT k, y, count(*) FROM sort_keys GROUP BY ALL ORDER BY k, y").fetchall()
            if all(k is not None and _PLAIN_PARTITION.fullmatch(k) for k, _, _ in parts):
                order = con.sql("SELECT i FROM sort_keys ORDER BY k, y, t, e, i").to_arrow_table()["i"]
            con.unregister("sort_keys")
            del keys
            if not all(k is not None and _PLAIN_PARTITION.fullmatch(k) for k, _, _ in parts):
                _write_partitions_sorted_in_copy(con, table, folder, provenance)
                return
            in_order = np.array_equal(order.to_numpy(), np.arange(table.num_rows))
            ordered = table if in_order else table.take(order)
        offset = 0
        for kind, year, n in parts:
            target = folder / f"source_kind={kind}" / f"season_year={'__HIVE_DEFAULT_PARTITION__' if year is None else year}"
            target.mkdir(parents=True, exist_ok=True)
            part = ordered.slice(offset, n)
            _write_part(part.drop_columns(["source_kind", "season_year"]), target / f"part-{uuid.uuid4()}.parquet",
                        None if provenance is None else part_metadata(provenance, n, _zero_filled(part)))
            offset += n
    finally:
        if own:
            con.close()


def _write_part(rows: pa.Table, path: Path, metadata: str | None) -> None:
    """One zstd parquet part file, with ``metadata`` under :data:`METADATA_KEY`.

    No Arrow schema goes into the footer: readers take each column's type from the parquet
    logical types alone, as in the files DuckDB writes (times: UTC instants). A failed write
    (a full disk) is an OSError naming the file.
    """
    try:
        with pq.ParquetWriter(path, rows.schema, compression="zstd", store_schema=False) as writer:
            writer.write_table(rows, row_group_size=_ROW_GROUP_ROWS)
            if metadata is not None:
                writer.add_key_value_metadata({METADATA_KEY: metadata})
    except OSError as exc:
        if exc.filename is not None:
            raise
        found = re.search(r"errno (\d+)", str(exc), re.IGNORECASE)
        code = exc.errno or (int(found.group(1)) if found else None)
        raise OSError(code, os.strerror(code) if code else str(exc), str(path)) from exc


def in_store_order(table: pa.Table) -> bool:
    """Whether the rows are sorted by source_kind, season_year, event_start, event_id, with
    nulls last (DuckDB's order), comparing each row with the next (no sort)."""
    n = table.num_rows
    if n < 2:
        return True
    later = equal = None  # per pair of neighbours: the next row sorts after / level with this one
    for name in ("source_kind", "season_year", "event_start", "event_id"):
        col = table[name]
        a, b = col.slice(0, n - 1), col.slice(1)
        a_null, b_null = pc.is_null(a), pc.is_null(b)
        # nulls last: a null after a value is later, two nulls are level
        after = pc.or_(pc.and_(b_null, pc.invert(a_null)),
                       pc.fill_null(pc.greater(b, a), False))
        same = pc.or_(pc.and_(a_null, b_null), pc.fill_null(pc.equal(a, b), False))
        if later is None:
            later, equal = after, same
        else:
            later = pc.or_(later, pc.and_(equal, after))
            equal = pc.and_(equal, same)
    return bool(pc.all(pc.or_(later, equal)).as_py())


def _sorted_partitions(table: pa.Table) -> list[tuple[str, int | None, int]] | None:
    """(source_kind, season_year, rows) of each partition, in order, when the table is in
    store order with plain partition values; None otherwise (the caller sorts)."""
    if not in_store_order(table):
        return None
    kind, year = table["source_kind"].to_numpy(zero_copy_only=False), table["season_year"]
    year_key = pc.fill_null(year, 0).to_numpy(zero_copy_only=False)  # nulls told apart by y_null
    y_null = pc.is_null(year).to_numpy(zero_copy_only=False)
    cut = np.flatnonzero((kind[1:] != kind[:-1]) | (year_key[1:] != year_key[:-1]) | (y_null[1:] != y_null[:-1])) + 1
    starts = np.concatenate([[0], cut])
    counts = np.diff(np.concatenate([starts, [table.num_rows]]))
    parts = []
    for start, count in zip(starts.tolist(), counts.tolist(), strict=True):
        k = kind[start]
        if k is None or not _PLAIN_PARTITION.fullmatch(k):
            return None
        y = year[start].as_py()
        parts.append((k, y, count))
    return parts


def write_blocks(blocks: Iterable[pa.Table], folder: Path,
                 provenance: Mapping[str, Any] | None = None) -> tuple[int, int]:
    """Write blocks of observation rows with :func:`write_partitions`, on a writer thread.

    The next block is made while the last one is written (both mostly in DuckDB, outside
    the GIL); at most two blocks wait at once. Each block becomes its own file(s) in its
    partition(s). Returns (rows written, zero-filled rows written). An error of either side
    is raised here.
    """
    waiting: queue.Queue[pa.Table | None] = queue.Queue(maxsize=1)
    errors: list[BaseException] = []

    def writer() -> None:
        con = None  # one connection for every block
        try:
            while (block := waiting.get()) is not None:
                if not errors:  # after an error, drain without writing
                    try:
                        con = con or connections.connect()
                        write_partitions(block, folder, provenance, con)
                    except BaseException as exc:  # noqa: BLE001  (re-raised by the caller below)
                        errors.append(exc)
        finally:
            if con is not None:
                con.close()

    thread = threading.Thread(target=writer, name="harmonize-writer", daemon=True)
    thread.start()
    rows = zeros = 0
    try:
        for block in blocks:
            if errors:
                break
            rows += block.num_rows
            zeros += _zero_filled(block)
            waiting.put(block)
            del block
    finally:
        waiting.put(None)
        thread.join()
    if errors:
        raise errors[0]
    return rows, zeros


def _zero_filled(block: pa.Table) -> int:
    return int(pc.sum(block["zero_filled"]).as_py() or 0)


def _kv_option(provenance: Mapping[str, Any] | None, rows: int | None, zero_filled: int | None) -> str:
    if provenance is None:
        return ""
    text = sql_text(part_metadata(provenance, rows, zero_filled))
    return f", KV_METADATA {{{METADATA_KEY}: {text}}}"


def _write_partitions_sorted_in_copy(con: duckdb.DuckDBPyConnection, table: pa.Table, folder: Path,
                                     provenance: Mapping[str, Any] | None = None) -> None:
    """DuckDB's own partitioned COPY, for partition values that need escaping in paths.

    The files' metadata then carries no row count of its own (``rows`` null: the footer's
    count is the file's): one COPY writes every partition.
    """
    con.register("obs", table)
    target = sql_text(str(folder))
    con.execute(
        f"""COPY (SELECT * FROM obs ORDER BY source_kind, season_year, event_start, event_id)
            TO {target} (FORMAT parquet, PARTITION_BY (source_kind, season_year),
            COMPRESSION zstd, ROW_GROUP_SIZE {_ROW_GROUP_ROWS}, FILENAME_PATTERN 'part-{{uuid}}'
            {_kv_option(provenance, None, None)})"""
    )


# ---------------------------------------------------------------------------- the index
#: Of the store: plain parquet copies of what a reader without harmonize needs beside the part
#: files, rewritten after every change of the live set: the store-wide flags
#: (:data:`INDEX_FLAGS`) and the list of live part files (:data:`INDEX_LIVE_FILES`).
INDEX_DIR = "index"
INDEX_FLAGS = f"{INDEX_DIR}/flags.parquet"
INDEX_LIVE_FILES = f"{INDEX_DIR}/live_files.parquet"
#: What each index file holds: the query over the database, sorted so that equal contents give
#: equal files.
_INDEX_QUERIES = {
    INDEX_FLAGS: "SELECT record_id, ingest_id, flag FROM store_flags ORDER BY ALL",
    INDEX_LIVE_FILES: """SELECT f.path, f.ingest_id, i.source_id, i.source_kind, f.n_rows
                         FROM observation_files f JOIN ingests i USING (ingest_id)
                         WHERE i.status = 'complete' ORDER BY f.path, f.ingest_id""",
}


def index_tables(con: duckdb.DuckDBPyConnection) -> dict[str, pa.Table]:
    """What the index files must hold, from the database (relative path -> table)."""
    return {rel: con.sql(sql).to_arrow_table() for rel, sql in _INDEX_QUERIES.items()}


def write_index(con: duckdb.DuckDBPyConnection, directory: Path, store_version: int, contract_version: str) -> None:
    """Rewrite the index files of the store in ``directory`` from the committed database.

    Each file is written beside its target and renamed over it, so a reader sees the old file
    or the new one, never a part. Called after the commit: a crash in between leaves an index
    older than the database, which :func:`index_problem` detects and the next write renews.
    """
    folder = directory / INDEX_DIR
    folder.mkdir(exist_ok=True)
    doc = json.dumps({"version": METADATA_VERSION, "store_version": store_version,
                      "contract_version": contract_version})
    for rel, table in index_tables(con).items():
        target = directory / rel
        tmp = target.with_name(f".{target.name}.{uuid.uuid4().hex}.tmp")
        table = table.replace_schema_metadata({METADATA_KEY: doc})
        try:
            pq.write_table(table, tmp, compression="zstd")
            tmp.replace(target)
        finally:
            tmp.unlink(missing_ok=True)


def index_problem(con: duckdb.DuckDBPyConnection, directory: Path) -> str | None:
    """One line when an index file is missing or disagrees with the database (None when sound)."""
    for rel, expected in index_tables(con).items():
        path = directory / rel
        if not path.is_file():
            return f"{rel} is missing"
        try:
            found = pq.read_table(path)
        except (OSError, pa.ArrowException) as exc:
            return f"{rel} is unreadable ({exc})"
        if not found.replace_schema_metadata(None).equals(expected.replace_schema_metadata(None)):
            return f"{rel} disagrees with the database ({found.num_rows:,} rows, {expected.num_rows:,} expected)"
    return None
