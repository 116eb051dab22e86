"""The same work as a trawl ingest of the benchmark's haul and catch files, done directly.

The least a direct implementation of what harmonize does to a trawl survey needs:

- per haul (N/8 rows; vectorised numpy, pyproj and harmonize's tagging functions): typed
  columns, duplicate ids, times, WGS84 geodesic tow length and midpoint (pyproj.Geod, as
  the adapter), area swept, towing speed window, domain test, season, season year, depth
  layer, grid cell and stratum;
- per distinct taxon name and life stage text (a few dozen): canonical name, closest known
  name of an unknown one, normalised stage;
- per catch row, in **one DuckDB statement** from ``read_csv`` to the partitioned parquet
  output: typing with bad-number detection, unknown taxa, rows without a quantity, rows of
  rejected hauls, sums per haul x taxon x stage with their source rows, inferred zeros of
  the protocol's targets in their year windows (not for a taxon whose row went to
  quarantine), bottom temperatures, record ids (md5), effort, density, flags.

It keeps no quarantine table and no ingest records and writes no store: what is left is the
work every observation row needs. :func:`check_trawl_floor` compares its rows with the
store harmonize wrote from the same files.
"""

from __future__ import annotations

import difflib
import shutil
import unicodedata
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pyproj

KM_PER_NMI = 1.852
TOW_SPEED_KN = (0.5, 8.0)
NA_TOKENS = ("", "na", "n/a", "nan", "null", "none", "-")
#: Plural life stages written as the singular (as the adapters do).
LIFE_STAGE_PLURALS = {"adults": "adult", "larvae": "larva", "juveniles": "juvenile", "eggs": "egg"}


def _hauls(con: duckdb.DuckDBPyConnection, path: Path, study) -> pd.DataFrame:  # type: ignore[no-untyped-def]
    """The accepted hauls with their effort and tags."""
    from harmonize.tagging import (
        Grid,
        assign_strata,
        calendar_year,
        inside_domain,
        normalise_lon,
        tag_depth_layer,
        tag_season,
    )

    ev = con.sql(f"""
        SELECT row_number() OVER () AS source_row, haul_id AS event_id,
               TRY_CAST(start_time_utc AS TIMESTAMP) AS t0, TRY_CAST(end_time_utc AS TIMESTAMP) AS t1,
               TRY_CAST(lat_start AS DOUBLE) AS slat, TRY_CAST(lon_start AS DOUBLE) AS slon,
               TRY_CAST(lat_end AS DOUBLE) AS elat, TRY_CAST(lon_end AS DOUBLE) AS elon,
               TRY_CAST(wing_spread_m AS DOUBLE) AS width, TRY_CAST(depth_m AS DOUBLE) AS bottom,
               TRY_CAST(bottom_temp_c AS DOUBLE) AS temp
        FROM read_csv('{path}', all_varchar = true)""").df()
    ok = ev["event_id"].notna().to_numpy() & ~ev["event_id"].duplicated().to_numpy()
    ok &= ev["t0"].notna().to_numpy() & ev["t1"].notna().to_numpy()
    hours = ((ev["t1"] - ev["t0"]).dt.total_seconds() / 3600).to_numpy(float, na_value=np.nan)
    ok &= hours > 0
    geod = pyproj.Geod(ellps="WGS84")
    slon, slat, elon, elat = (ev[c].to_numpy(float) for c in ("slon", "slat", "elon", "elat"))
    az, _, dist_m = geod.inv(slon, slat, elon, elat)
    mlon, mlat, _ = geod.fwd(slon, slat, az, np.asarray(dist_m) / 2)
    km = np.asarray(dist_m) / 1000
    area = km * ev["width"].to_numpy(float) / 1000
    with np.errstate(invalid="ignore", divide="ignore"):
        speed = km / KM_PER_NMI / hours
    ok &= (area > 0) & (speed >= TOW_SPEED_KN[0]) & (speed <= TOW_SPEED_KN[1])
    lon, lat = normalise_lon(np.asarray(mlon)), np.asarray(mlat)
    ok &= inside_domain(study.domain, lon, lat)
    h = pd.DataFrame({
        "event_id": ev["event_id"], "source_row": ev["source_row"], "event_start": ev["t0"],
        "event_end": ev["t1"], "lat": lat, "lon": lon, "effort": area, "bottom": ev["bottom"],
        "temp": ev["temp"], "track_start_lat": slat, "track_start_lon": normalise_lon(slon),
        "track_end_lat": elat, "track_end_lon": normalise_lon(elon),
    })[ok].reset_index(drop=True)
    season, season_year = tag_season(h["event_start"], study.seasons, study.timezone)
    h["season"], h["season_year"] = np.asarray(season, dtype=object), np.asarray(season_year, dtype=np.int64)
    h["year"] = np.asarray(calendar_year(h["event_start"], study.timezone), dtype=np.int64)
    b = h["bottom"].to_numpy(float)
    h["depth_layer"] = tag_depth_layer(b, b, b, study.depth_layers, study.near_bottom_m, np.ones(len(h), bool))
    h["cell_id"] = Grid(study.crs, study.cell_size_km).cell_ids(lon[ok], lat[ok]).to_numpy(dtype=object)
    h["stratum"] = np.asarray(assign_strata(study.strata, lon[ok], lat[ok]), dtype=object)
    return h


def _fold(text: str) -> str:
    """Lower case, no diacritics, single spaces (how names are compared for the closest one)."""
    table = str.maketrans({"ø": "o", "æ": "ae", "œ": "oe", "ß": "ss", "ł": "l", "đ": "d"})
    text = unicodedata.normalize("NFKD", str(text).casefold().translate(table))
    return " ".join("".join(c for c in text if not unicodedata.combining(c)).split())


def _closest(name: str, lookup: dict[str, str], taxa: list[str]) -> str | None:
    """The known taxon a misspelt name most likely meant (whole name, then its first word)."""
    keyed: dict[str, str] = {}
    for known in [*lookup, *taxa]:
        key = _fold(known)
        keyed.setdefault(key, known)
        first = key.split(" ")[0]
        if first and first != key:
            keyed.setdefault(first, known)
    key = _fold(name)
    hits = difflib.get_close_matches(key, list(keyed), n=6, cutoff=0.6)
    hits += difflib.get_close_matches(key.split(" ")[0], list(keyed), n=3, cutoff=0.75)
    return lookup.get(keyed[hits[0]].casefold(), keyed[hits[0]]) if hits else None


def _names(con: duckdb.DuckDBPyConnection, path: Path, study) -> tuple[pd.DataFrame, pd.DataFrame]:  # type: ignore[no-untyped-def]
    """Distinct taxon names (canonical, closest known) and life stage texts (normalised).

    Written here rather than imported from harmonize.adapters, whose import brings pandera,
    which a direct implementation does not need.
    """
    from harmonize.study import normalise_name, taxon_lookup

    lookup = taxon_lookup(study.taxa)
    species = con.sql(f"SELECT DISTINCT species FROM read_csv('{path}', all_varchar = true)").df()["species"]
    canonical = normalise_name(species.astype("string")).map(lookup).astype(object)
    taxa = list(study.taxa["taxon"])
    guess = [None if pd.notna(c) or pd.isna(n) else _closest(n, lookup, taxa) for n, c in zip(species, canonical, strict=True)]
    names = pd.DataFrame({"name": species.astype(object), "taxon": canonical, "guess": pd.Series(guess, dtype=object)})
    stages = con.sql(f"SELECT DISTINCT life_stage AS raw FROM read_csv('{path}', all_varchar = true)").df()
    folded = stages["raw"].astype("string").str.strip().str.casefold().replace("", pd.NA)
    stages["stage"] = folded.replace(LIFE_STAGE_PLURALS).astype(object)
    return names, stages


#: DuckDB's working memory for the floor's statement: what does not fit spills to a folder
#: beside the output. DuckDB's default (80 % of RAM) exceeds the benchmark's 12 GB address
#: space cap, so at 1e7 catch rows the statement failed instead of spilling.
MEMORY_LIMIT = "3GB"


def trawl_floor(study_dir: Path, events: Path, records: Path, out_dir: Path, source_id: str = "bench_trawl",
                protocol: str = "keldmar_bottom_trawl", memory_limit: str = MEMORY_LIMIT) -> int:
    """Write the observation rows of a trawl ingest of the benchmark files to ``out_dir``; returns the rows."""
    from harmonize.study import load_study

    study = load_study(study_dir)
    con = duckdb.connect()
    spill = out_dir.parent / f"{out_dir.name}.spill"
    try:
        con.execute(f"SET memory_limit = '{memory_limit}'")
        con.execute(f"SET temp_directory = '{spill}'")
        hauls = _hauls(con, events, study)
        names, stages = _names(con, records, study)
        targets = study.targets[study.targets["protocol"] == protocol][["taxon", "first_year", "last_year"]].copy()
        targets["first_year"] = pd.to_numeric(targets["first_year"]).fillna(0).astype(np.int64)
        targets["last_year"] = pd.to_numeric(targets["last_year"]).fillna(9999).astype(np.int64)
        for name, frame in (("h", hauls), ("names", names), ("stages", stages), ("targets", targets)):
            con.register(name, frame)
        na = ", ".join(f"'{t}'" for t in NA_TOKENS)

        def bad(col: str) -> str:  # a cell that is neither empty, an NA token nor a number
            return f"({col} IS NOT NULL AND lower(trim({col})) NOT IN ({na}) AND TRY_CAST(trim({col}) AS DOUBLE) IS NULL)"

        out_dir.mkdir(parents=True, exist_ok=True)
        n = con.execute(f"""
        COPY (
        WITH c AS (
            SELECT row_number() OVER () AS row, haul_id, species, life_stage, catch_kg, catch_n
            FROM read_csv('{records}', all_varchar = true)),
        t AS (
            SELECT c.row, c.haul_id, n.taxon, n.guess, s.stage,
                   TRY_CAST(trim(c.catch_kg) AS DOUBLE) AS kg, TRY_CAST(trim(c.catch_n) AS DOUBLE) AS cnt,
                   n.taxon IS NOT NULL AND NOT {bad('c.catch_kg')} AND NOT {bad('c.catch_n')}
                   AND (TRY_CAST(trim(c.catch_kg) AS DOUBLE) IS NOT NULL OR TRY_CAST(trim(c.catch_n) AS DOUBLE) IS NOT NULL)
                   AS good,
                   c.haul_id IN (SELECT event_id FROM h) AS live
            FROM c LEFT JOIN names n ON c.species IS NOT DISTINCT FROM n.name
                   LEFT JOIN stages s ON c.life_stage IS NOT DISTINCT FROM s.raw),
        lost AS (SELECT DISTINCT haul_id, coalesce(taxon, guess) AS taxon FROM t WHERE live AND NOT good),
        agg AS (
            SELECT haul_id, taxon, stage, sum(kg) AS kg, sum(cnt) AS cnt, count(*) AS n, list_sort(list(row)) AS rows
            FROM t WHERE good AND live GROUP BY haul_id, taxon, stage),
        v AS (
            SELECT haul_id, taxon AS variable, 'taxon' AS variable_kind, stage AS life_stage, 'biomass' AS quantity,
                   kg AS value, 'kg' AS unit, false AS zero_filled,
                   CASE WHEN n > 1 THEN ['merged_rows'] ELSE [] END AS vflags, rows, n AS n_values, false AS no_effort
            FROM agg WHERE kg IS NOT NULL
            UNION ALL
            SELECT haul_id, taxon, 'taxon', stage, 'count', cnt, '1', false,
                   CASE WHEN n > 1 THEN ['merged_rows'] ELSE [] END, rows, n, false
            FROM agg WHERE cnt IS NOT NULL
            UNION ALL
            SELECT h.event_id, g.taxon, 'taxon', NULL, q.quantity, 0.0, q.unit, true, [], [], 0, false
            FROM h JOIN targets g ON h.season_year BETWEEN g.first_year AND g.last_year
                   CROSS JOIN (VALUES ('biomass', 'kg'), ('count', '1')) q(quantity, unit)
            WHERE NOT EXISTS (SELECT 1 FROM agg a WHERE a.haul_id = h.event_id AND a.taxon = g.taxon)
              AND NOT EXISTS (SELECT 1 FROM lost l WHERE l.haul_id = h.event_id AND l.taxon = g.taxon)
            UNION ALL
            SELECT event_id, 'sea_water_temperature_at_sea_floor', 'physical', NULL, 'measurement', temp, 'degC',
                   false, [], [], 1, true
            FROM h WHERE temp IS NOT NULL)
        SELECT substr(md5(concat_ws('|', '{source_id}', h.event_id, v.variable, coalesce(v.life_stage, ''),
                                    v.quantity)), 1, 24) AS record_id,
               h.event_id, h.event_start, h.event_end, h.year, h.season_year, h.season, h.depth_layer, h.lat, h.lon,
               h.cell_id, h.stratum, h.bottom AS depth_min_m, h.bottom AS depth_max_m, h.bottom AS bottom_depth_m,
               v.variable, v.variable_kind, v.life_stage, v.quantity, v.value, v.unit,
               CASE WHEN v.no_effort THEN NULL ELSE h.effort END AS effort,
               CASE WHEN NOT v.no_effort AND h.effort > 0 THEN v.value / h.effort END AS density,
               v.zero_filled, v.n_values,
               list_sort(list_distinct(list_concat(
                   CASE WHEN h.event_id IN (SELECT haul_id FROM lost) THEN ['catch_incomplete'] ELSE [] END,
                   v.vflags))) AS flags,
               h.source_row, v.rows AS source_record_rows,
               h.track_start_lat, h.track_start_lon, h.track_end_lat, h.track_end_lon
        FROM v JOIN h ON v.haul_id = h.event_id
        ) TO '{out_dir}' (FORMAT parquet, COMPRESSION zstd, PARTITION_BY (season_year), OVERWRITE_OR_IGNORE)
        """).fetchall()[0][0]
    finally:
        con.close()
        shutil.rmtree(spill, ignore_errors=True)
    return int(n)


#: Columns compared between the floor's rows and the store's (the floor's names).
COMPARED = ("event_id", "event_start", "year", "season_year", "season", "depth_layer", "lat", "lon", "cell_id",
            "stratum", "bottom_depth_m", "variable", "variable_kind", "life_stage", "quantity", "value", "unit",
            "effort", "density", "zero_filled", "n_values", "flags", "source_row", "source_record_rows",
            "track_start_lat", "track_start_lon", "track_end_lat", "track_end_lon")
_FLOATS = ("lat", "lon", "bottom_depth_m", "value", "effort", "density", "track_start_lat", "track_start_lon",
           "track_end_lat", "track_end_lon")


def check_trawl_floor(store_dir: Path, floor_dir: Path, rtol: float = 1e-9) -> dict[str, object]:
    """Rows of the floor and of the store's trawl rows, and the columns in which rows differ."""
    con = duckdb.connect()
    try:
        con.execute(f"SET file_search_path = '{store_dir}'")
        con.execute(f"ATTACH '{store_dir / 'harmonized.duckdb'}' AS s (READ_ONLY)")
        con.execute("CREATE TEMP VIEW hv AS SELECT *, CAST(timezone('UTC', event_start) AS TIMESTAMP) AS t0 "
                    "FROM s.observations WHERE source_kind = 'trawl'")
        con.execute(f"CREATE TEMP VIEW fv AS SELECT * FROM read_parquet('{floor_dir}/**/*.parquet', hive_partitioning = true)")
        n_h = con.execute("SELECT count(*) FROM hv").fetchall()[0][0]
        n_f = con.execute("SELECT count(*) FROM fv").fetchall()[0][0]
        unmatched = con.execute("SELECT count(*) FROM hv FULL JOIN fv USING (record_id) "
                                "WHERE hv.record_id IS NULL OR fv.record_id IS NULL").fetchall()[0][0]
        differing = {}
        for col in COMPARED:
            h = "h.t0" if col == "event_start" else f"h.{col}"
            if col in _FLOATS:
                cond = f"NOT ({h} IS NULL AND f.{col} IS NULL) AND NOT (abs({h} - f.{col}) <= {rtol} * abs(f.{col}))"
            else:
                cond = f"{h} IS DISTINCT FROM CAST(f.{col} AS {con.sql(f'SELECT {h} FROM hv h LIMIT 0').types[0]})"
            k = con.execute(f"SELECT count(*) FROM hv h JOIN fv f USING (record_id) WHERE {cond}").fetchall()[0][0]
            if k:
                differing[col] = int(k)
    finally:
        con.close()
    return {"harmonize_rows": int(n_h), "floor_rows": int(n_f), "rows_unmatched": int(unmatched),
            "columns_differing": differing}
