"""The work each benchmark compares harmonize with: a raw DuckDB floor and a plain pandas script.

- The *floor* (:mod:`benchmarks.floor`) is the least any tool must do: DuckDB reads the CSV
  file(s) and writes zstd parquet, with no checks, no tagging and no aggregation.
- The *pandas script* is what a careful user would otherwise write in an afternoon:
  ``read_csv``, parse times, drop rows with missing or out-of-range values, compute the
  effort, group and sum, ``to_parquet``. It keeps no row accounting, quarantine, record ids
  or provenance, so it does less than harmonize; it is the everyday alternative, not a twin.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pyproj
import shapely

from harmonize.demo.sea import DOMAIN_RING, TAXA


def _season(month: pd.Series, year: pd.Series) -> tuple[pd.Series, pd.Series]:
    season = month.map({12: "winter", 1: "winter", 2: "winter", 3: "spring", 4: "spring", 5: "spring",
                        6: "summer", 7: "summer", 8: "summer", 9: "autumn", 10: "autumn", 11: "autumn"})
    return season, year + (month == 12).astype(int)


def pandas_pings(path: Path, out: Path) -> int:
    """Fishing hours per 25 km cell x season x gear from a ping CSV, the pandas way."""
    df = pd.read_csv(path)
    df["utc_time"] = pd.to_datetime(df["utc_time"], errors="coerce", utc=True)
    for col in ("latitude", "longitude", "sog_kn"):
        df[col] = pd.to_numeric(df[col], errors="coerce")
    df = df.dropna(subset=["vessel_name", "utc_time", "latitude", "longitude", "gear_code"])
    df = df[df["latitude"].between(-90, 90) & df["longitude"].between(-180, 360) & (df["sog_kn"].fillna(0) < 30)]
    inside = shapely.contains_xy(shapely.Polygon(DOMAIN_RING), df["longitude"].to_numpy(), df["latitude"].to_numpy())
    df = df[inside].drop_duplicates(["vessel_name", "utc_time"])
    df = df.sort_values(["vessel_name", "utc_time"])
    by = df.groupby("vessel_name")["utc_time"]
    prev_h = by.diff().dt.total_seconds() / 3600
    next_h = -by.diff(-1).dt.total_seconds() / 3600
    df["hours"] = prev_h.clip(upper=2.0).fillna(0) / 2 + next_h.clip(upper=2.0).fillna(0) / 2
    df = df[df["sog_kn"].between(2.0, 5.0)]
    x, y = pyproj.Transformer.from_crs(4326, 6933, always_xy=True).transform(
        df["longitude"].to_numpy(), df["latitude"].to_numpy())
    df["ix"] = np.floor(x / 25_000).astype(np.int64)
    df["iy"] = np.floor(y / 25_000).astype(np.int64)
    df["season"], df["season_year"] = _season(df["utc_time"].dt.month, df["utc_time"].dt.year)
    cells = df.groupby(["ix", "iy", "season_year", "season", "gear_code"], as_index=False).agg(
        hours=("hours", "sum"), n_vessels=("vessel_name", "nunique"), n_pings=("hours", "size"))
    cells.to_parquet(out, compression="zstd")
    return len(cells)


def pandas_trawl(events: Path, records: Path, out: Path) -> int:
    """Catch per haul x taxon x stage with area swept and density, the pandas way."""
    ev = pd.read_csv(events)
    for col in ("start_time_utc", "end_time_utc"):
        ev[col] = pd.to_datetime(ev[col], errors="coerce")
    num = ["lat_start", "lon_start", "lat_end", "lon_end", "wing_spread_m", "depth_m", "bottom_temp_c"]
    ev[num] = ev[num].apply(pd.to_numeric, errors="coerce")
    ev = ev.dropna(subset=["haul_id", "start_time_utc", "end_time_utc", "lat_start", "lon_start", "wing_spread_m"])
    ev = ev[ev["lat_start"].between(-90, 90) & ev["lon_start"].between(-180, 180) & (ev["wing_spread_m"] > 0)]
    ev = ev[ev["end_time_utc"] > ev["start_time_utc"]].drop_duplicates("haul_id")
    _, _, dist_m = pyproj.Geod(ellps="WGS84").inv(ev["lon_start"].to_numpy(), ev["lat_start"].to_numpy(),
                                                  ev["lon_end"].to_numpy(), ev["lat_end"].to_numpy())
    ev["area_km2"] = dist_m / 1000 * ev["wing_spread_m"] / 1000
    ev["season"], ev["season_year"] = _season(ev["start_time_utc"].dt.month, ev["start_time_utc"].dt.year)

    rc = pd.read_csv(records, keep_default_na=False, na_values=[""])
    rc["catch_kg"] = pd.to_numeric(rc["catch_kg"], errors="coerce")
    rc["catch_n"] = pd.to_numeric(rc["catch_n"], errors="coerce")
    names = {}
    for taxon, _group, aliases, _sensitive, *_ in TAXA:
        for name in [taxon, *filter(None, aliases.split("|"))]:
            names[name.casefold()] = taxon
    rc["taxon"] = rc["species"].str.strip().str.casefold().map(names)
    rc = rc.dropna(subset=["taxon"])
    rc = rc[rc["catch_kg"].notna() | rc["catch_n"].notna()]
    rc = rc.merge(ev[["haul_id", "area_km2", "season", "season_year", "lat_start", "lon_start"]], on="haul_id")
    catch = rc.groupby(["haul_id", "taxon", "life_stage"], as_index=False, dropna=False).agg(
        kg=("catch_kg", "sum"), n=("catch_n", "sum"), area_km2=("area_km2", "first"),
        season=("season", "first"), season_year=("season_year", "first"))
    catch["kg_per_km2"] = catch["kg"] / catch["area_km2"]
    catch["n_per_km2"] = catch["n"] / catch["area_km2"]
    catch.to_parquet(out, compression="zstd")
    return len(catch)
