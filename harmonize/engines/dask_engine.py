"""Dask (dask.distributed) implementations of the two heaviest steps, equal to the DuckDB ones.

1. **Ping tracks -> fishing hours per cell.** After the one streaming validation pass in
   DuckDB, the accepted pings are written as parquet in buckets of whole vessels
   (``vid % n_buckets``). Each bucket is one Dask task: it sorts its vessels' pings by
   time, finds the neighbours, position jumps, derived speeds, fishing class and attributed
   hours by running the one SQL definition of the track rules (:func:`harmonize.tracks.track_sql`,
   which the DuckDB engine runs on the whole file) in an in-memory DuckDB on the bucket, and
   reduces them to partial cell sums. As every vessel lies in one bucket, the distinct vessels of a
   cell are the sum of the buckets' distinct vessels, so the final reduction is a plain sum
   over small partial tables.
2. **The audit's aggregations.** The per-event table (one row per event and its tags),
   the taxon record counts and the per-source means of physical variables are computed on Dask
   from the store's live parquet files (one task per file, then a grouped reduction), and
   handed back to the audit (:mod:`harmonize.audit.engines` chooses this implementation by
   name), whose small remaining queries run in DuckDB unchanged. The aggregations are those of
   :mod:`harmonize.engines.audit_rules`, defined once for both engines.

The workers must be able to read the files: on a local cluster (the default) they always
can; on a remote cluster the store and the scratch folder (``HARMONIZE_DASK_SCRATCH``) must
be on a file system the workers share.
"""

from __future__ import annotations

import os
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import duckdb
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from harmonize import settings
from harmonize.engines.audit_rules import DUPLICATE_FLAG, EVENT_KEYS, EVENT_MEASURES, INPUT_COLUMNS
from harmonize.engines.audit_rules import EVENT_TAGS as _EVENT_TAGS
from harmonize.engines.audit_rules import RECORD_KEYS as _RECORD_KEYS
from harmonize.tagging.season import local_times
from harmonize.tracks import track_sql

#: Columns of the accepted-pings parquet the DuckDB stage writes for the Dask stage.
PING_COLUMNS = ("row", "vid", "t", "lat", "lon", "sog", "gear", "layer", "smin", "smax", "code")
#: Columns of the edge pings returned (as the table ``track_edges`` of PingReader).
EDGE_COLUMNS = ["row", "vid", "t", "lat", "lon", "sog", "smin", "smax", "code", "gear", "layer", "owned", "file_hours"]
#: Columns of the partial and final fishing-cell tables (as PingReader._aggregate).
CELL_KEYS = ["code", "season_year", "season", "gear", "depth_layer"]


# ---------------------------------------------------------------------------- the client

@contextmanager
def dask_client(scheduler: str | None = None) -> Iterator[Any]:
    """A ``distributed.Client`` for the duration of a step.

    Uses, in this order: the ``scheduler`` address given; the run's setting
    (:mod:`harmonize.settings`; ``HARMONIZE_DASK_SCHEDULER`` on the command line); the client already active in this process
    (``distributed.default_client()``); otherwise a local cluster of threads bound to the
    loopback interface (no dashboard), closed afterwards.
    """
    from distributed import Client, LocalCluster, default_client

    address = scheduler or settings.current().dask_scheduler
    if address:
        client = Client(address)
        try:
            yield client
        finally:
            client.close()
        return
    try:
        yield default_client()
        return
    except ValueError:
        pass
    # threads in this process, talking in-process: no socket is opened at all
    cluster = LocalCluster(n_workers=1, threads_per_worker=os.cpu_count() or 1, processes=False,
                           dashboard_address=None)
    client = Client(cluster)
    try:
        yield client
    finally:
        client.close()
        cluster.close()


# ---------------------------------------------------------------------------- ping tracks

def ping_track(pings: pa.Table | pd.DataFrame, max_speed_kn: float, max_gap_h: float) -> pd.DataFrame:
    """Neighbours, position jumps, speed, fishing class and attributed hours of each ping.

    ``pings`` holds whole vessels (columns :data:`PING_COLUMNS`; ``t`` a timestamp). The
    rules are the one SQL definition of :func:`harmonize.tracks.track_sql`, run by an
    in-memory DuckDB on this partition (the DuckDB engine runs the same text on the whole
    file), so the two engines cannot apply different rules.

    Returns the pings sorted by vessel, time and row, with added columns spike, r_p1, r_n1,
    sp_in, sp_out, hours, speed, fishing, owned (within ``RADIUS`` pings of an end of the
    vessel's pings) and edge (within ``EDGE``).
    """
    rules = track_sql("partition", "vid", "t, row", repr(float(max_speed_kn)), repr(float(max_gap_h)))
    con = duckdb.connect()
    try:
        # one thread per task: the Dask workers already run one task per core; UTC so that a
        # time zone-aware ``t`` comes back as it went in
        con.execute("SET threads = 1; SET TimeZone = 'UTC'")
        con.register("partition", pings)
        table = con.sql(f"""
            SELECT {", ".join(PING_COLUMNS)}, spike, r_p1, r_n1, s_in AS sp_in, s_out AS sp_out,
                   hours, speed, fishing, owned, edge
            FROM ({rules}) ORDER BY vid, t, row""").to_arrow_table()
    finally:
        con.close()
    frame = table.drop_columns(["r_p1", "r_n1"]).to_pandas()
    # the neighbours' rows (NULL at a track's end) stay integers: they name pings in messages
    for name in ("r_p1", "r_n1"):
        frame[name] = table[name].cast(pa.int64()).to_pandas(types_mapper={pa.int64(): pd.Int64Dtype()}.get)
    return frame


def _fishing_pings(track: pd.DataFrame, season_names: Sequence[str], season_offsets: Sequence[int],
                   timezone: str) -> pd.DataFrame:
    """The pings that count as fishing, keyed by cell (:data:`CELL_KEYS`) in the study calendar.

    Only pings classified as fishing, not position jumps, with hours > 0 count, as in
    ``PingReader._aggregate``; ``interior`` marks those that are not owned edge pings (whose
    vessels and derived speeds the store adds when it joins the files of a source).
    """
    use = track[track["fishing"].to_numpy() & ~track["spike"].to_numpy() & (track["hours"].to_numpy() > 0)]
    local = local_times(use["t"], timezone)  # the study calendar (harmonize.tagging.season)
    month = local.dt.month.to_numpy() - 1
    return pd.DataFrame({
        "code": use["code"].to_numpy(np.int64),
        "season_year": (local.dt.year.to_numpy() + np.asarray(season_offsets, np.int64)[month]).astype(np.int32),
        "season": np.asarray(season_names, dtype=object)[month],
        "gear": use["gear"].to_numpy(object), "depth_layer": use["layer"].to_numpy(object),
        "hours": use["hours"].to_numpy(float), "vid": use["vid"].to_numpy(),
        "derived": use["sog"].isna().to_numpy(), "interior": ~use["owned"].to_numpy(bool),
    })


def fishing_partial(track: pd.DataFrame, season_names: Sequence[str], season_offsets: Sequence[int],
                    timezone: str = "UTC") -> pd.DataFrame:
    """Partial fishing-cell sums of whole vessels (columns :data:`CELL_KEYS` and sums)."""
    frame = _fishing_pings(track, season_names, season_offsets, timezone)
    frame["derived"] &= frame["interior"]
    return frame.groupby(CELL_KEYS, sort=False, dropna=False).agg(
        hours=("hours", "sum"), n_vessels=("vid", "nunique"), n_values=("hours", "size"),
        speed_derived=("derived", "any")).reset_index()


def cell_vessels(track: pd.DataFrame, season_names: Sequence[str], season_offsets: Sequence[int],
                 timezone: str = "UTC") -> pd.DataFrame:
    """The distinct (CELL_KEYS, vid) pairs of the interior pings behind :func:`fishing_partial`."""
    frame = _fishing_pings(track, season_names, season_offsets, timezone)
    return frame.loc[frame["interior"].to_numpy(), [*CELL_KEYS, "vid"]].drop_duplicates(ignore_index=True)


@dataclass
class TrackResult:
    """What the Dask ping stage returns to the ping reader."""

    #: Fishing hours per cell (CELL_KEYS, hours, n_vessels, n_values, speed_derived), sorted.
    cells: pd.DataFrame
    #: Position jumps: row, r_p1, sp_in, r_n1, sp_out (for the quarantine messages).
    spikes: pd.DataFrame
    #: Accepted pings (not jumps) classified as fishing, and those with a derived speed.
    n_fishing: int
    n_derived: int
    #: The distinct (CELL_KEYS, vid) pairs: the vessels behind each cell.
    vessels: pd.DataFrame | None = None
    #: The pings at the edges of each vessel's track (:data:`EDGE_COLUMNS`).
    edges: pd.DataFrame | None = None


def _bucket(paths: Sequence[str], max_speed_kn: float, max_gap_h: float, season_names: Sequence[str],
            season_offsets: Sequence[int], timezone: str = "UTC"
            ) -> tuple[pd.DataFrame, pd.DataFrame, int, int, pd.DataFrame, pd.DataFrame]:
    pings = pa.concat_tables([pq.read_table(p, columns=list(PING_COLUMNS)) for p in paths])
    track = ping_track(pings, max_speed_kn, max_gap_h)
    kept = ~track["spike"].to_numpy()
    spikes = track.loc[~kept, ["row", "r_p1", "sp_in", "r_n1", "sp_out"]].reset_index(drop=True)
    return (fishing_partial(track, season_names, season_offsets, timezone), spikes,
            int((track["fishing"].to_numpy() & kept).sum()), int((track["sog"].isna().to_numpy() & kept).sum()),
            cell_vessels(track, season_names, season_offsets, timezone),
            _edge_pings(track))


def _edge_pings(track: pd.DataFrame) -> pd.DataFrame:
    """The edge pings of a track (:data:`EDGE_COLUMNS`), with the hours they count for in the file."""
    edge = track.loc[track["edge"].to_numpy(), [*EDGE_COLUMNS[:-1], "fishing", "spike", "hours"]].reset_index(drop=True)
    counted = edge["fishing"].to_numpy() & ~edge["spike"].to_numpy() & (edge["hours"].to_numpy() > 0)
    edge["file_hours"] = np.where(counted, edge["hours"].to_numpy(float), 0.0)
    return edge.drop(columns=["fishing", "spike", "hours"])


def fishing_hours(buckets: Sequence[Sequence[str]], max_speed_kn: float, max_gap_h: float,
                  season_names: Sequence[str], season_offsets: Sequence[int],
                  scheduler: str | None = None, timezone: str = "UTC") -> TrackResult:
    """Fishing hours per cell from accepted pings in buckets of whole vessels, on Dask.

    Parameters
    ----------
    buckets
        One list of parquet files per bucket; every vessel's pings lie in one bucket.
    max_speed_kn, max_gap_h
        The profile's ``[fishing]`` settings.
    season_names, season_offsets
        Season name and season_year offset of each month 1..12 (study seasons).
    scheduler
        Address of a Dask scheduler; see :func:`dask_client` for the default.
    timezone
        The study calendar's IANA zone, in which months and years are read.

    Returns
    -------
    TrackResult
    """
    with dask_client(scheduler) as client:
        futures = client.map(_bucket, [list(b) for b in buckets], max_speed_kn=max_speed_kn,
                             max_gap_h=max_gap_h, season_names=list(season_names),
                             season_offsets=[int(o) for o in season_offsets], timezone=timezone, pure=False)
        parts = client.gather(futures)
    partial = [p[0] for p in parts if len(p[0])]
    if partial:
        cells = pd.concat(partial, ignore_index=True).groupby(CELL_KEYS, sort=False, dropna=False).agg(
            hours=("hours", "sum"), n_vessels=("n_vessels", "sum"), n_values=("n_values", "sum"),
            speed_derived=("speed_derived", "any")).reset_index()
    else:
        cells = pd.DataFrame({c: [] for c in [*CELL_KEYS, "hours", "n_vessels", "n_values", "speed_derived"]})
    cells = cells.sort_values(CELL_KEYS, kind="stable").reset_index(drop=True)
    cells = cells.astype({"code": np.int64, "season_year": np.int32, "hours": float, "n_vessels": np.int64,
                          "n_values": np.int64, "speed_derived": bool})
    spikes = [p[1] for p in parts if len(p[1])]
    spike_frame = (pd.concat(spikes, ignore_index=True).sort_values("row").reset_index(drop=True) if spikes else
                   pd.DataFrame({"row": pd.Series([], dtype=np.int64), "r_p1": pd.Series([], dtype="Int64"),
                                 "sp_in": pd.Series([], dtype=float), "r_n1": pd.Series([], dtype="Int64"),
                                 "sp_out": pd.Series([], dtype=float)}))
    vessels = pd.concat([p[4] for p in parts], ignore_index=True) if parts else None
    edges = pd.concat([p[5] for p in parts], ignore_index=True) if parts else None
    return TrackResult(cells, spike_frame, sum(p[2] for p in parts), sum(p[3] for p in parts), vessels, edges)


# ---------------------------------------------------------------------------- audit
# The aggregations of harmonize.engines.audit_rules, in pandas: the columns read, the event
# tags and the record keys come from there.

AUDIT_COLUMNS = INPUT_COLUMNS
EVENT_TAGS = list(_EVENT_TAGS)
RECORD_KEYS = list(_RECORD_KEYS)


def _hive_values(path: str) -> dict[str, str]:
    return dict(part.split("=", 1) for part in Path(path).parts if "=" in part)


def read_observation_file(path: str, duplicate_keys: frozenset[str] = frozenset(),
                          max_year: int | None = None) -> pd.DataFrame:
    """The audit's columns of one observation file, with the hive partition values.

    Rows that are probable duplicates (the flag in the file, or ``record_id|ingest_id`` in
    ``duplicate_keys``, the store-wide flags) and rows after ``max_year`` are left out, as
    the audit's SQL leaves them out.
    """
    names = set(pq.read_schema(path).names)
    table = pq.read_table(path, columns=[c for c in AUDIT_COLUMNS if c in names])
    for c in AUDIT_COLUMNS:
        if c not in names:
            table = table.append_column(c, pa.nulls(table.num_rows, pa.list_(pa.string()) if c == "flags" else None))
    hive = _hive_values(path)
    raw_year = hive.get("season_year")
    season_year = None if raw_year in (None, "NULL", "__HIVE_DEFAULT_PARTITION__") else int(raw_year)
    if max_year is not None and (season_year is None or season_year > max_year):
        table = table.slice(0, 0)
    flags = table["flags"].combine_chunks() if table.num_rows else pa.array([], pa.list_(pa.string()))
    flagged = np.zeros(table.num_rows, dtype=bool)
    hit = pc.fill_null(pc.equal(pc.list_flatten(flags), DUPLICATE_FLAG), False).to_numpy(zero_copy_only=False)
    if hit.any():
        flagged[pc.list_parent_indices(flags).to_numpy()[hit]] = True
    frame = table.drop_columns(["flags"]).to_pandas()
    if duplicate_keys:
        keys = frame["record_id"].astype(str) + "|" + frame["ingest_id"].astype(str)
        flagged |= keys.isin(duplicate_keys).to_numpy()
    frame = frame[~flagged]
    frame["source_kind"] = hive.get("source_kind")
    frame["season_year"] = pd.array([season_year] * len(frame), dtype="Int32")
    return frame.reset_index(drop=True)


def _file_partials(path: str, duplicate_keys: frozenset[str], max_year: int | None
                   ) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Per-event and per-record-group partial aggregates of one file."""
    obs = read_observation_file(path, duplicate_keys, max_year)
    flagged = obs.assign(effort_bearing=obs["quantity"].ne("presence").fillna(False).astype(bool),
                         biological=obs["variable_kind"].eq("taxon").fillna(False).astype(bool))
    events = flagged.groupby(list(EVENT_KEYS), dropna=False, sort=False).agg(
        **{t: (t, "first") for t in EVENT_TAGS},
        **{name: (name, how) for name, (_sql, how) in EVENT_MEASURES.items()}).reset_index()
    taxon = obs[obs["variable_kind"].eq("taxon").fillna(False).to_numpy()]
    records = taxon.assign(hit=(taxon["value"] > 0).fillna(False).astype(np.int64)).groupby(
        RECORD_KEYS, dropna=False, sort=False).agg(records=("hit", "size"), encounters=("hit", "sum")).reset_index()
    return events, records


@dataclass
class AuditTables:
    """The audit's heavy aggregates, computed on Dask (small enough for one machine)."""

    #: One row per event: source_id, event_id, EVENT_TAGS, effort_bearing, biological, n_vessels (min).
    events: pd.DataFrame
    #: Taxon records and encounters (value > 0) per RECORD_KEYS.
    records: pd.DataFrame


def audit_tables(paths: Sequence[str], duplicate_keys: frozenset[str] = frozenset(),
                 max_year: int | None = None, scheduler: str | None = None) -> AuditTables:
    """The audit's aggregations over the store's live observation files, on Dask.

    One task per file reduces its rows to per-event and per-record-group partials; Dask DataFrame group-bys combine them across files (an event's rows may lie in
    several files).

    Parameters
    ----------
    paths
        The live parquet files of the store (``Store._live_paths``).
    duplicate_keys
        ``record_id|ingest_id`` of rows the store flags ``probable_duplicate``.
    max_year
        Leave out season years after this one.
    scheduler
        Address of a Dask scheduler; see :func:`dask_client`.
    """
    import dask.dataframe as dd
    from dask import delayed

    with dask_client(scheduler) as client:
        parts = [delayed(_file_partials, nout=2, pure=True)(p, duplicate_keys, max_year) for p in paths]
        if not parts:
            parts = [delayed(_empty_partials, nout=2)()]
        meta = _empty_partials()
        ev = dd.from_delayed([p[0] for p in parts], meta=meta[0], verify_meta=False)
        rec = dd.from_delayed([p[1] for p in parts], meta=meta[1], verify_meta=False)
        n_out = max(1, len(paths) // 16)
        events = ev.groupby(list(EVENT_KEYS), dropna=False).agg(
            {**dict.fromkeys(EVENT_TAGS, "first"), **{name: how for name, (_sql, how) in EVENT_MEASURES.items()}},
            split_out=n_out).reset_index()
        records = rec.groupby(RECORD_KEYS, dropna=False).agg({"records": "sum", "encounters": "sum"}).reset_index()
        events, records = client.compute([events, records], sync=True)
    events = events.astype({"effort_bearing": bool, "biological": bool})
    events["n_vessels"] = pd.array(events["n_vessels"], dtype="Int32")
    return AuditTables(events.reset_index(drop=True), records.reset_index(drop=True))


def _empty_partials() -> tuple[pd.DataFrame, pd.DataFrame]:
    def text() -> pd.Series:
        return pd.Series([], dtype=object)

    year = pd.Series([], dtype="Int32")
    events = pd.DataFrame({"source_id": text(), "event_id": text(),
                           **{t: (year if t == "season_year" else text()) for t in EVENT_TAGS},
                           "effort_bearing": pd.Series([], dtype=bool), "biological": pd.Series([], dtype=bool),
                           "n_vessels": pd.Series([], dtype="Int32")})
    records = pd.DataFrame({**{k: (year if k == "season_year" else text()) for k in RECORD_KEYS},
                            "records": pd.Series([], dtype=np.int64), "encounters": pd.Series([], dtype=np.int64)})
    return events, records


def duplicate_keys(con: Any) -> frozenset[str]:
    """``record_id|ingest_id`` of the rows the store flags probable_duplicate (harmonize.twins)."""
    try:
        rows = con.execute("SELECT DISTINCT record_id || '|' || ingest_id FROM store_flags WHERE flag = ?",
                           [DUPLICATE_FLAG]).fetchall()
    except duckdb.Error:  # a store without the twins tables has no such rows
        return frozenset()
    return frozenset(r[0] for r in rows)
