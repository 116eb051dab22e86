"""Demo fishing effort: position pings of invented vessels and a logbook of their hauls.

Every vessel name and id here is made up. Tracks are simulated: each vessel alternates
between steaming (about 10 knots) and fishing at its gear's towing speed, so the speed
window of the adapter has something to find. The generator is vectorised so that the
benchmark can draw tens of millions of pings with it.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from harmonize.demo.sea import DemoInput

KIND = "effort"
KM_PER_NMI = 1.852  # exact (BIPM SI Brochure 2019, Table 8)
#: Inner box of the Keldmar Sea where simulated tracks stay (lon, lat limits).
TRACK_BOX = (-155.5, -148.5, 41.5, 44.3)
#: Gear codes of the FAO International Standard Statistical Classification of Fishing Gear
#: (ISSCFG): OTB bottom otter trawl, TBB beam trawl, OTM midwater otter trawl, DRB dredge.
GEAR_SPEED_KN = {"OTB": (3.3, 0.4), "TBB": (5.0, 0.6), "OTM": (3.8, 0.4), "DRB": (2.5, 0.3)}

# Invented fleet: name, gear. The names are never stored: the adapter hashes them.
FLEET = [
    ("Skerra Dawn", "OTB"), ("Hollin Grey", "OTB"), ("Marrow Bight", "OTB"), ("Tessaly", "OTB"),
    ("Orrin Vale", "OTB"), ("Keld Runner", "TBB"), ("Fennick", "TBB"), ("Iversand", "OTM"),
    ("Brannow Star", "OTM"), ("Lutra May", "DRB"),
]

PING_PROFILE = """\
[source]
id = "keldmar_fleet_pings"
kind = "effort"
provider_type = "industry"
timezone = "UTC"
description = "Position pings of the invented Keldmar fleet (one file per year)."

[columns]
vessel_id = "vessel_name"
time = "utc_time"
lat = "latitude"
lon = "longitude"
speed_kn = "sog_kn"
gear = "gear_code"

[fishing]
form = "pings"
speed_min_kn = 2.0            # bottom otter trawl window (common practice; Skaar et al. 2011)
speed_max_kn = 5.0
max_gap_h = 2.0
pelagic_layer = "epipelagic"

[fishing.gears.TBB]           # beam trawlers tow faster (Mills et al. 2007: 2-8 knots)
speed_min_kn = 2.0
speed_max_kn = 8.0
"""

LOGBOOK_PROFILE = """\
[source]
id = "keldmar_fleet_logbook"
kind = "effort"
provider_type = "industry"
timezone = "UTC"

[columns]
event_id = "haul_ref"
vessel_id = "vessel"
start_time = "shot_time"
end_time = "haul_time"
start_lat = "shot_lat"
start_lon = "shot_lon"
end_lat = "haul_lat"
end_lon = "haul_lon"
gear = "gear"

[fishing]
form = "logbook"
"""


def simulate_pings(
    rng: np.random.Generator,
    n_vessels: int,
    pings_per_vessel: int,
    start: str = "2021-01-01",
    interval_min: float = 10.0,
    gears: tuple[str, ...] | None = None,
    names: list[str] | None = None,
) -> pd.DataFrame:
    """Simulated pings of ``n_vessels`` vessels, vessel-major and in time order.

    Returns columns vessel_name, utc_time (datetime64, UTC), latitude, longitude,
    sog_kn, gear_code, and the simulated truth ``fishing`` (bool).
    """
    v, k = n_vessels, pings_per_vessel
    n = v * k
    gear_of = np.asarray(gears) if gears is not None else rng.choice(list(GEAR_SPEED_KN), v)
    vessel = np.repeat(np.arange(v), k)
    # alternate steaming and fishing spells of 6-30 pings
    spell = rng.integers(6, 30, size=n)
    phase = (np.cumsum(np.where(rng.random(n) < 1.0 / spell, 1, 0)) + vessel) % 2
    fishing = phase == 1
    mean = np.array([GEAR_SPEED_KN[g][0] for g in gear_of])[vessel]
    sd = np.array([GEAR_SPEED_KN[g][1] for g in gear_of])[vessel]
    speed = np.where(fishing, rng.normal(mean, sd), rng.normal(10.0, 1.0, n)).clip(0.2, 14.0)
    dt_min = interval_min * rng.uniform(0.8, 1.2, n)
    turn = rng.normal(0.0, np.where(fishing, 0.35, 0.05))
    heading = np.cumsum(turn) + np.repeat(rng.uniform(0, 2 * np.pi, v), k)
    step_km = speed * KM_PER_NMI * dt_min / 60.0
    dx = step_km * np.sin(heading)
    dy = step_km * np.cos(heading)
    x = _cumsum_by_vessel(dx, k)
    y = _cumsum_by_vessel(dy, k)
    lon0 = np.repeat(rng.uniform(TRACK_BOX[0], TRACK_BOX[1], v), k)
    lat0 = np.repeat(rng.uniform(TRACK_BOX[2], TRACK_BOX[3], v), k)
    lat = _fold(lat0 + y / 111.2, TRACK_BOX[2], TRACK_BOX[3])
    lon = _fold(lon0 + x / (111.2 * np.cos(np.radians(lat))), TRACK_BOX[0], TRACK_BOX[1])
    t0 = pd.Timestamp(start).value // 1000 + np.repeat(rng.integers(0, 86_400 * 20, v), k) * 1_000_000
    t_us = t0 + (_cumsum_by_vessel(dt_min, k) * 60e6).astype(np.int64)
    labels = np.asarray(names) if names is not None else np.array([f"KV-{i + 1:05d}" for i in range(v)])
    return pd.DataFrame({
        "vessel_name": labels[vessel], "utc_time": pd.to_datetime(t_us, unit="us").floor("s"), "latitude": lat.round(5),
        "longitude": lon.round(5), "sog_kn": speed.round(1), "gear_code": gear_of[vessel],
        "fishing": fishing,
    })


def _cumsum_by_vessel(values: np.ndarray, k: int) -> np.ndarray:
    """Cumulative sums restarting every ``k`` values (one run per vessel), starting at 0."""
    per = np.asarray(values, float).reshape(-1, k)
    out = np.cumsum(per, axis=1) - per[:, :1]
    return out.ravel()


def _fold(x: np.ndarray, lo: float, hi: float) -> np.ndarray:
    """Reflect values into [lo, hi] (a track bounces off the box edges)."""
    span = hi - lo
    m = np.mod(x - lo, 2 * span)
    return lo + np.where(m > span, 2 * span - m, m)


def generate(folder: Path, rng: np.random.Generator) -> list[DemoInput]:
    """Ping files for 2021 and 2022 with the mess real files have, and a small logbook."""
    out = folder / "data" / KIND
    out.mkdir(parents=True, exist_ok=True)
    (folder / "profiles" / "effort_pings.toml").write_text(PING_PROFILE, encoding="utf-8")
    (folder / "profiles" / "effort_logbook.toml").write_text(LOGBOOK_PROFILE, encoding="utf-8")
    names = [n for n, _ in FLEET]
    gears = tuple(g for _, g in FLEET)
    inputs: list[DemoInput] = []
    for year in (2021, 2022):
        pings = simulate_pings(rng, len(FLEET), 4000, start=f"{year}-05-01", interval_min=15.0,
                               gears=gears, names=names).drop(columns="fishing")
        pings = _mess(pings, rng)
        path = out / f"pings_{year}.csv"
        pings.to_csv(path, index=False)
        inputs.append(DemoInput("profiles/effort_pings.toml", {"rows": str(path.relative_to(folder))},
                                f"fleet position pings {year}"))
    log = _logbook(rng, 2022)
    path = out / "logbook_2022.csv"
    log.to_csv(path, index=False)
    inputs.append(DemoInput("profiles/effort_logbook.toml", {"rows": str(path.relative_to(folder))},
                            "fleet logbook 2022"))
    return inputs


def _mess(pings: pd.DataFrame, rng: np.random.Generator) -> pd.DataFrame:
    """Duplicated pings, a position outside the sea, a clock glitch, a garbled speed."""
    pings = pings.assign(utc_time=pings["utc_time"].dt.strftime("%Y-%m-%dT%H:%M:%SZ"),
                         sog_kn=pings["sog_kn"].astype(object))
    n = len(pings)
    dups = pings.iloc[rng.choice(n, 25, replace=False)]
    out = pd.concat([pings, dups], ignore_index=True)
    i = int(rng.integers(100, n - 100))
    out.loc[i, ["latitude", "longitude"]] = [38.2, -160.4]
    j = int(rng.integers(100, n - 100))
    out.loc[j, "utc_time"] = "2019-01-01T00:00:00Z"
    out.loc[j + 7, "sog_kn"] = "n/a?"
    return out


def _logbook(rng: np.random.Generator, year: int) -> pd.DataFrame:
    """Hauls of the trawlers: 2-4 h tows at about 3.3 knots."""
    n = 150
    vessel = rng.choice([n for n, g in FLEET if g == "OTB"], n)
    start = pd.Timestamp(f"{year}-06-01") + pd.to_timedelta(rng.uniform(0, 120, n), unit="D")
    hours = rng.uniform(2.0, 4.0, n)
    dist_km = 3.3 * KM_PER_NMI * hours
    heading = rng.uniform(0, 2 * np.pi, n)
    lat = rng.uniform(TRACK_BOX[2] + 0.3, TRACK_BOX[3] - 0.3, n)
    lon = rng.uniform(TRACK_BOX[0] + 0.3, TRACK_BOX[1] - 0.3, n)
    lat_e = lat + dist_km * np.cos(heading) / 111.2
    lon_e = lon + dist_km * np.sin(heading) / (111.2 * np.cos(np.radians(lat)))
    end = start + pd.to_timedelta(hours, unit="h")
    log = pd.DataFrame({
        "haul_ref": [f"L{year}-{i + 1:04d}" for i in range(n)], "vessel": vessel,
        "shot_time": start.strftime("%Y-%m-%d %H:%M"), "haul_time": end.strftime("%Y-%m-%d %H:%M"),
        "shot_lat": lat.round(4), "shot_lon": lon.round(4), "haul_lat": lat_e.round(4),
        "haul_lon": lon_e.round(4), "gear": "OTB",
    })
    log.loc[5, "haul_time"] = log.loc[5, "shot_time"]          # zero-length haul
    log = pd.concat([log, log.iloc[[9]]], ignore_index=True)   # a haul entered twice
    return log
