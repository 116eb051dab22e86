"""Synthetic inputs of a given size for the benchmarks: ping files, trawl files, whole stores.

Everything is invented (the Keldmar Sea of :mod:`harmonize.demo.sea`) and generated with
numpy and DuckDB in bounded memory, so that 1e7-row files and 1e8-row stores can be made on
a laptop. A small share of rows is deliberately bad (unparseable numbers, unknown taxa) so
that the quarantine path is part of what is measured.
"""

from __future__ import annotations

from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pyarrow as pa

from harmonize.demo.sea import write_study
from harmonize.demo.sources import trawl as demo_trawl

PING_PROFILE = """\
[source]
id = "bench_pings"
kind = "effort"
provider_type = "industry"

[columns]
vessel_id = "vessel_name"
time = "utc_time"
lat = "latitude"
lon = "longitude"
speed_kn = "sog_kn"
gear = "gear_code"

[fishing]
form = "pings"
pelagic_layer = "epipelagic"
"""

#: The demo's trawl profile under the benchmark's source id (the same columns and units).
TRAWL_PROFILE = demo_trawl.PROFILE.replace('id = "keldmar_trawl"', 'id = "bench_trawl"', 1)

#: Names in catch files: canonical names, aliases and case variants of the demo taxa.
CATCH_NAMES = (
    "Ostravix keldensis", "keld cod", "Lumbrena pallida", "LUMB PAL", "Syrranthus minor",
    "Pelagon argentea", "silver pelagon", "Calverion rubrum", "red calverion", "ostravix keldensis",
)
STAGES = ("adult", "juvenile", "")
#: Share of catch rows with a deliberate problem (half unparseable weights, half unknown taxa).
BAD_SHARE = 0.001
#: Catch rows per haul, on average (a survey haul lists a few to a few dozen taxon x stage rows).
ROWS_PER_HAUL = 8
_BLOCK = 2_000_000


def ping_study(folder: Path, n: int, seed: int = 7) -> Path:
    """A Keldmar Sea study with one CSV of ``n`` pings (profile ``bench_pings``); returns the file.

    Vessels report every ~10 minutes, alternating steaming and fishing spells; about one
    vessel per 20,000 pings. The file is written vessel block by vessel block.
    """
    from harmonize.demo.sources.effort import simulate_pings

    write_study(folder)
    (folder / "profiles" / "bench_pings.toml").write_text(PING_PROFILE, encoding="utf-8")
    rng = np.random.default_rng(seed)
    vessels = max(10, n // 20_000)
    per_vessel = n // vessels
    path = folder / "data" / f"pings_{n}.csv"
    con = duckdb.connect()
    try:
        with open(path, "w", encoding="utf-8") as out:
            out.write("vessel_name,utc_time,latitude,longitude,sog_kn,gear_code\n")
        step = max(1, _BLOCK // per_vessel)
        for v0 in range(0, vessels, step):
            nv = min(step, vessels - v0)
            block = simulate_pings(rng, nv, per_vessel, names=[f"KV-{i + 1:05d}" for i in range(v0, v0 + nv)])
            con.register("pings", pa.Table.from_pandas(block.drop(columns="fishing"), preserve_index=False))
            part = path.with_suffix(f".{v0}.csv")
            con.execute(f"""COPY (SELECT vessel_name, strftime(utc_time, '%Y-%m-%dT%H:%M:%SZ') AS utc_time,
                                 latitude, longitude, sog_kn, gear_code FROM pings)
                            TO '{part}' (HEADER false)""")
            con.unregister("pings")
            _append(path, part)
    finally:
        con.close()
    return path


def trawl_study(folder: Path, n: int, seed: int = 11) -> tuple[Path, Path]:
    """A Keldmar Sea study with a haul file and a catch file of ``n`` rows (profile ``bench_trawl``).

    Returns (events file, records file). Hauls are 30-minute tows at ~3.5 knots in summer
    2018-2023 (standard survey tow speeds of 3-4 knots: common practice).
    """
    from harmonize.demo.sea import bottom_depth_m, bottom_temperature_c, random_points_in_domain

    write_study(folder)
    (folder / "profiles" / "bench_trawl.toml").write_text(TRAWL_PROFILE, encoding="utf-8")
    rng = np.random.default_rng(seed)
    hauls = max(10, n // ROWS_PER_HAUL)
    lon, lat = random_points_in_domain(rng, hauls)
    year = rng.integers(2018, 2024, hauls)
    day = rng.integers(152, 244, hauls)  # June-August
    start = (pd.to_datetime(year.astype(str), format="%Y") + pd.to_timedelta(day - 1, unit="D")
             + pd.to_timedelta(rng.integers(6 * 60, 18 * 60, hauls), unit="min"))
    minutes = rng.normal(30, 3, hauls).round()
    km = 3.5 * 1.852 * minutes / 60
    heading = rng.uniform(0, 2 * np.pi, hauls)
    end_lat = lat + km * np.cos(heading) / 111.2
    end_lon = lon + km * np.sin(heading) / (111.2 * np.cos(np.radians(lat)))
    events = pd.DataFrame({
        "haul_id": [f"H{i:08d}" for i in range(hauls)],
        "start_time_utc": start.strftime("%Y-%m-%dT%H:%M:%S"),
        "end_time_utc": (start + pd.to_timedelta(minutes, unit="min")).strftime("%Y-%m-%dT%H:%M:%S"),
        "lat_start": lat.round(5), "lon_start": lon.round(5),
        "lat_end": end_lat.round(5), "lon_end": end_lon.round(5),
        "wing_spread_m": rng.normal(17, 1, hauls).round(1),
        "depth_m": bottom_depth_m(lon, lat).round(1),
        "bottom_temp_c": bottom_temperature_c(lon, lat, day, year).round(2),
    })
    ev_path = folder / "data" / f"hauls_{n}.csv"
    events.to_csv(ev_path, index=False)
    del events

    rc_path = folder / "data" / f"catch_{n}.csv"
    with open(rc_path, "w", encoding="utf-8") as out:
        out.write("haul_id,species,life_stage,catch_kg,catch_n\n")
    con = duckdb.connect()
    try:
        names = np.asarray(CATCH_NAMES)
        for r0 in range(0, n, _BLOCK):
            m = min(_BLOCK, n - r0)
            # rows of one haul are adjacent, as in real catch files
            haul = np.minimum((np.arange(r0, r0 + m) * hauls) // n, hauls - 1)
            taxon = names[rng.integers(0, names.size, m)].astype(object)
            weight = rng.lognormal(0, 1.5, m).round(3).astype(str).astype(object)
            bad = rng.random(m) < BAD_SHARE
            weight[bad & (rng.random(m) < 0.5)] = "n.d."
            taxon[bad & ~(weight == "n.d.")] = "Gadoides ignotus"
            block = pa.table({
                "haul_id": pa.array(np.char.add("H", np.char.zfill(haul.astype(str), 8))),
                "species": pa.array(taxon.astype(str)),
                "life_stage": pa.array(np.asarray(STAGES)[rng.integers(0, len(STAGES), m)]),
                "catch_kg": pa.array(weight.astype(str)),
                "catch_n": pa.array(rng.poisson(20, m)),
            })
            con.register("block", block)
            part = rc_path.with_suffix(f".{r0}.csv")
            con.execute(f"COPY block TO '{part}' (HEADER false)")
            con.unregister("block")
            _append(rc_path, part)
    finally:
        con.close()
    return ev_path, rc_path


def _append(target: Path, part: Path) -> None:
    with open(target, "ab") as out, open(part, "rb") as src:
        while chunk := src.read(1 << 24):
            out.write(chunk)
    part.unlink()
