"""Demo volunteer seabird records 2018-2023: an app's checklists and sightings, and a portal's Darwin Core Archive.

Volunteers aboard ferries, yachts and fishing boats report seabirds all year round, most of
them in late autumn. Some of their sightings repeat birds that the agency's seabird survey
counted (read from ``data/transect/agency_sightings.csv`` when the transect generator ran
before; otherwise volunteers repeat each other's sightings). The files carry the usual mess:
a position on land, a typed year in the future, an unknown name, a resubmitted checklist, an
absence in an incidental record and an implausibly high count.
"""

from __future__ import annotations

import zipfile
from pathlib import Path

import numpy as np
import pandas as pd
import pyproj

from harmonize.demo.sea import YEARS, DemoInput, random_points_in_domain

KIND = "opportunistic"
_GEOD = pyproj.Geod(ellps="WGS84")
SEABIRDS = ("Procellix keldica", "Larivox pallens", "Aukelle minima")
_NAMES = {"Procellix keldica": ["Procellix keldica", "keld fulmar"], "Larivox pallens": ["pale gull", "Larivox pallens"],
          "Aukelle minima": ["little aukelle", "Aukelle minima"]}
# birds per hour of watching, by taxon, in late autumn (other seasons: a third)
_RATE_PER_H = {"Procellix keldica": 6.0, "Larivox pallens": 4.0, "Aukelle minima": 1.5}
_OBSERVERS = ["Ilse Varrow", "Tam Brekke", "Odo Selvin", "Runa Maelis", "Pell Haskard", "Vigo Anstrel",
              "Sela Dunmorrow", "Kasimir Feld", "Yrsa Tolland", "Bram Oakhurst"]

#: The invented app's marker for a bird noted but not counted (mapped in its profile).
PRESENCE_MARK = "seen"

APP_PROFILE = """\
# Volunteer seabird records from a birding app (invented): complete checklists and incidental sightings.
[source]
id = "keldmar_birding_app"
kind = "opportunistic"
provider_type = "volunteer"
protocol = "keldmar_volunteer_checklist"
timezone = "UTC"

[columns]
record_id = "sighting_id"
checklist_id = "checklist"
time = "observed_at"
lat = "lat"
lon = "lon"
observer = "observer"
taxon = "species"
count = "number"
complete = "full_list"
duration_min = "watch_min"
distance_km = "route_km"

[presence]
tokens = ["seen"]            # the app writes "seen" for a bird noted but not counted

[plausibility]
earliest = "2015-01-01"     # the app was launched in 2015

[duplicates]                 # a sighting within 2 km and 60 min of a better-ranked one is a twin
distance_km = 2.0
minutes = 60
"""

PORTAL_PROFILE = """\
# A biodiversity data portal's Darwin Core Archive of seawatch checklists (invented).
# No [columns]: Darwin Core terms map onto the adapter's fields by themselves.
[source]
id = "keldmar_portal_seawatches"
kind = "opportunistic"
provider_type = "volunteer"
protocol = "keldmar_volunteer_checklist"

[constants]
complete = true              # the portal's seawatch protocol reports every species seen

[duplicates]
distance_km = 2.0
minutes = 60
"""


def generate(folder: Path, rng: np.random.Generator) -> list[DemoInput]:
    out = folder / "data" / KIND
    out.mkdir(parents=True, exist_ok=True)
    (folder / "profiles" / "opportunistic_app.toml").write_text(APP_PROFILE, encoding="utf-8")
    (folder / "profiles" / "opportunistic_portal.toml").write_text(PORTAL_PROFILE, encoding="utf-8")
    agency = _agency_sightings(folder)
    rows = [_app_year(rng, year, agency) for year in YEARS]
    app = pd.concat(rows, ignore_index=True)
    app = _mess(rng, app)
    app.insert(0, "sighting_id", [f"APP-{i + 1:05d}" for i in range(len(app))])
    inputs = []
    year = pd.to_numeric(app["observed_at"].str[:4], errors="coerce")
    for label, part in (("2018-2020", app[year <= 2020]), ("2021-2023", app[~(year <= 2020)])):
        path = out / f"app_sightings_{label}.csv"
        part.to_csv(path, index=False)
        inputs.append(DemoInput("profiles/opportunistic_app.toml", {"rows": str(path.relative_to(folder))},
                                f"volunteer app records {label}"))
    archive = out / "portal_seawatches_dwca.zip"
    _write_archive(rng, archive, app)
    inputs.append(DemoInput("profiles/opportunistic_portal.toml", {"rows": str(archive.relative_to(folder))},
                            "portal seawatch checklists (Darwin Core Archive)"))
    return inputs


def _agency_sightings(folder: Path) -> pd.DataFrame:
    path = folder / "data" / "transect" / "agency_sightings.csv"
    if path.is_file():
        frame = pd.read_csv(path)
        if {"time", "lat", "lon", "taxon", "count"} <= set(frame.columns):
            return frame
    return pd.DataFrame({"time": [], "lat": [], "lon": [], "taxon": [], "count": []})


def _app_year(rng: np.random.Generator, year: int, agency: pd.DataFrame) -> pd.DataFrame:
    """Complete checklists (all seasons, most in late autumn) and incidental sightings of one year."""
    n_lists = 40
    autumn = rng.random(n_lists) < 0.6
    day = np.where(autumn, rng.integers(300, 335, n_lists), rng.integers(1, 365, n_lists))
    start = (pd.Timestamp(f"{year}-01-01") + pd.to_timedelta(day - 1, unit="D")
             + pd.to_timedelta(rng.integers(6 * 60, 16 * 60, n_lists), unit="min"))
    lon, lat = random_points_in_domain(rng, n_lists, ("Ellery Shelf", "Vossa Bank"))
    minutes = rng.choice([30, 45, 60, 90, 120, 360], n_lists, p=[0.2, 0.2, 0.3, 0.15, 0.1, 0.05])
    observer = rng.choice(_OBSERVERS, n_lists)
    rows = []
    for i in range(n_lists):  # a loop over checklists of a small demo file
        for taxon in SEABIRDS:
            rate = _RATE_PER_H[taxon] * (1.0 if autumn[i] else 0.33) * minutes[i] / 60
            n = rng.poisson(rate)
            if n == 0:
                continue
            number = PRESENCE_MARK if rng.random() < 0.1 else str(n)
            rows.append((f"{year}-C{i + 1:03d}", start[i], lat[i], lon[i], observer[i], rng.choice(_NAMES[taxon]),
                         number, "true", minutes[i], 0.0))
    # incidental sightings scattered over the sea
    n_inc = 25
    ilon, ilat = random_points_in_domain(rng, n_inc)
    itime = pd.Timestamp(f"{year}-01-01") + pd.to_timedelta(rng.uniform(0, 365 * 24 * 60, n_inc), unit="min")
    for j in range(n_inc):
        taxon = SEABIRDS[rng.integers(0, 3)]
        number = PRESENCE_MARK if rng.random() < 0.4 else str(rng.integers(1, 6))
        rows.append(("", itime[j], ilat[j], ilon[j], rng.choice(_OBSERVERS), rng.choice(_NAMES[taxon]), number,
                     "", np.nan, np.nan))
    # volunteers on the survey's route report some of the agency's birds again
    seen = agency[pd.to_datetime(agency["time"]).dt.year == year] if len(agency) else agency
    if len(seen):
        pick = seen.sample(n=min(len(seen), 12), random_state=int(rng.integers(2**31)))
        dist = rng.uniform(200, 1500, len(pick))
        lon2, lat2, _ = _GEOD.fwd(pick["lon"].to_numpy(float), pick["lat"].to_numpy(float),
                                  rng.uniform(0, 360, len(pick)), dist)
        when = pd.to_datetime(pick["time"]) + pd.to_timedelta(rng.uniform(-30, 30, len(pick)), unit="min")
        for t, la, lo, taxon, count in zip(when, lat2, lon2, pick["taxon"], pick["count"], strict=True):
            rows.append(("", t, la, lo, rng.choice(_OBSERVERS), taxon, str(int(count)), "", np.nan, np.nan))
    else:  # no agency survey: two volunteers on one boat report the same birds
        for r in rows[:6]:
            rows.append(("", r[1] + pd.Timedelta(minutes=10), r[2] + 0.002, r[3], "Bram Oakhurst", r[5], PRESENCE_MARK, "", np.nan, np.nan))
    frame = pd.DataFrame(rows, columns=["checklist", "observed_at", "lat", "lon", "observer", "species", "number",
                                        "full_list", "watch_min", "route_km"])
    frame["observed_at"] = pd.to_datetime(frame["observed_at"]).dt.strftime("%Y-%m-%dT%H:%M")
    frame["lat"] = frame["lat"].round(5)
    frame["lon"] = frame["lon"].round(5)
    return frame


def _mess(rng: np.random.Generator, app: pd.DataFrame) -> pd.DataFrame:
    """What volunteer files hold besides good records."""
    app = app.copy()
    inc = app.index[app["checklist"] == ""]
    app.loc[inc[0], ["lat", "lon"]] = [46.8, -152.5]           # on land, north of the sea
    app.loc[inc[1], "observed_at"] = "2" + app.loc[inc[1], "observed_at"][1:].replace("0", "3", 1)  # 2021 -> 2321
    app.loc[inc[2], "species"] = "keld fulmer"                  # a misspelt name
    app.loc[inc[3], "number"] = "0"                             # an absence outside a checklist
    first = app[app["checklist"] == app["checklist"].iloc[0]]
    lists = app.index[app["checklist"] != ""]
    app.loc[lists[len(lists) // 2], "number"] = "900"           # far above any other count
    again = first.assign(checklist=first["checklist"] + "-resent")  # the same checklist submitted twice
    return pd.concat([app, again], ignore_index=True)


def _write_archive(rng: np.random.Generator, path: Path, app: pd.DataFrame) -> None:
    """A Darwin Core Archive (event core + occurrence extension) of portal seawatches 2022-2023."""
    events, occ = [], []
    lon, lat = random_points_in_domain(rng, 30, ("Ellery Shelf",))
    for i in range(30):
        year = 2022 + i % 2
        start = pd.Timestamp(f"{year}-11-01T07:00Z") + pd.Timedelta(days=int(rng.integers(0, 28)), hours=int(rng.integers(0, 6)))
        end = start + pd.Timedelta(minutes=int(rng.choice([60, 90, 120])))
        eid = f"SW-{year}-{i + 1:03d}"
        events.append((eid, f"{start:%Y-%m-%dT%H:%MZ}/{end:%Y-%m-%dT%H:%MZ}", f"{lat[i]:.5f}", f"{lon[i]:.5f}",
                       rng.choice(_OBSERVERS), "stationary seawatch from a moored boat, all species reported"))
        for k, taxon in enumerate(SEABIRDS):
            n = rng.poisson(_RATE_PER_H[taxon] * (end - start).total_seconds() / 3600)
            status = "present" if n else "absent"
            occ.append((eid, f"{eid}-{k + 1}", taxon, str(n), status))
    # an app checklist also sent to the portal by its observer: a cross-source twin
    lists = app[(app["checklist"] != "") & ~app["checklist"].str.endswith("-resent")
                & app["observed_at"].str.startswith("2022")]
    if len(lists):
        first = lists[lists["checklist"] == lists["checklist"].iloc[0]]
        start = pd.Timestamp(first["observed_at"].iloc[0])
        end = start + pd.Timedelta(minutes=float(first["watch_min"].iloc[0]))
        eid = "SW-2022-APP"
        events.append((eid, f"{start:%Y-%m-%dT%H:%MZ}/{end:%Y-%m-%dT%H:%MZ}", str(first["lat"].iloc[0]),
                       str(first["lon"].iloc[0]), first["observer"].iloc[0], "copied from a birding app"))
        for k, (name, number) in enumerate(zip(first["species"], first["number"], strict=True)):
            occ.append((eid, f"{eid}-{k + 1}", name, "" if number == PRESENCE_MARK else number, "present"))
    ev = pd.DataFrame(events, columns=["eventID", "eventDate", "decimalLatitude", "decimalLongitude", "recordedBy",
                                       "samplingProtocol"])
    oc = pd.DataFrame(occ, columns=["id", "occurrenceID", "scientificName", "individualCount", "occurrenceStatus"])
    dwc = "http://rs.tdwg.org/dwc/terms/"
    ev_fields = "\n".join(f'    <field index="{i}" term="{dwc}{t}"/>' for i, t in enumerate(ev.columns))
    oc_fields = "\n".join(f'    <field index="{i}" term="{dwc}{t}"/>' for i, t in enumerate(oc.columns) if i)
    meta = f"""<?xml version="1.0" encoding="UTF-8"?>
<archive xmlns="http://rs.tdwg.org/dwc/text/">
  <core encoding="UTF-8" fieldsTerminatedBy="\\t" linesTerminatedBy="\\n" fieldsEnclosedBy="" ignoreHeaderLines="1"
        rowType="{dwc}Event">
    <files><location>event.txt</location></files>
    <id index="0"/>
{ev_fields}
  </core>
  <extension encoding="UTF-8" fieldsTerminatedBy="\\t" linesTerminatedBy="\\n" fieldsEnclosedBy="" ignoreHeaderLines="1"
             rowType="{dwc}Occurrence">
    <files><location>occurrence.txt</location></files>
    <coreid index="0"/>
{oc_fields}
    <field term="{dwc}basisOfRecord" default="HumanObservation"/>
  </extension>
</archive>
"""
    with zipfile.ZipFile(path, "w", zipfile.ZIP_DEFLATED) as zf:
        zf.writestr("meta.xml", meta)
        zf.writestr("event.txt", ev.to_csv(sep="\t", index=False, lineterminator="\n"))
        zf.writestr("occurrence.txt", oc.to_csv(sep="\t", index=False, lineterminator="\n"))
