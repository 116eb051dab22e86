"""Cross-source twins: volunteer records that repeat a sighting already in the store.

The same animal is often reported by an agency survey and a volunteer, or by two
volunteers of one party. A record of an opportunistic source is a *probable duplicate* when
a better-ranked record of the same taxon lies within its source's distance and time windows
(profile ``[duplicates]``; defaults 2.0 km and 60 min, common practice). The distance to a
record of an event with a track (a transect segment, a trawl tow) is the distance to the
nearest point of its track, not to its midpoint. Two counts are twins only when the
opportunistic count is at most :data:`MAX_COUNT_RATIO` times the other: 200 gulls on a
checklist are not a repeat of the 1 gull a transect counted. Records are matched one by one,
so a complete checklist with its own effort keeps every record that no better record
repeats. Nothing is deleted:
the record keeps its row, the ``observations`` view adds the flag ``probable_duplicate``, and
the ``twins`` table links it to its twin.

Which record is kept (the primary) follows one visible rule, in this order:

1. the source's rank: ``[duplicates] rank`` in an opportunistic profile, otherwise by provider
   type (agency, model and remote sensing 0, industry 1, volunteer 2); lower is kept;
2. a counted record before a presence-only one;
3. a record with a clock time before one dated to the day only (flag ``date_only``);
4. the earlier record (event start), then the earlier ingest id, then the earlier row of the
   file, then the record id.

Only records of opportunistic sources are ever flagged: agency surveys keep their design.
Two counts of complete checklists (volunteer effort units) are twins only when the watches
overlap in time, and two records of one source and one observer likewise: consecutive
checklists of a watch, or of the members of a party, are separate effort, not duplicates.

The rule runs in DuckDB over the whole store at every commit (so it also holds when the
agency survey is ingested after the volunteer file): :func:`install` registers
:func:`on_commit` as a commit hook of the store (:func:`harmonize.store.register_commit_hook`;
the pipeline installs it), which knows nothing of volunteers or profiles. Candidate pairs come
from an equi-join
on (taxon, latitude bin, longitude bin, time bin) with bins at least as wide as the largest
window, probing the 27 neighbouring bins; the exact test then uses the distance on the local
tangent plane of the WGS84 ellipsoid, whose radii of curvature M and N follow Snyder 1987,
"Map Projections - A Working Manual", USGS Professional Paper 1395, eqs. 4-18 and 4-20
(equation numbers from memory; the test checks the distances against GeographicLib, which
agrees with the geodesic of Karney 2013 to better than 1e-5 relative at a few km).

The same refresh flags ``high_count``: a count of an opportunistic source whose logarithm
lies beyond Tukey's "far out" fence (upper quartile + 3 interquartile ranges; Tukey 1977,
Exploratory Data Analysis) of the counts of the same taxon in the store, with at least
:data:`HIGH_COUNT_MIN_N` counts for reference and an interquartile range of at least a
factor 2.
"""

from __future__ import annotations

import math

import duckdb
import numpy as np
import pandas as pd

from harmonize import geodesy
from harmonize.store import IngestRecord, has_table, register_commit_hook
from harmonize.twin_windows import HOOK_NAME, TwinSettings

DEFAULT_RANKS = {"agency": 0, "model": 0, "remote_sensing": 0, "industry": 1, "volunteer": 2}
HIGH_COUNT_MIN_N = 20
#: A count more than this many times its would-be twin's count is another sighting: two
#: observers counting one flock usually agree within a factor of two (common practice).
MAX_COUNT_RATIO = 2.0
DUPLICATE_FLAG = "probable_duplicate"
HIGH_COUNT_FLAG = "high_count"

# WGS84 (NIMA TR8350.2, 3rd ed. 2000), from the one geodesy module
WGS84_A_M = geodesy.WGS84_A
_E2 = geodesy.E2

_TABLES_SQL = """
CREATE TABLE IF NOT EXISTS twin_settings (
    ingest_id VARCHAR NOT NULL, source_id VARCHAR NOT NULL,
    distance_km DOUBLE NOT NULL, minutes DOUBLE NOT NULL, rank INTEGER
);
CREATE TABLE IF NOT EXISTS twins (
    record_id VARCHAR NOT NULL, ingest_id VARCHAR NOT NULL,
    twin_record_id VARCHAR NOT NULL, twin_ingest_id VARCHAR NOT NULL,
    source_id VARCHAR NOT NULL, twin_source_id VARCHAR NOT NULL, variable VARCHAR,
    distance_km DOUBLE NOT NULL, minutes DOUBLE NOT NULL
);
"""


def local_distance_km(lon1: np.ndarray, lat1: np.ndarray, lon2: np.ndarray, lat2: np.ndarray) -> np.ndarray:
    """Distance (km) on the tangent plane of the WGS84 ellipsoid at the mean latitude.

    ``d = sqrt((N cos(phi) dlambda)^2 + (M dphi)^2)`` with the radii of curvature of the
    prime vertical N and the meridian M (Snyder 1987, eqs. 4-18 and 4-20). Good to about
    1e-5 relative for separations of a few km; this is the formula the store's SQL uses.
    """
    return geodesy.distance_m(lat1, lon1, lat2, lon2) / 1000.0


def _distance_sql(a: str, b: str) -> str:
    return f"({geodesy.distance_sql(f'{a}.lat', f'{a}.lon', f'{b}.lat', f'{b}.lon')}) / 1000.0"


def _track_distance_sql(a: str, b: str) -> str:
    """SQL: km from point ``a`` to the nearest point of ``b``'s track (start-end segment), on
    the tangent plane of the WGS84 ellipsoid at ``a`` (radii as in :func:`local_distance_km`;
    the nearest point of a straight segment by the clamped projection, common geometry)."""
    phi = f"radians({a}.lat)"
    w = f"sqrt(1 - {_E2!r} * pow(sin({phi}), 2))"
    east = f"{WGS84_A_M!r} / {w} * cos({phi})"
    north = f"{WGS84_A_M * (1 - _E2)!r} / pow({w}, 3)"

    def xy(lat: str, lon: str) -> tuple[str, str]:
        return (f"({east} * radians((({lon} - {a}.lon + 540.0) % 360.0) - 180.0))",
                f"({north} * radians({lat} - {a}.lat))")

    x1, y1 = xy(f"{b}.ty1", f"{b}.tx1")
    x2, y2 = xy(f"{b}.ty2", f"{b}.tx2")
    dx, dy = f"({x2} - {x1})", f"({y2} - {y1})"
    length2 = f"({dx} * {dx} + {dy} * {dy})"
    t = f"CASE WHEN {length2} > 0 THEN greatest(0.0, least(1.0, -({x1} * {dx} + {y1} * {dy}) / {length2})) ELSE 0.0 END"
    return f"sqrt(pow({x1} + ({t}) * {dx}, 2) + pow({y1} + ({t}) * {dy}, 2)) / 1000.0"


def ensure_tables(con: duckdb.DuckDBPyConnection) -> None:
    """Create the twin tables in a store opened for writing (no-op when they exist)."""
    con.execute(_TABLES_SQL)


def record_settings(con: duckdb.DuckDBPyConnection, ingest_id: str, source_id: str, settings: TwinSettings) -> None:
    """Persist one ingest's windows, so that later refreshes use them."""
    con.execute("INSERT INTO twin_settings VALUES (?, ?, ?, ?, ?)",
                [ingest_id, source_id, settings.distance_km, settings.minutes, settings.rank])


def on_commit(con: duckdb.DuckDBPyConnection, record: IngestRecord | None) -> None:
    """The store's commit hook: record the ingest's windows (``record.hook_data["twins"]``, for
    volunteer sources) and recompute the twins and store-wide flags over the whole store."""
    ensure_tables(con)
    settings = None if record is None else record.hook_data.get(HOOK_NAME)
    if settings is not None:
        record_settings(con, record.ingest_id, record.source_id, settings)
    refresh(con)


def install() -> None:
    """Register :func:`on_commit` as the store's commit hook ``"twins"`` (idempotent).

    Called by the layers that change the live set (the pipeline, :mod:`harmonize.ingest`, and
    :mod:`harmonize.repair`).
    """
    register_commit_hook(HOOK_NAME, on_commit)


_RANK_SQL = "CASE o.provider_type " + " ".join(f"WHEN '{k}' THEN {v}" for k, v in DEFAULT_RANKS.items()) + " ELSE 3 END"

# b is kept before a (the ordering of the module docstring)
_OUTRANKS = """(b.rank < a.rank OR (b.rank = a.rank AND (b.qorder < a.qorder OR (b.qorder = a.qorder AND (
    b.vague < a.vague OR (b.vague = a.vague AND (
    b.t0 < a.t0 OR (b.t0 = a.t0 AND (b.ingest_id < a.ingest_id OR (b.ingest_id = a.ingest_id
    AND (b.source_row < a.source_row OR (b.source_row = a.source_row AND b.record_id < a.record_id))))))))))))"""


def refresh(con: duckdb.DuckDBPyConnection, base: str = "observations_base") -> int:
    """Recompute the ``twins`` and ``store_flags`` tables over the whole store.

    Runs inside the caller's transaction (Store.commit). Returns the number of twins.
    """
    con.execute("DELETE FROM twins")
    con.execute("DELETE FROM store_flags")
    con.execute("""
        CREATE OR REPLACE TEMP TABLE _twin_sources AS
        SELECT s.source_id, i.source_kind, s.distance_km, s.minutes, s.rank
        FROM twin_settings s JOIN ingests i USING (ingest_id) WHERE i.status = 'complete'
        QUALIFY row_number() OVER (PARTITION BY s.source_id ORDER BY i.started_at DESC, s.ingest_id DESC) = 1""")
    if not con.execute("SELECT count(*) FROM _twin_sources").fetchall()[0][0]:
        return 0
    con.execute(f"""
        CREATE OR REPLACE TEMP TABLE _twin_cand AS
        WITH wanted AS (
            SELECT DISTINCT variable FROM {base}
            WHERE variable_kind = 'taxon' AND source_id IN (SELECT source_id FROM _twin_sources))
        SELECT hash(o.record_id, o.ingest_id) AS cid, o.record_id, o.ingest_id, o.source_id, o.event_id, o.variable,
               o.observer_id, o.lat, o.lon,
               coalesce(o.source_row, 0) AS source_row, epoch(o.event_start) AS t0, epoch(coalesce(o.event_end, o.event_start)) AS t1,
               coalesce(s.rank, {_RANK_SQL}) AS rank,
               CASE WHEN o.quantity = 'presence' THEN 1 ELSE 0 END AS qorder,
               CASE WHEN list_contains(o.flags, 'date_only') THEN 1 ELSE 0 END AS vague,
               s.distance_km AS win_km, s.minutes AS win_min, (s.source_id IS NOT NULL AND o.source_kind = s.source_kind) AS flaggable,
               o.quantity, o.value, o.track_start_lat AS ty1, o.track_start_lon AS tx1, o.track_end_lat AS ty2,
               o.track_end_lon AS tx2,
               (o.track_start_lat IS NOT NULL AND o.track_start_lon IS NOT NULL AND o.track_end_lat IS NOT NULL
                AND o.track_end_lon IS NOT NULL) AS tracked
        FROM {base} o SEMI JOIN wanted w ON w.variable = o.variable LEFT JOIN _twin_sources s ON s.source_id = o.source_id
        WHERE o.variable_kind = 'taxon' AND NOT coalesce(o.zero_filled, false) AND o.value > 0
          AND o.quantity IN ('count', 'presence', 'biomass') AND o.lat IS NOT NULL AND o.lon IS NOT NULL
          AND o.event_start IS NOT NULL""")
    km, minutes, span, top = con.execute(
        "SELECT max(win_km), max(win_min), coalesce(max(t1 - t0), 0), coalesce(max(abs(lat)), 0) FROM _twin_cand"
    ).fetchall()[0]
    if km is None:
        return 0
    # a record near any point of a track may lie up to half its length from the track's
    # midpoint (the point that is binned): widen the search by the longest half-track
    half = con.execute("SELECT coalesce(max(" + _distance_sql("s", "e") + ") / 2, 0) FROM "
                       "(SELECT ty1 AS lat, tx1 AS lon, ty2, tx2 FROM _twin_cand WHERE tracked) s, "
                       "LATERAL (SELECT s.ty2 AS lat, s.tx2 AS lon) e").fetchall()[0][0]
    km = km + float(half) * 1.001 + 1e-6
    # Bins twice the largest window. Each record of an opportunistic source probes exactly the
    # bins its window box touches (about 2 per axis); a degree of latitude is >= 110.57 km and
    # a degree of longitude >= 111.32 cos(lat) km on WGS84, so the boxes below are on the safe
    # side. Times: b.t0 lies in [a.t0 - window - longest event, a.t1 + window].
    lat_bin = 2 * km / 110.0
    lon_bin = min(360.0, 2 * km / (111.0 * math.cos(math.radians(min(top + lat_bin, 89.0)))))
    time_bin = 2 * minutes * 60.0 + span + 1.0
    # Only compact keys are binned and exploded; the records' text columns join back for the
    # few candidate pairs.
    con.execute("""
        CREATE OR REPLACE TEMP TABLE _twin_binned AS
        SELECT cid, hash(variable) AS var, CAST(floor(lat / $1) AS BIGINT) AS iy,
               CAST(floor(lon / $2) AS BIGINT) AS ix, CAST(floor(t0 / $3) AS BIGINT) AS it
        FROM _twin_cand""", [lat_bin, lon_bin, time_bin])
    reach = f"(c.win_km + {float(half) * 1.001 + 1e-6!r})"
    box_lat = f"{reach} / 110.0"
    box_lon = f"least(180.0, {reach} / (111.0 * cos(radians(least(abs(c.lat) + {lat_bin!r}, 89.0)))))"
    con.execute(f"""
        CREATE OR REPLACE TEMP TABLE _twin_pairs AS
        WITH c AS (SELECT cid, hash(variable) AS var, lat, lon, t0, t1, win_km, win_min FROM _twin_cand WHERE flaggable),
        a1 AS (SELECT c.*, unnest(range(CAST(floor((c.lat - {box_lat}) / {lat_bin!r}) AS BIGINT),
                                        CAST(floor((c.lat + {box_lat}) / {lat_bin!r}) AS BIGINT) + 1)) AS jy FROM c),
        a2 AS (SELECT c.*, unnest(range(CAST(floor((c.lon - {box_lon}) / {lon_bin!r}) AS BIGINT),
                                        CAST(floor((c.lon + {box_lon}) / {lon_bin!r}) AS BIGINT) + 1)) AS jx FROM a1 c),
        a3 AS (SELECT cid, var, jy, jx,
                      unnest(range(CAST(floor((c.t0 - c.win_min * 60 - {span!r}) / {time_bin!r}) AS BIGINT),
                                   CAST(floor((c.t1 + c.win_min * 60) / {time_bin!r}) AS BIGINT) + 1)) AS jt FROM a2 c)
        SELECT a3.cid AS a_cid, b.cid AS b_cid
        FROM a3 JOIN _twin_binned b ON b.var = a3.var AND b.iy = a3.jy AND b.ix = a3.jx AND b.it = a3.jt
        WHERE b.cid <> a3.cid""")
    con.execute(f"""
        INSERT INTO twins
        WITH pairs AS (
            SELECT a.record_id, a.ingest_id, b.record_id AS twin_record_id, b.ingest_id AS twin_ingest_id,
                   a.source_id, b.source_id AS twin_source_id, a.variable,
                   CASE WHEN b.tracked THEN {_track_distance_sql('a', 'b')} ELSE {_distance_sql('a', 'b')} END
                       AS distance_km,
                   greatest(0, b.t0 - a.t1, a.t0 - b.t1) / 60.0 AS minutes,
                   a.win_km, a.win_min, b.rank AS twin_rank
            FROM _twin_pairs p JOIN _twin_cand a ON a.cid = p.a_cid JOIN _twin_cand b ON b.cid = p.b_cid
            WHERE b.variable = a.variable AND NOT (b.ingest_id = a.ingest_id AND b.event_id = a.event_id)
              AND (b.source_id <> a.source_id OR a.observer_id IS NULL OR b.observer_id IS NULL
                   OR a.observer_id <> b.observer_id OR (a.t0 < b.t1 AND b.t0 < a.t1) OR a.t0 = b.t0)
              AND (NOT b.flaggable OR a.qorder + b.qorder > 0 OR (a.t0 < b.t1 AND b.t0 < a.t1) OR a.t0 = b.t0)
              -- a count far above its would-be twin's is another sighting, not a repeat of it
              AND NOT (a.quantity = 'count' AND b.quantity = 'count' AND a.value > {MAX_COUNT_RATIO!r} * b.value)
              AND {_OUTRANKS})
        SELECT record_id, ingest_id, twin_record_id, twin_ingest_id, source_id, twin_source_id, variable,
               distance_km, minutes
        FROM pairs WHERE distance_km <= win_km AND minutes <= win_min
        QUALIFY row_number() OVER (PARTITION BY record_id, ingest_id
                                   ORDER BY twin_rank, distance_km, minutes, twin_record_id) = 1""")
    con.execute(f"INSERT INTO store_flags SELECT record_id, ingest_id, '{DUPLICATE_FLAG}' FROM twins")
    con.execute(f"""
        INSERT INTO store_flags
        WITH ref AS (
            SELECT variable, quantile_cont(ln(value), 0.25) AS q1, quantile_cont(ln(value), 0.75) AS q3,
                   count(*) AS n
            FROM {base} WHERE variable_kind = 'taxon' AND quantity = 'count' AND value > 0
                             AND NOT coalesce(zero_filled, false)
            GROUP BY variable)
        SELECT o.record_id, o.ingest_id, '{HIGH_COUNT_FLAG}'
        FROM {base} o JOIN ref USING (variable) JOIN _twin_sources s USING (source_id)
        WHERE o.source_kind = s.source_kind AND o.quantity = 'count' AND o.value > 0 AND ref.n >= {HIGH_COUNT_MIN_N}
          AND ln(o.value) > ref.q3 + 3 * greatest(ref.q3 - ref.q1, ln(2))""")
    for name in ("_twin_sources", "_twin_cand", "_twin_binned", "_twin_pairs"):
        con.execute(f"DROP TABLE IF EXISTS {name}")
    return int(con.execute("SELECT count(*) FROM twins").fetchall()[0][0])


def twins_frame(con: duckdb.DuckDBPyConnection) -> pd.DataFrame:
    """The twins with both records' taxon, time and position, for people to review."""
    if not has_table(con, "twins"):
        return pd.DataFrame(columns=["record_id", "twin_record_id", "source_id", "twin_source_id",
                                     "variable", "distance_km", "minutes"])
    return con.execute("""
        SELECT t.record_id, t.twin_record_id, t.source_id, t.twin_source_id, t.variable,
               round(t.distance_km, 3) AS distance_km, round(t.minutes, 1) AS minutes,
               a.event_id, a.event_start, a.lat, a.lon, a.quantity, a.value,
               b.event_id AS twin_event_id, b.event_start AS twin_event_start, b.lat AS twin_lat,
               b.lon AS twin_lon, b.quantity AS twin_quantity, b.value AS twin_value
        FROM twins t
        JOIN observations a ON a.record_id = t.record_id AND a.ingest_id = t.ingest_id
        JOIN observations b ON b.record_id = t.twin_record_id AND b.ingest_id = t.twin_ingest_id
        ORDER BY t.source_id, a.event_start, t.record_id""").df()


def volunteer_only(con: duckdb.DuckDBPyConnection) -> pd.DataFrame:
    """Strata and seasons whose biological records all come from volunteers.

    One row per (stratum, season_year, season) sampled only by volunteer sources, with the
    number of volunteer events: there the opportunistic design carries the whole model.
    """
    return con.execute("""
        SELECT stratum, season_year, season, count(DISTINCT source_id || '/' || event_id) AS volunteer_events
        FROM observations WHERE variable_kind = 'taxon'
        GROUP BY stratum, season_year, season
        HAVING bool_and(provider_type = 'volunteer')
        ORDER BY season_year, season, stratum""").df()
