"""The Keldmar Sea: an invented shelf sea with invented places and taxa, for the demo.

Nothing here describes a real place, survey, vessel or person. Positions sit in open
ocean only so that the coordinates are valid; the sea, its banks and its species are made up.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

import numpy as np

YEARS = tuple(range(2018, 2024))

# The coast of the invented sea (lon, lat), closed.
DOMAIN_RING = [
    (-156.0, 41.0), (-148.0, 41.0), (-148.0, 44.5), (-149.5, 46.0), (-153.0, 46.0),
    (-156.0, 45.0), (-156.0, 41.0),
]
STRATA = {
    "Ellery Shelf": [(-156.0, 44.0), (-148.75, 44.0), (-149.5, 46.0), (-153.0, 46.0), (-156.0, 45.0), (-156.0, 44.0)],
    "Vossa Bank": [(-156.0, 41.0), (-152.0, 41.0), (-152.0, 44.0), (-156.0, 44.0), (-156.0, 41.0)],
    "Thorne Deep": [(-152.0, 41.0), (-148.0, 41.0), (-148.0, 44.0), (-152.0, 44.0), (-152.0, 41.0)],
}

# taxon, group, aliases, sensitive, rank, parent (all invented; taxon ids are made-up URNs)
TAXA = [
    ("Ostravix", "fish", "", False, "genus", ""),
    ("Ostravix keldensis", "fish", "keld cod|OSTRA KEL|Ostravix keldensi", False, "species", "Ostravix"),
    ("Lumbrena", "fish", "", False, "genus", ""),
    ("Lumbrena pallida", "fish", "pale lumb|LUMB PAL", False, "species", "Lumbrena"),
    ("Syrranthus", "fish", "", False, "genus", ""),
    ("Syrranthus minor", "fish", "lesser syrranth", False, "species", "Syrranthus"),
    ("Pelagon", "fish", "", False, "genus", ""),
    ("Pelagon argentea", "fish", "silver pelagon", False, "species", "Pelagon"),
    # The identification change planted in the trawl survey: the genus Vossaria was recorded
    # as one taxon until SPLIT_YEAR - 1 and as two species from SPLIT_YEAR on.
    ("Vossaria", "fish", "vossaria spp", False, "genus", ""),
    ("Vossaria borealis", "fish", "northern vossaria", False, "species", "Vossaria"),
    ("Vossaria australis", "fish", "southern vossaria", False, "species", "Vossaria"),
    # A rare deep-water fish, caught in about one haul a year: too sparse to model alone.
    ("Bathyra thornensis", "fish", "thorne bathyra", False, "species", ""),
    ("Calverion", "invertebrate", "", False, "genus", ""),
    ("Calverion rubrum", "invertebrate", "red calverion", True, "species", "Calverion"),
    # no genus row: the plankton lab writes "copelix" for the species (an alias below)
    ("Copelix marina", "zooplankton", "copelix", False, "species", ""),
    ("Thysseia", "zooplankton", "", False, "genus", ""),
    ("Thysseia borealis", "zooplankton", "keld krill", False, "species", "Thysseia"),
    ("Nauplia", "zooplankton", "", False, "genus", ""),
    ("Nauplia keldica", "zooplankton", "", False, "species", "Nauplia"),
    ("Procellix", "seabird", "", False, "genus", ""),
    ("Procellix keldica", "seabird", "keld fulmar", False, "species", "Procellix"),
    ("Larivox", "seabird", "", False, "genus", ""),
    ("Larivox pallens", "seabird", "pale gull", False, "species", "Larivox"),
    ("Aukelle", "seabird", "", False, "genus", ""),
    ("Aukelle minima", "seabird", "little aukelle", True, "species", "Aukelle"),
]
#: First season year in which the trawl survey tells the two Vossaria species apart.
SPLIT_YEAR = 2021
# protocol, taxon, first_year, last_year, life_stage
TARGETS = [
    ("keldmar_bottom_trawl", "Ostravix keldensis", "", "", ""),
    ("keldmar_bottom_trawl", "Lumbrena pallida", "", "", ""),
    ("keldmar_bottom_trawl", "Syrranthus minor", "2019", "", ""),
    ("keldmar_bottom_trawl", "Pelagon argentea", "", "", ""),
    ("keldmar_bottom_trawl", "Calverion rubrum", "", "", ""),
    ("keldmar_bottom_trawl", "Bathyra thornensis", "", "", ""),
    ("keldmar_bottom_trawl", "Vossaria", "", str(SPLIT_YEAR - 1), ""),
    ("keldmar_bottom_trawl", "Vossaria borealis", str(SPLIT_YEAR), "", ""),
    ("keldmar_bottom_trawl", "Vossaria australis", str(SPLIT_YEAR), "", ""),
    ("keldmar_plankton_net", "Copelix marina", "", "", "adult"),
    ("keldmar_plankton_net", "Thysseia borealis", "", "", "adult"),
    ("keldmar_plankton_net", "Thysseia borealis", "", "", "larva"),
    ("keldmar_plankton_net", "Nauplia keldica", "", "", ""),
    ("keldmar_seabird_strip", "Procellix keldica", "", "", ""),
    ("keldmar_seabird_strip", "Larivox pallens", "", "", ""),
    ("keldmar_seabird_strip", "Aukelle minima", "", "", ""),
    ("keldmar_volunteer_checklist", "Procellix keldica", "", "", ""),
    ("keldmar_volunteer_checklist", "Larivox pallens", "", "", ""),
    ("keldmar_volunteer_checklist", "Aukelle minima", "", "", ""),
]

STUDY_TOML = """\
# The Keldmar Sea demo study (invented data; see the README's demo walkthrough).
[study]
name = "Keldmar Sea demo"
crs = "EPSG:6933"
cell_size_km = 25
domain = "domain.geojson"
strata = "strata.geojson"

[seasons]
winter = [12, 1, 2]
spring = [3, 4, 5]
summer = [6, 7, 8]
autumn = [9, 10, 11]

[[depth_layers]]
name = "surface"
top_m = 0
bottom_m = 10

[[depth_layers]]
name = "epipelagic"
top_m = 10
bottom_m = 200

[[depth_layers]]
name = "mesopelagic"
top_m = 200
bottom_m = 1000

[depth]
near_bottom_m = 10

[taxa]
list = "taxa.csv"
targets = "targets.csv"

[audit]
min_events = 3
coverage_drop = 0.5
min_encounters = 10

[confidentiality]
min_vessels = 3
"""


@dataclass(frozen=True)
class DemoInput:
    """One ingest of the demo: a profile and its input files (role -> path, study-relative)."""

    profile: str
    inputs: dict[str, str]
    description: str


def _polygon_feature(ring: list[tuple[float, float]], props: dict) -> dict:
    return {"type": "Feature", "properties": props,
            "geometry": {"type": "Polygon", "coordinates": [[list(p) for p in ring]]}}


def write_study(folder: Path) -> None:
    """Write study.toml, domain, strata and taxa files of the Keldmar Sea."""
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "profiles").mkdir(exist_ok=True)
    (folder / "data").mkdir(exist_ok=True)
    (folder / "study.toml").write_text(STUDY_TOML, encoding="utf-8")
    domain = {"type": "FeatureCollection", "features": [_polygon_feature(DOMAIN_RING, {"name": "Keldmar Sea"})]}
    (folder / "domain.geojson").write_text(json.dumps(domain), encoding="utf-8")
    strata = {"type": "FeatureCollection",
              "features": [_polygon_feature(r, {"stratum": n}) for n, r in STRATA.items()]}
    (folder / "strata.geojson").write_text(json.dumps(strata), encoding="utf-8")
    lines = ["taxon,group,aliases,sensitive,rank,parent,taxon_id,kingdom"] + [
        f"{t},{g},{a},{str(s).lower()},{r},{p},urn:keldmar:taxon:{i + 1},{'' if p else 'Animalia'}"
        for i, (t, g, a, s, r, p) in enumerate(TAXA)]
    (folder / "taxa.csv").write_text("\n".join(lines) + "\n", encoding="utf-8")
    lines = ["protocol,taxon,first_year,last_year,life_stage"] + [",".join(r) for r in TARGETS]
    (folder / "targets.csv").write_text("\n".join(lines) + "\n", encoding="utf-8")


def bottom_depth_m(lon: np.ndarray, lat: np.ndarray) -> np.ndarray:
    """Invented bathymetry: a shallow shelf in the north-west deepening to ~900 m in the south-east."""
    lon = np.asarray(lon, float)
    lat = np.asarray(lat, float)
    east = np.clip((lon + 156.0) / 8.0, 0, 1)
    south = np.clip((46.0 - lat) / 5.0, 0, 1)
    return 25.0 + 875.0 * (east * south) ** 1.6 + 15.0 * np.sin(lon * 3.1) * np.cos(lat * 2.3) + 15.0


def random_points_in_domain(rng: np.random.Generator, n: int, strata: tuple[str, ...] | None = None) -> tuple[np.ndarray, np.ndarray]:
    """n random (lon, lat) points inside the domain (or inside the named strata)."""
    import shapely

    rings = [STRATA[s] for s in strata] if strata else [DOMAIN_RING]
    geom = shapely.union_all([shapely.Polygon(r) for r in rings])
    shapely.prepare(geom)
    xmin, ymin, xmax, ymax = geom.bounds
    lons, lats = [], []
    while sum(len(x) for x in lons) < n:
        lo = rng.uniform(xmin, xmax, n * 2)
        la = rng.uniform(ymin, ymax, n * 2)
        keep = shapely.contains_xy(geom, lo, la)
        lons.append(lo[keep])
        lats.append(la[keep])
    return np.concatenate(lons)[:n], np.concatenate(lats)[:n]


def bottom_temperature_c(lon: np.ndarray, lat: np.ndarray, day_of_year: np.ndarray, year: np.ndarray) -> np.ndarray:
    """Invented 'true' sea-floor temperature (degC), shared by the trawl and model generators.

    The demo's ocean model reports this field minus MODEL_BOTTOM_OFFSET_C, so the audit can
    find the offset between the two sources.
    """
    depth = bottom_depth_m(lon, lat)
    seasonal = 1.5 * np.sin(2 * np.pi * (np.asarray(day_of_year, float) - 120) / 365.25)
    trend = 0.05 * (np.asarray(year, float) - 2018)
    return 9.0 - 4.0 * np.clip(depth / 900.0, 0, 1) + seasonal * np.exp(-depth / 200.0) + trend


def sea_surface_temperature_c(lon: np.ndarray, lat: np.ndarray, day_of_year: np.ndarray, year: np.ndarray) -> np.ndarray:
    """Invented sea-surface temperature (degC)."""
    seasonal = 4.0 * np.sin(2 * np.pi * (np.asarray(day_of_year, float) - 110) / 365.25)
    return 11.0 - 0.6 * (np.asarray(lat, float) - 43.5) + seasonal + 0.05 * (np.asarray(year, float) - 2018)


#: The demo ocean model's sea-floor temperature runs this much colder than the trawl sensors.
MODEL_BOTTOM_OFFSET_C = 0.8
