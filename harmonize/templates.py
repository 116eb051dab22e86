"""Starter files for a new study folder (``harmonize init``)."""

from __future__ import annotations

import json
from pathlib import Path

from harmonize.errors import HarmonizeError

STUDY_TOML = '''\
# study.toml: one study, many sources. Paths are relative to this folder.
# Edit the values below; 'harmonize check' tells you when something is wrong.

[study]
name = "{name}"
crs = "EPSG:6933"             # equal-area CRS (metres) for the grid cells; EPSG:6933 is global
cell_size_km = 25             # side of a square grid cell
domain = "domain.geojson"     # polygon(s) in lon/lat (WGS84); records outside go to quarantine
# strata = "strata.geojson"   # optional polygons, each with a property "stratum"

[seasons]                     # every month 1..12 exactly once
winter = [12, 1, 2]           # a season holding December and January belongs to January's year
spring = [3, 4, 5]
summer = [6, 7, 8]
autumn = [9, 10, 11]

# Depth layers, contiguous from 0 m. A sample's range lies in a layer when it fits inside
# it; a range crossing layers is tagged "integrated".
[[depth_layers]]
name = "epipelagic"
top_m = 0
bottom_m = 200

[[depth_layers]]
name = "mesopelagic"
top_m = 200
bottom_m = 1000

[[depth_layers]]
name = "deep"
top_m = 1000
bottom_m = 11000

[depth]
near_bottom_m = 10            # samples within this distance above the bottom are "near_bottom"

[taxa]
list = "taxa.csv"             # taxon, group, aliases (|-separated), sensitive (true/false)
targets = "targets.csv"       # protocol, taxon, first_year, last_year: zero-filling rules

[audit]
min_events = 5                # fewer events in a cell of the audit -> thin_samples
coverage_drop = 0.5           # coverage below this share of earlier years' median -> coverage_drop
min_encounters = 10           # fewer non-zero records of a taxon -> few_encounters

[confidentiality]
min_vessels = 3               # fishing-effort cells with fewer vessels are suppressed in outputs
'''

TRAWL_PROFILE = '''\
# A profile maps one provider's files onto the trawl adapter's fields.
# Fields not listed under [columns.*] are looked for under their own names.

[source]
id = "my_trawl_survey"        # unique in the study
kind = "trawl"
provider_type = "agency"      # agency | volunteer | industry | model | remote_sensing
protocol = "standard_bottom_trawl"   # key into targets.csv: which taxa a haul always records
timezone = "UTC"              # zone of times written without an offset

[columns.events]              # hauls: adapter field = your column name
event_id = "haul_id"
start_time = "start_time"
end_time = "end_time"
start_lat = "start_lat"
start_lon = "start_lon"
end_lat = "end_lat"
end_lon = "end_lon"
net_width_m = "net_width_m"
bottom_depth_m = "bottom_depth_m"

[columns.records]             # catch rows
event_id = "haul_id"
taxon = "species"
weight = "weight_kg"
count = "number"

[units]                       # provider units, when not the defaults (km, m, h, kg, knots, degC)
# bottom_depth_m = "fathom"
# weight = "g"

[constants]                   # a value for every row when the files lack it
# net_width_m = 17.0
'''

TAXA_CSV = "taxon,group,aliases,sensitive\n"
TARGETS_CSV = "protocol,taxon,first_year,last_year\n"


def write_starter(folder: str | Path, name: str | None = None) -> list[Path]:
    """Write a commented study.toml, an example profile, empty taxa files and a domain.

    Refuses to overwrite an existing study.toml.
    """
    folder = Path(folder)
    if (folder / "study.toml").exists():
        raise HarmonizeError(f"{folder / 'study.toml'} already exists; init writes into a new folder")
    (folder / "profiles").mkdir(parents=True, exist_ok=True)
    written = {
        folder / "study.toml": STUDY_TOML.format(name=name or folder.resolve().name),
        folder / "profiles" / "example_trawl.toml": TRAWL_PROFILE,
        folder / "taxa.csv": TAXA_CSV,
        folder / "targets.csv": TARGETS_CSV,
        folder / "domain.geojson": json.dumps(_placeholder_domain(), indent=1),
    }
    for path, text in written.items():
        if not path.exists():
            path.write_text(text, encoding="utf-8")
    return list(written)


def _placeholder_domain() -> dict:
    # A whole-globe polygon: every valid position is inside until the user draws the real one.
    ring = [[-180, -90], [180, -90], [180, 90], [-180, 90], [-180, -90]]
    return {"type": "FeatureCollection", "features": [
        {"type": "Feature", "properties": {"name": "replace me with the study area"},
         "geometry": {"type": "Polygon", "coordinates": [ring]}}]}
