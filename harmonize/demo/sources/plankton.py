"""Demo plankton net tows: spring and autumn 2018-2023 at several depth ranges, with real-file mess."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from harmonize.demo.sea import YEARS, DemoInput, bottom_depth_m, random_points_in_domain

KIND = "plankton"
STATIONS = 14
ROTOR_M_PER_REV = 0.26873  # the demo flowmeter's calibrated rotor constant
SEASONS = {"spring": ("04-08", 40), "autumn": ("09-20", 40)}  # first day, length of the cruise (days)

PROFILE = """\
# Keldmar plankton monitoring (invented): ring-net tows over fixed depth ranges.
[source]
id = "keldmar_plankton"
kind = "plankton"
provider_type = "agency"
protocol = "keldmar_plankton_net"
timezone = "UTC"

[columns.events]
event_id = "tow_id"
time = "start_utc"
end_time = "end_utc"
lat = "lat"
lon = "lon"
depth_min_m = "depth_top_m"
depth_max_m = "depth_bottom_m"
bottom_depth_m = "water_depth_m"
mouth_diameter_m = "ring_cm"
flowmeter_revs = "flowmeter_revs"
net_status = "remarks"

[columns.records]
event_id = "tow_id"
taxon = "taxon"
life_stage = "stage"
count = "n_counted"
split_fraction = "split"

[units]
mouth_diameter_m = "cm"

[constants]
m_per_rev = 0.26873        # flowmeter rotor constant from its calibration

[clogging]
status_values = ["clogged", "net clogged"]
"""

# A second provider, a university larval survey on Vossa Bank in summer 2021-2023, sends its
# files as they come off the ship: positions in degrees and decimal minutes with hemisphere
# letters, date and time in two columns, split fractions written 1/4. The profile reads them
# as they are ([formats] and a two-column time).
BANK_PROFILE = """\
#:schema ../schemas/profile-plankton.schema.json
# Vossa Bank larval survey (invented university cruise): the files as the ship writes them.
[source]
id = "vossa_larvae"
kind = "plankton"
provider_type = "agency"
protocol = "keldmar_plankton_net"
timezone = "UTC"

[columns.events]
event_id = "Station"
time = ["Date", "Time (UTC)"]   # date and time in two columns
lat = "Latitude"
lon = "Longitude"
depth_min_m = "Top (m)"
depth_max_m = "Bottom (m)"
bottom_depth_m = "Sounding (m)"
mouth_diameter_m = "Ring (cm)"
flowmeter_revs = "Flowmeter"

[columns.records]
event_id = "Station"
taxon = "Species"
life_stage = "Stage"
count = "Counted"
split_fraction = "Split"        # 1/4, 1/2, 1/8 as written on the sorting sheet

[units]
mouth_diameter_m = "cm"

[constants]
m_per_rev = 0.26873

[formats]
lat = "degrees_minutes"          # 43°12.345'N
lon = "degrees_minutes"          # 151°30.120'W
"""
BANK_YEARS = (2021, 2022, 2023)
BANK_STATIONS = 8

# taxon as written (variants), stage, individuals per m3 at the best depth (spring, autumn), best depth m
_TAXA = [
    (["Copelix marina", "copelix", "COPELIX MARINA"], "adult", (60.0, 25.0), 30.0),
    (["Thysseia borealis", "keld krill"], "adult", (3.0, 5.0), 150.0),
    (["Thysseia borealis", "keld krill"], "larva", (12.0, 0.5), 20.0),
    (["Nauplia keldica"], "", (40.0, 10.0), 15.0),
]
# depth ranges (top, bottom) used by the survey: surface, epipelagic, an integrated haul, mesopelagic
_RANGES = [(0.0, 10.0), (10.0, 200.0), (0.0, 200.0), (200.0, 500.0)]


def generate(folder: Path, rng: np.random.Generator) -> list[DemoInput]:
    out = folder / "data" / KIND
    out.mkdir(parents=True, exist_ok=True)
    (folder / "profiles" / "plankton_keldmar.toml").write_text(PROFILE, encoding="utf-8")
    lon0, lat0 = random_points_in_domain(rng, STATIONS)
    tows, counts = [], []
    for year in YEARS:
        for season, (first, days) in SEASONS.items():
            t, c = _cruise(rng, year, season, pd.Timestamp(f"{year}-{first}"), days, lon0, lat0)
            t, c = _mess(rng, year, season, t, c)
            tows.append(t)
            counts.append(c)
    # the monitoring programme sends one pair of files for all years (one ingest)
    ev_path, rc_path = out / f"tows_{YEARS[0]}_{YEARS[-1]}.csv", out / f"counts_{YEARS[0]}_{YEARS[-1]}.csv"
    pd.concat(tows, ignore_index=True).to_csv(ev_path, index=False)
    pd.concat(counts, ignore_index=True).to_csv(rc_path, index=False)
    return [DemoInput("profiles/plankton_keldmar.toml",
                      {"events": str(ev_path.relative_to(folder)), "records": str(rc_path.relative_to(folder))},
                      f"plankton tows {YEARS[0]}-{YEARS[-1]}"),
            _bank_survey(folder, out, rng)]


def _degrees_minutes(value: np.ndarray, positive: str, negative: str) -> list[str]:
    """Degrees and decimal minutes with a hemisphere letter, as a ship's log writes them."""
    whole = np.floor(np.abs(value)).astype(int)
    minutes = (np.abs(value) - whole) * 60
    return [f"{d}°{m:06.3f}'{positive if v >= 0 else negative}" for d, m, v in zip(whole, minutes, value, strict=True)]


def _bank_survey(folder: Path, out: Path, rng: np.random.Generator) -> DemoInput:
    """The university's summer tows on Vossa Bank, in the provider's own formats."""
    (folder / "profiles" / "plankton_vossa_larvae.toml").write_text(BANK_PROFILE, encoding="utf-8")
    lon0, lat0 = random_points_in_domain(rng, BANK_STATIONS, strata=("Vossa Bank",))
    tows, counts = [], []
    for year in BANK_YEARS:
        t, c = _cruise(rng, year, "summer", pd.Timestamp(f"{year}-07-02"), 12, lon0, lat0)
        t["tow_id"] = [f"VB{year % 100:02d}-{i + 1}" for i in range(len(t))]
        c["tow_id"] = c["tow_id"].map(dict(zip(_cruise_ids(year, "summer", len(t)), t["tow_id"], strict=True)))
        tows.append(t)
        counts.append(c)
    t = pd.concat(tows, ignore_index=True)
    c = pd.concat(counts, ignore_index=True)
    start = pd.to_datetime(t["start_utc"])
    sheet = pd.DataFrame({
        "Station": t["tow_id"], "Date": start.dt.strftime("%Y-%m-%d"), "Time (UTC)": start.dt.strftime("%H:%M"),
        "Latitude": _degrees_minutes(t["lat"].to_numpy(), "N", "S"),
        "Longitude": _degrees_minutes(t["lon"].to_numpy(), "E", "W"),
        "Top (m)": t["depth_top_m"], "Bottom (m)": t["depth_bottom_m"], "Sounding (m)": t["water_depth_m"],
        "Ring (cm)": t["ring_cm"], "Flowmeter": t["flowmeter_revs"],
    })
    split = c["split"].map(lambda v: "" if v == "" else f"1/{round(1 / float(v))}")
    sorting = pd.DataFrame({"Station": c["tow_id"], "Species": c["taxon"], "Stage": c["stage"],
                            "Counted": c["n_counted"], "Split": split})
    ev_path, rc_path = out / "vossa_larvae_stations.csv", out / "vossa_larvae_counts.csv"
    sheet.to_csv(ev_path, index=False)
    sorting.to_csv(rc_path, index=False)
    return DemoInput("profiles/plankton_vossa_larvae.toml",
                     {"events": str(ev_path.relative_to(folder)), "records": str(rc_path.relative_to(folder))},
                     f"Vossa Bank larval survey {BANK_YEARS[0]}-{BANK_YEARS[-1]} (degree-minute positions, "
                     "date and time apart, 1/4 splits)")


def _cruise_ids(year: int, season: str, n: int) -> list[str]:
    """The tow ids _cruise gives (``2021SU01`` ...)."""
    return [f"{year}{season[:2].upper()}{i + 1:02d}" for i in range(n)]


def _cruise(rng: np.random.Generator, year: int, season: str, first: pd.Timestamp, days: int,
            lon0: np.ndarray, lat0: np.ndarray) -> tuple[pd.DataFrame, pd.DataFrame]:
    n = len(lon0)
    lon = lon0 + rng.normal(0, 0.02, n)
    lat = lat0 + rng.normal(0, 0.015, n)
    water = bottom_depth_m(lon, lat)
    pick = rng.integers(0, len(_RANGES), n)
    top = np.array([_RANGES[i][0] for i in pick])
    bottom = np.array([_RANGES[i][1] for i in pick])
    # a range deeper than the water is cut 5 m above the bottom
    bottom = np.minimum(bottom, np.floor(water - 5.0))
    top = np.where(top >= bottom, 0.0, top)
    start = (first + pd.to_timedelta(rng.uniform(0, days, n), unit="D")).round("min")
    speed_m_s = rng.uniform(0.6, 1.0, n)
    path_m = (bottom - top) * rng.uniform(1.05, 1.6, n)  # oblique paths are longer than the range
    revs = np.round(path_m / ROTOR_M_PER_REV)
    minutes = np.maximum(1, np.round(path_m / speed_m_s / 60))
    ring_cm = rng.choice([50, 60, 60], n)
    area = np.pi * (ring_cm / 100) ** 2 / 4
    volume = revs * ROTOR_M_PER_REV * area
    ids = _cruise_ids(year, season, n)
    tows = pd.DataFrame({
        "tow_id": ids, "start_utc": start.strftime("%Y-%m-%dT%H:%M"),
        "end_utc": (start + pd.to_timedelta(minutes, unit="min")).strftime("%Y-%m-%dT%H:%M"),
        "lat": lat.round(4), "lon": lon.round(4), "depth_top_m": top, "depth_bottom_m": bottom,
        "water_depth_m": water.round(0), "ring_cm": ring_cm, "flowmeter_revs": revs.astype(int), "remarks": "",
    })
    s = 0 if season == "spring" else 1
    rows = []
    for names, stage, per_m3, best in _TAXA:
        # mean density over the range: a bell around the taxon's best depth
        mid = (top + bottom) / 2
        suit = np.exp(-0.5 * ((mid - best) / max(best, 40.0)) ** 2)
        expected = per_m3[s] * suit * volume
        caught = rng.poisson(np.maximum(expected * rng.lognormal(0, 0.5, n), 0))
        for i in np.flatnonzero(caught > 0):
            total = int(caught[i])
            split = 1.0 if total < 400 else (0.25 if total < 4000 else 0.0625)
            counted = max(1, int(round(total * split)))
            rows.append((ids[i], rng.choice(names), stage, counted, "" if split == 1 else split))
    counts = pd.DataFrame(rows, columns=["tow_id", "taxon", "stage", "n_counted", "split"])
    return tows, counts


def _mess(rng: np.random.Generator, year: int, season: str, tows: pd.DataFrame,
          counts: pd.DataFrame) -> tuple[pd.DataFrame, pd.DataFrame]:
    """What real files have: a clogged net, plural stages, a repeated line, an orphan count."""
    tows = tows.copy()
    counts = counts.copy()
    if season == "spring":
        tows.loc[int(rng.integers(0, len(tows))), "remarks"] = "net clogged"
        tows = pd.concat([tows, tows.iloc[[2]]], ignore_index=True)
        orphan = pd.DataFrame([(f"{year}XX99", "copelix", "adult", 14, "")], columns=counts.columns)
        counts = pd.concat([counts, orphan], ignore_index=True)
    larvae = counts.index[counts["stage"] == "larva"]
    if len(larvae):
        counts.loc[larvae[0], "stage"] = "Larvae"
    if year == 2020 and season == "autumn":  # a flowmeter that stuck: zero revolutions
        tows.loc[5, "flowmeter_revs"] = 0
    return tows, counts
