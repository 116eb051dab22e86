"""The floor of the same work as a ping ingest: one DuckDB statement from the CSV to the cells.

What harmonize's ping ingest must compute, done as directly as DuckDB allows, in one
``COPY (SELECT ...) TO parquet`` statement and nothing else: read the CSV as text; type the
fields and give each row its first problem (the reason cascade: missing fields, times,
numbers, ranges, speed limit, future times, unknown gear, outside the domain); drop repeated
(vessel, time) pings keeping the first row; order each vessel's pings by time once and apply
the track rules (neighbours, position jumps, derived speed, speed window, half intervals
capped at ``max_gap_h / 2``: ``harmonize.tracks.track_sql``, the rule text harmonize runs);
put each ping in its grid cell by the study projection's closed form and floor division
(``harmonize.geodesy.closed_form``); test it against the domain polygon (edges straight in
longitude/latitude, RFC 7946 section 3.1.1) by counting edge crossings; and sum fishing
hours per cell x season_year x season x gear x depth layer with the distinct vessels.

It keeps no quarantine rows, messages, row accounting, vessel pseudonyms, provenance or
store: what it leaves out is what harmonize adds to the same numbers. Its output is checked
equal to harmonize's store (:func:`check_equal`) inside the benchmark.
"""

from __future__ import annotations

import json
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd

from harmonize import load_study
from harmonize.adapters.fishing import fishing_settings
from harmonize.geodesy import closed_form
from harmonize.ingest import prepare
from harmonize.tagging import season_sql
from harmonize.tracks import track_sql


def _crossing_sql(ring: list[tuple[float, float]], lon: str, lat: str) -> str:
    """SQL: the point is inside the closed ring (even-odd rule on the edges' crossings)."""
    terms = []
    for (x1, y1), (x2, y2) in zip(ring[:-1], ring[1:], strict=True):
        if y1 == y2:
            continue
        terms.append(f"CASE WHEN (({y1!r} > {lat}) <> ({y2!r} > {lat})) AND "
                     f"{lon} < {x1!r} + ({lat} - {y1!r}) * {(x2 - x1) / (y2 - y1)!r} THEN 1 ELSE 0 END")
    return f"(({' + '.join(terms)}) % 2 = 1)"


def floor_sql(study_dir: Path, profile_name: str, csv: Path, out: Path) -> str:
    """The one statement (a ``COPY``) for the study's profile and file."""
    study = load_study(study_dir)
    profile = prepare(study, profile_name)[1]
    s = fishing_settings(profile, study)
    cols = profile.column_map("rows")
    form = closed_form(study.crs)
    if form is None:
        raise SystemExit(f"{study.crs} has no closed form here; the floor needs one")
    x, y = form.sql("lon", "lat")
    size = study.cell_size_km * 1000.0
    geometry = json.loads((study_dir / "domain.geojson").read_text())["features"][0]["geometry"]
    inside = _crossing_sql([tuple(p) for p in geometry["coordinates"][0]], "lon", "lat")
    gears = pd.read_csv(csv, usecols=[cols["gear"]], dtype=str)[cols["gear"]].dropna().unique()
    rules = {g: s.rule(g, study) for g in gears}
    gear_rows = ", ".join(f"('{g}', '{r.gear}', '{r.layer}', {r.speed_min_kn!r}, {r.speed_max_kn!r})"
                          for g, r in rules.items() if r is not None) or "(NULL, NULL, NULL, NULL, NULL)"
    season, season_year = season_sql("t", study.seasons, study.timezone)
    now = (pd.Timestamp.now("UTC").tz_localize(None) + pd.Timedelta(days=1)).isoformat()
    na = "('', 'na', 'n/a', 'nan', 'null', 'none', '-')"

    def missing(c: str) -> str:
        return f"({c} IS NULL OR lower(trim({c})) IN {na})"

    typed = f"""
        SELECT row, v, t, lat, lon_in - 360.0 * floor((lon_in + 180.0) / 360.0) AS lon, sog, g.gear, g.layer, g.smin, g.smax,
               CASE WHEN {missing('v')} OR {missing('t_txt')} OR {missing('lat_txt')} OR {missing('lon_txt')}
                         OR {missing('gear_raw')} THEN 'missing_value'
                    WHEN t IS NULL OR NOT isfinite(t) THEN 'bad_time'
                    WHEN lat IS NULL OR lon_in IS NULL OR (sog IS NULL AND NOT {missing('sog_txt')}) THEN 'bad_type'
                    WHEN NOT isfinite(lat) OR NOT isfinite(lon_in) OR NOT isfinite(sog) OR lat < -90 OR lat > 90
                         OR lon_in < -180 OR lon_in > 360 OR sog < 0 THEN 'out_of_range'
                    WHEN sog > {s.max_speed_kn!r} THEN 'implausible_speed'
                    WHEN t > TIMESTAMP '{now}' THEN 'future_time'
                    WHEN g.gear IS NULL THEN 'unknown_gear' END AS reason
        FROM (SELECT row_number() OVER () AS row, "{cols['vessel_id']}" AS v, "{cols['time']}" AS t_txt,
                     "{cols['lat']}" AS lat_txt, "{cols['lon']}" AS lon_txt, "{cols['speed_kn']}" AS sog_txt,
                     "{cols['gear']}" AS gear_raw,
                     TRY_CAST("{cols['time']}" AS TIMESTAMP) AS t, TRY_CAST("{cols['lat']}" AS DOUBLE) AS lat,
                     TRY_CAST("{cols['lon']}" AS DOUBLE) AS lon_in, TRY_CAST("{cols['speed_kn']}" AS DOUBLE) AS sog
              FROM read_csv('{csv}', all_varchar = true, header = true))
        LEFT JOIN (VALUES {gear_rows}) g(gear_raw, gear, layer, smin, smax) USING (gear_raw)"""
    located = f"""
        SELECT *, CASE WHEN {inside} THEN floor({x} / {size!r}) END AS ix, floor({y} / {size!r}) AS iy
        FROM ({typed}) WHERE reason IS NULL"""
    # the first row of each (vessel, time) is kept; every ping outside the domain is out
    pings = f"""(SELECT * FROM ({located}) WHERE ix IS NOT NULL
                 QUALIFY row_number() OVER (PARTITION BY v, t ORDER BY row) = 1)"""
    track = track_sql(pings, "v", "t, row", repr(s.max_speed_kn), repr(s.max_gap_h))
    cells = f"""
        SELECT CAST(ix AS BIGINT) AS ix, CAST(iy AS BIGINT) AS iy, {season_year} AS season_year, {season} AS season,
               gear, layer AS depth_layer, sum(hours) AS hours, count(DISTINCT v) AS n_vessels, count(*) AS n_values
        FROM ({track}) WHERE fishing AND NOT spike AND hours > 0 GROUP BY ALL"""
    return f"COPY ({cells}) TO '{out}' (FORMAT parquet)"


def pings_floor(study_dir: Path, profile_name: str, csv: Path, out: Path) -> int:
    """Run the floor's statement; returns the cell-periods written."""
    sql = floor_sql(study_dir, profile_name, csv, out)
    con = duckdb.connect()
    try:
        con.execute("SET TimeZone = 'UTC'")
        return int(con.execute(sql).fetchall()[0][0])
    finally:
        con.close()


def check_equal(floor_parquet: Path, study_dir: Path) -> dict[str, float]:
    """Compare the floor's cells with the store's fishing cell-periods; raises when they differ."""
    from harmonize.store import Store

    floor = pd.read_parquet(floor_parquet)
    floor["event_id"] = (floor["gear"] + "/x" + floor["ix"].astype(str) + "_y" + floor["iy"].astype(str) + "/"
                         + floor["season_year"].astype(str) + "-" + floor["season"] + "/" + floor["depth_layer"])
    floor = floor.set_index("event_id").sort_index()
    with Store(study_dir / "store").connect() as con:
        store = con.execute("""SELECT event_id, value, n_vessels, n_values FROM observations
                               WHERE source_kind = 'effort' ORDER BY event_id""").df().set_index("event_id")
    if list(floor.index) != list(store.index):
        raise AssertionError(f"the floor has {len(floor)} cell-periods, the store {len(store)}; "
                             f"{len(floor.index.symmetric_difference(store.index))} differ")
    np.testing.assert_allclose(floor["hours"].to_numpy(), store["value"].to_numpy(), rtol=1e-9, atol=1e-9)
    assert floor["n_vessels"].tolist() == store["n_vessels"].tolist()
    assert floor["n_values"].tolist() == store["n_values"].tolist()
    return {"cell_periods": float(len(store)), "hours": float(store["value"].sum())}
