"""Demo bottom-trawl surveys: summer hauls 2018-2023, with the mess real files have.

Planted identification change: the genus Vossaria is recorded as one taxon until
``SPLIT_YEAR - 1`` and as two species from ``SPLIT_YEAR`` on (see harmonize/demo/sea.py).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from harmonize.demo.sea import (
    SPLIT_YEAR,
    YEARS,
    DemoInput,
    bottom_depth_m,
    bottom_temperature_c,
    random_points_in_domain,
)

STATIONS = 60
KIND = "trawl"

PROFILE = """\
[source]
id = "keldmar_trawl"
kind = "trawl"
provider_type = "agency"
protocol = "keldmar_bottom_trawl"
timezone = "UTC"

[columns.events]
event_id = "haul_id"
start_time = "start_time_utc"
end_time = "end_time_utc"
start_lat = "lat_start"
start_lon = "lon_start"
end_lat = "lat_end"
end_lon = "lon_end"
net_width_m = "wing_spread_m"
bottom_depth_m = "depth_m"
bottom_temperature = "bottom_temp_c"

[columns.records]
event_id = "haul_id"
taxon = "species"
weight = "catch_kg"
count = "catch_n"
"""

# A chartered vessel's files in its own units: fathoms, grams, local time.
CHARTER_PROFILE = """\
[source]
id = "keldmar_trawl_charter"
kind = "trawl"
provider_type = "agency"
protocol = "keldmar_bottom_trawl"
timezone = "Pacific/Honolulu"
dayfirst = true

[columns.events]
event_id = "STN"
start_time = "TIME_START"
end_time = "TIME_END"
start_lat = "LATSTART"
start_lon = "LONSTART"
end_lat = "LATEND"
end_lon = "LONEND"
bottom_depth_m = "DEPTH_FATHOMS"

[columns.records]
event_id = "STN"
taxon = "TAXON_NAME"
weight = "WEIGHT_G"
count = "NUMBER"

[units]
bottom_depth_m = "fathom"
weight = "g"

[constants]
net_width_m = 16.5
"""

# (taxon name as written, true taxon, mean kg per km2 at its best depth, best depth m)
_SPECIES = [
    ("Ostravix keldensis", 900.0, 120.0),
    ("Lumbrena pallida", 400.0, 60.0),
    ("Syrranthus minor", 150.0, 300.0),
    ("Pelagon argentea", 250.0, 90.0),
    ("Calverion rubrum", 60.0, 500.0),
]
_VARIANTS = {
    "Ostravix keldensis": ["Ostravix keldensis", "keld cod", "OSTRA KEL", "ostravix  keldensis"],
    "Lumbrena pallida": ["Lumbrena pallida", "pale lumb", "LUMB PAL"],
    "Syrranthus minor": ["Syrranthus minor", "lesser syrranth"],
    "Pelagon argentea": ["Pelagon argentea", "silver pelagon"],
    "Calverion rubrum": ["Calverion rubrum", "red calverion"],
}


def generate(folder: Path, rng: np.random.Generator) -> list[DemoInput]:
    out = folder / "data" / KIND
    out.mkdir(parents=True, exist_ok=True)
    (folder / "profiles" / "trawl_keldmar.toml").write_text(PROFILE, encoding="utf-8")
    (folder / "profiles" / "trawl_keldmar_charter.toml").write_text(CHARTER_PROFILE, encoding="utf-8")
    swapped = (folder / "profiles" / "trawl_keldmar_2020.toml")
    swapped.write_text(
        "# In 2020 the provider wrote longitudes in the latitude columns and the other way round:\n"
        "# this profile maps them crosswise. 'harmonize check trawl_keldmar' on the 2020 files\n"
        "# shows what happens without it.\n"
        + PROFILE.replace('id = "keldmar_trawl"', 'id = "keldmar_trawl_2020"')
        .replace('start_lat = "lat_start"', 'start_lat = "lon_start"')
        .replace('start_lon = "lon_start"', 'start_lon = "lat_start"')
        .replace('end_lat = "lat_end"', 'end_lat = "lon_end"')
        .replace('end_lon = "lon_end"', 'end_lon = "lat_end"'),
        encoding="utf-8",
    )
    base_lon, base_lat = random_points_in_domain(rng, STATIONS)
    inputs: list[DemoInput] = []
    for year in YEARS:
        # 2022: the vessel broke down and only the northern third of the stations was fished
        keep = base_lat > 44.2 if year == 2022 else np.ones(STATIONS, bool)
        hauls, catch = _survey(rng, year, base_lon[keep], base_lat[keep])
        if year == 2021:  # the charter vessel year: other column names and units
            hauls, catch = _charter(hauls, catch)
            profile = "trawl_keldmar_charter"
        elif year == 2020:
            hauls = hauls.rename(columns={"lat_start": "lon_start", "lon_start": "lat_start",
                                          "lat_end": "lon_end", "lon_end": "lat_end"})
            profile = "trawl_keldmar_2020"
        else:
            profile = "trawl_keldmar"
        ev = out / f"hauls_{year}.csv"
        rc = out / f"catch_{year}.csv"
        hauls.to_csv(ev, index=False)
        catch.to_csv(rc, index=False)
        inputs.append(DemoInput(f"profiles/{profile}.toml",
                                {"events": str(ev.relative_to(folder)), "records": str(rc.relative_to(folder))},
                                f"bottom-trawl survey {year}"))
    return inputs


def _survey(rng: np.random.Generator, year: int, lon0: np.ndarray, lat0: np.ndarray) -> tuple[pd.DataFrame, pd.DataFrame]:
    n = len(lon0)
    lon = lon0 + rng.normal(0, 0.03, n)
    lat = lat0 + rng.normal(0, 0.02, n)
    start = pd.Timestamp(f"{year}-06-05") + pd.to_timedelta(rng.uniform(0, 70, n), unit="D")
    start = start.round("min")
    minutes = rng.choice([30, 30, 30, 20, 45], n)
    knots = rng.normal(3.5, 0.3, n)
    dist_deg = knots * 1.852 * minutes / 60 / 111.0
    heading = rng.uniform(0, 2 * np.pi, n)
    lat_end = lat + dist_deg * np.cos(heading)
    lon_end = lon + dist_deg * np.sin(heading) / np.cos(np.radians(lat))
    depth = bottom_depth_m(lon, lat)
    temp = bottom_temperature_c(lon, lat, start.day_of_year.to_numpy(), np.full(n, year)) + rng.normal(0, 0.15, n)
    ids = [f"{year}-{i + 1:03d}" for i in range(n)]
    hauls = pd.DataFrame({
        "haul_id": ids, "start_time_utc": start.strftime("%Y-%m-%dT%H:%M"),
        "end_time_utc": (start + pd.to_timedelta(minutes, unit="min")).strftime("%Y-%m-%dT%H:%M"),
        "lat_start": lat.round(4), "lon_start": lon.round(4), "lat_end": lat_end.round(4),
        "lon_end": lon_end.round(4), "wing_spread_m": rng.normal(17.0, 0.8, n).round(1),
        "depth_m": depth.round(0), "bottom_temp_c": temp.round(2),
    })
    area = knots * 1.852 * minutes / 60 * hauls["wing_spread_m"].to_numpy() / 1000
    rows = []
    for taxon, mean_density, best_depth in _SPECIES:
        suit = np.exp(-0.5 * (np.log(depth / best_depth) / 0.6) ** 2)
        present = rng.random(n) < 0.85 * suit + 0.02
        kg = rng.gamma(1.2, mean_density * suit / 1.2) * area
        for i in np.flatnonzero(present & (kg > 0.01)):
            name = rng.choice(_VARIANTS[taxon])
            count = max(1, int(kg[i] / rng.uniform(0.2, 1.5)))
            rows.append((ids[i], name, round(float(kg[i]), 3), count))
    rows += _vossaria(year, ids, depth, area) + _bathyra(year, ids, depth, area)
    catch = pd.DataFrame(rows, columns=["haul_id", "species", "catch_kg", "catch_n"])
    # Mess: a misspelt name, a duplicated haul line, a catch row for a haul that is not in the file
    if len(catch) > 5:
        catch.loc[catch.index[3], "species"] = "Ostravix keldensiss"
    hauls = pd.concat([hauls, hauls.iloc[[min(4, n - 1)]]], ignore_index=True)
    catch = pd.concat([catch, pd.DataFrame([(f"{year}-999", "keld cod", 2.5, 3)], columns=catch.columns)], ignore_index=True)
    if year == 2019:  # a haul whose end time was typed before its start
        hauls.loc[7, "end_time_utc"] = (pd.Timestamp(hauls.loc[7, "start_time_utc"]) - pd.Timedelta(minutes=30)).strftime("%Y-%m-%dT%H:%M")
    return hauls, catch


def _vossaria(year: int, ids: list[str], depth: np.ndarray, area: np.ndarray) -> list[tuple]:
    """Catch rows of the genus Vossaria: one taxon before SPLIT_YEAR, its two species from then on.

    Drawn from a generator of its own (seeded by the year), so that the rest of the survey
    is the same as without this planted identification change.
    """
    rng = np.random.default_rng([year, 61])
    suit = np.exp(-0.5 * (np.log(depth / 150.0) / 0.7) ** 2)
    present = rng.random(len(ids)) < 0.7 * suit + 0.03
    kg = rng.gamma(1.5, 180.0 * suit / 1.5) * area
    # the northern species prefers shallow water, the southern one deep water
    north = np.clip(1.2 - depth / 250.0, 0.1, 0.9)
    rows: list[tuple] = []
    for i in np.flatnonzero(present & (kg > 0.01)):
        count = max(1, int(kg[i] / rng.uniform(0.1, 0.6)))
        if year < SPLIT_YEAR:
            rows.append((ids[i], rng.choice(["Vossaria", "vossaria spp"]), round(float(kg[i]), 3), count))
            continue
        n_north = int(rng.binomial(count, north[i]))
        for name, n in (("Vossaria borealis", n_north), ("Vossaria australis", count - n_north)):
            if n > 0:
                rows.append((ids[i], name, round(float(kg[i]) * n / count, 3), n))
    return rows


def _bathyra(year: int, ids: list[str], depth: np.ndarray, area: np.ndarray) -> list[tuple]:
    """The rare Bathyra thornensis: one or two of the deepest hauls a year catch a few (own generator)."""
    rng = np.random.default_rng([year, 67])
    deep = np.argsort(depth)[::-1][:5]
    hits = rng.choice(deep, size=1 + int(rng.random() < 0.3), replace=False)
    return [(ids[i], "thorne bathyra" if rng.random() < 0.5 else "Bathyra thornensis",
             round(float(rng.uniform(0.4, 2.0) * area[i] * 10), 3), int(rng.integers(1, 4))) for i in hits]


def _charter(hauls: pd.DataFrame, catch: pd.DataFrame) -> tuple[pd.DataFrame, pd.DataFrame]:
    local = (pd.to_datetime(hauls["start_time_utc"]).dt.tz_localize("UTC").dt.tz_convert("Pacific/Honolulu"))
    local_end = (pd.to_datetime(hauls["end_time_utc"]).dt.tz_localize("UTC").dt.tz_convert("Pacific/Honolulu"))
    ev = pd.DataFrame({
        "STN": hauls["haul_id"], "TIME_START": local.dt.strftime("%d/%m/%Y %H:%M"),
        "TIME_END": local_end.dt.strftime("%d/%m/%Y %H:%M"),
        "LATSTART": hauls["lat_start"], "LONSTART": hauls["lon_start"], "LATEND": hauls["lat_end"],
        "LONEND": hauls["lon_end"], "DEPTH_FATHOMS": (hauls["depth_m"] / 1.8288).round(1),
    })
    rc = pd.DataFrame({"STN": catch["haul_id"], "TAXON_NAME": catch["species"],
                       "WEIGHT_G": (catch["catch_kg"] * 1000).round(0), "NUMBER": catch["catch_n"]})
    return ev, rc
