"""Demo seabird strip transects in late autumn 2018-2023: an agency survey and a volunteer ferry count.

Besides the ingest files, the agency's sightings are written with explicit columns to
``data/transect/agency_sightings.csv`` (time, lat, lon, taxon, count: segment midpoint time
in UTC, segment midpoint, canonical taxon name, birds) so that the volunteer-sightings
generator can report some of the same birds again.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pyproj

from harmonize.demo.sea import YEARS, DemoInput

KIND = "transect"
SIGHTINGS_FILE = "agency_sightings.csv"
_GEOD = pyproj.Geod(ellps="WGS84")

AGENCY_PROFILE = """\
# Keldmar seabirds-at-sea survey (invented): 10-minute segments, 300 m strip, snapshot counts.
[source]
id = "keldmar_seabirds"
kind = "transect"
provider_type = "agency"
protocol = "keldmar_seabird_strip"
timezone = "UTC"

[columns.events]
event_id = "segment_id"
start_time = "start_utc"
end_time = "end_utc"
start_lat = "lat_start"
start_lon = "lon_start"
end_lat = "lat_end"
end_lon = "lon_end"
strip_width_m = "strip_m"
observer = "observer"

[columns.records]
event_id = "segment_id"
taxon = "species"
count = "count"
in_flight = "flying"

[strip]
flying = "snapshot"        # flying birds counted by snapshot (Tasker et al. 1984)
"""

# Volunteers on the Keldmar ferry: local time, distance in nautical miles from the ship's log
# (no end positions), a narrower 200 m strip, and every flying bird counted.
VOLUNTEER_PROFILE = """\
# Volunteer seabird counts from the Keldmar ferry (invented).
[source]
id = "keldmar_ferry_volunteers"
kind = "transect"
provider_type = "volunteer"
protocol = "keldmar_seabird_strip"
timezone = "Pacific/Honolulu"

[columns.events]
event_id = "Count no"
start_time = "Start (local)"
duration = "Minutes"
start_lat = "Lat"
start_lon = "Lon"
length_km = "Distance nm"
observer = "Counted by"

[columns.records]
event_id = "Count no"
taxon = "Bird"
count = "How many"
in_flight = "Flying?"

[units]
duration = "min"
length_km = "nmi"

[constants]
strip_width_m = 200

[strip]
flying = "continuous"      # every flying bird in the strip was counted: no density for flyers
"""

# canonical taxon, names written by the agency / volunteers, mean birds per km2 on the water, share flying
_BIRDS = [
    ("Procellix keldica", ["Procellix keldica", "keld fulmar"], 6.0, 0.5),
    ("Larivox pallens", ["Larivox pallens", "pale gull"], 3.0, 0.6),
    ("Aukelle minima", ["Aukelle minima", "little aukelle"], 9.0, 0.2),
]
# survey lines of the agency (start lon, start lat, end lon, end lat), inside the Keldmar Sea
_LINES = [(-155.2, 42.0, -151.0, 42.4), (-154.8, 43.2, -149.2, 43.6), (-154.0, 44.6, -150.0, 44.9)]
_FERRY = (-155.0, 42.6, -149.6, 44.3)
_OBSERVERS = ["Ansel Brokk", "Irmelin Sauda", "Petra Vaskoy"]  # invented
_VOLUNTEERS = ["Tove Arnesby", "Hal Quorrin", "Brit Seland", "tove arnesby"]  # invented


def generate(folder: Path, rng: np.random.Generator) -> list[DemoInput]:
    out = folder / "data" / KIND
    out.mkdir(parents=True, exist_ok=True)
    (folder / "profiles" / "transect_keldmar.toml").write_text(AGENCY_PROFILE, encoding="utf-8")
    (folder / "profiles" / "transect_ferry_volunteers.toml").write_text(VOLUNTEER_PROFILE, encoding="utf-8")
    agency, ferry, sightings = ([], []), ([], []), []
    for year in YEARS:
        seg, birds, seen = _agency(rng, year)
        agency[0].append(seg)
        agency[1].append(birds)
        sightings.append(seen)
        seg, birds = _ferry(rng, year)
        ferry[0].append(seg)
        ferry[1].append(birds)
    pd.concat(sightings, ignore_index=True).to_csv(out / SIGHTINGS_FILE, index=False)
    years = f"{YEARS[0]}_{YEARS[-1]}"
    return [
        _write(folder, out, f"seabird_segments_{years}", f"seabirds_{years}", agency,
               "transect_keldmar", f"seabird strip transects {YEARS[0]}-{YEARS[-1]}"),
        _write(folder, out, f"ferry_counts_{years}", f"ferry_birds_{years}", ferry,
               "transect_ferry_volunteers", f"volunteer ferry seabird counts {YEARS[0]}-{YEARS[-1]}"),
    ]


def _write(folder: Path, out: Path, ev_name: str, rc_name: str, frames: tuple[list[pd.DataFrame], list[pd.DataFrame]],
           profile: str, description: str) -> DemoInput:
    ev, rc = out / f"{ev_name}.csv", out / f"{rc_name}.csv"
    pd.concat(frames[0], ignore_index=True).to_csv(ev, index=False)
    pd.concat(frames[1], ignore_index=True).to_csv(rc, index=False)
    return DemoInput(f"profiles/{profile}.toml", {"events": str(ev.relative_to(folder)), "records": str(rc.relative_to(folder))},
                     description)


def _points_along(route: tuple[float, float, float, float], step_km: float, n: int) -> tuple[np.ndarray, np.ndarray]:
    """n + 1 points a ship passes at equal steps along the geodesic from a route's start towards its end."""
    lon1, lat1, lon2, lat2 = route
    azimuth, _, _ = _GEOD.inv(lon1, lat1, lon2, lat2)
    lons, lats, _ = _GEOD.fwd(np.full(n + 1, lon1), np.full(n + 1, lat1), np.full(n + 1, azimuth),
                              np.arange(n + 1) * step_km * 1000.0)
    return np.asarray(lons), np.asarray(lats)


def _counts(rng: np.random.Generator, area_km2: np.ndarray, lat: np.ndarray, year: int) -> list[tuple[int, str, int, bool]]:
    """(segment index, canonical taxon, birds, in flight) drawn from invented densities."""
    rows = []
    for taxon, _names, per_km2, flying_share in _BIRDS:
        # Aukelles keep to the north, gulls decline over the years (an invented trend)
        north = np.clip((lat - 42.0) / 3.0, 0, 1)
        mean = per_km2 * area_km2 * (0.3 + 1.4 * north if taxon == "Aukelle minima" else 1.0)
        if taxon == "Larivox pallens":
            mean = mean * (1.0 - 0.08 * (year - YEARS[0]))
        clumped = rng.poisson(mean * rng.gamma(0.6, 1 / 0.6, len(mean)))
        flying = rng.binomial(clumped, flying_share)
        for i in np.flatnonzero(clumped - flying):
            rows.append((int(i), taxon, int(clumped[i] - flying[i]), False))
        for i in np.flatnonzero(flying):
            rows.append((int(i), taxon, int(flying[i]), True))
    return rows


def _agency(rng: np.random.Generator, year: int) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame]:
    parts, birds, seen = [], [], []
    day = pd.Timestamp(f"{year}-11-08")
    for k, line in enumerate(_LINES):
        n = 14
        lons, lats = _points_along(line, rng.uniform(2.8, 3.4), n)  # ~10 kn for 10 min
        lons = lons + rng.normal(0, 0.002, n + 1)
        start = day + pd.Timedelta(days=k, hours=8) + pd.to_timedelta(np.arange(n) * 10, unit="min")
        ids = [f"{year}-L{k + 1}-{i + 1:02d}" for i in range(n)]
        seg = pd.DataFrame({
            "segment_id": ids, "start_utc": start.strftime("%Y-%m-%dT%H:%M"),
            "end_utc": (start + pd.Timedelta(minutes=10)).strftime("%Y-%m-%dT%H:%M"),
            "lat_start": lats[:-1].round(4), "lon_start": lons[:-1].round(4),
            "lat_end": lats[1:].round(4), "lon_end": lons[1:].round(4), "strip_m": 300,
            "observer": rng.choice(_OBSERVERS[:2] if k < 2 else _OBSERVERS[1:], n),
        })
        _, _, dist_m = _GEOD.inv(seg["lon_start"], seg["lat_start"], seg["lon_end"], seg["lat_end"])
        mid_lat = (seg["lat_start"].to_numpy() + seg["lat_end"].to_numpy()) / 2
        mid_lon = (seg["lon_start"].to_numpy() + seg["lon_end"].to_numpy()) / 2
        rows = _counts(rng, np.asarray(dist_m) / 1000 * 0.3, mid_lat, year)
        names = {t: n for t, n, _, _ in _BIRDS}
        for i, taxon, count, flying in rows:
            birds.append((ids[i], rng.choice(names[taxon]), count, "Y" if flying else "N"))
            seen.append(((start[i] + pd.Timedelta(minutes=5)).strftime("%Y-%m-%dT%H:%M:%S"),
                         round(float(mid_lat[i]), 5), round(float(mid_lon[i]), 5), taxon, count))
        parts.append(seg)
    segments = pd.concat(parts, ignore_index=True)
    records = pd.DataFrame(birds, columns=["segment_id", "species", "count", "flying"])
    # Mess: a segment typed twice, a sighting with a misspelt name, and an end time before the start
    segments = pd.concat([segments, segments.iloc[[3]]], ignore_index=True)
    if len(records) > 4:
        records.loc[records.index[4], "species"] = "Procelix keldica"
    if year == 2021:
        segments.loc[9, "end_utc"] = segments.loc[9, "start_utc"][:11] + "07:55"
    sightings = pd.DataFrame(seen, columns=["time", "lat", "lon", "taxon", "count"])
    return segments, records, sightings


def _ferry(rng: np.random.Generator, year: int) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Two ferry crossings a week through November, counted by volunteers in 15-minute blocks."""
    n_per, trips = 16, 4
    parts, birds = [], []
    lons, lats = _points_along(_FERRY, 7.0, n_per)  # ~15 kn for 15 min
    for t in range(trips):
        local_start = pd.Timestamp(f"{year}-11-{3 + 7 * t:02d} 07:30") + pd.to_timedelta(np.arange(n_per) * 15, unit="min")
        ids = [f"F{year % 100}{t + 1}{i + 1:02d}" for i in range(n_per)]
        _, _, dist_m = _GEOD.inv(lons[:-1], lats[:-1], lons[1:], lats[1:])
        seg = pd.DataFrame({
            "Count no": ids, "Start (local)": local_start.strftime("%Y-%m-%d %H:%M"), "Minutes": 15,
            "Lat": lats[:-1].round(3), "Lon": lons[:-1].round(3),
            "Distance nm": (np.asarray(dist_m) / 1852).round(2),
            "Counted by": rng.choice(_VOLUNTEERS, n_per),
        })
        rows = _counts(rng, np.asarray(dist_m) / 1000 * 0.2 * 1.6, lats[:-1], year)  # flyers over-counted
        names = {t_: n for t_, n, _, _ in _BIRDS}
        for i, taxon, count, flying in rows:
            birds.append((ids[i], rng.choice(names[taxon]).lower(), count, "yes" if flying else ""))
        parts.append(seg)
    segments = pd.concat(parts, ignore_index=True)
    records = pd.DataFrame(birds, columns=["Count no", "Bird", "How many", "Flying?"])
    # Mess volunteers make: a bird nobody could name, a count written as text, a blank name
    extra = pd.DataFrame([(segments["Count no"].iloc[2], "gull sp.", 3, "yes"),
                          (segments["Count no"].iloc[5], "pale gull", "c. 20", "")], columns=records.columns)
    records = pd.concat([records, extra], ignore_index=True)
    segments.loc[7, "Counted by"] = ""
    return segments, records
