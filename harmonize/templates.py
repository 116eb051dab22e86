"""Starter files for a new study folder (``harmonize init``)."""

from __future__ import annotations

import json
from pathlib import Path

from harmonize.config_spec import (
    FORMATS_KINDS,
    JOINED_KINDS,
    KINDS,
    is_coordinate,
    is_fraction,
    schema_file_name,
    shipped_schema,
)
from harmonize.errors import HarmonizeError

#: Folder of a study that holds the JSON Schemas of its configuration files (for editors).
SCHEMA_DIR = "schemas"

STUDY_TOML = '''\
#:schema ./schemas/study.schema.json
# study.toml: one study, many sources. Paths are relative to this folder.
# Edit the values below; 'harmonize check' tells you when something is wrong.

[study]
name = "{name}"
crs = "EPSG:6933"             # equal-area CRS (metres) for the grid cells; EPSG:6933 is global
cell_size_km = 25             # side of a square grid cell
domain = "domain.geojson"     # polygon(s) in lon/lat (WGS84); records outside go to quarantine
# strata = "strata.geojson"   # optional polygons, each with a property "stratum"
# timezone = "UTC"            # IANA zone of the study calendar: seasons, season years and
                              # targets.csv year windows follow the local date there

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
list = "taxa.csv"             # taxon, group, aliases (|-separated), sensitive (true/false);
                              # optional rank, parent (a taxon of the file), taxon_id, kingdom
targets = "targets.csv"       # protocol, taxon, first_year, last_year: zero-filling rules

[audit]
min_events = 5                # fewer events in a cell of the audit -> thin_samples
coverage_drop = 0.5           # coverage below this share of earlier years' median -> coverage_drop
min_encounters = 10           # a taxon below this many encounters in every kind x season x layer
                              # is too sparse to model alone -> few_encounters

[confidentiality]
min_vessels = 3               # fishing rows (cell x period x gear) of fewer vessels are withheld from outputs
generalise_deg = 0.1          # rounding (degrees) of events where a sensitive taxon was recorded
'''

TRAWL_PROFILE = '''\
#:schema ../schemas/profile-trawl.schema.json
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

[formats]                     # how your files write a field, when not as decimal numbers
# start_lat = "degrees_minutes"          # 41°50.159'N, 41 50.159 N, -41 50.159
# start_lon = "degrees_minutes_seconds"  # 153°02'30"W, 153 02 30 W
# date and time in two columns: in [columns.events] write start_time = ["DATE", "TIME"]
'''

_PROVIDER = {"trawl": "agency", "plankton": "agency", "transect": "agency", "opportunistic": "volunteer",
             "gridded": "remote_sensing", "effort": "industry"}
_PROTOCOL = {"trawl": "standard_bottom_trawl", "plankton": "standard_plankton_net",
             "transect": "standard_seabird_strip", "opportunistic": "complete_checklist"}
# Kind-specific sections with their defaults (see docs/sources/<kind>.md).
_EXTRA = {
    "plankton": """\
[tow]
# max_speed_m_s = 3.0         # faster distance through the water -> implausible_speed
[clogging]
# status_values = ["clogged"] # net_status notes that mean a clogged net
# min_efficiency = 0.7        # net flowmeter distance / reference flowmeter distance
""",
    "transect": """\
[strip]
# flying = "snapshot"         # or "continuous": flying birds then get no density
# max_speed_kn = 30           # faster segments -> implausible_speed
""",
    "opportunistic": """\
[presence]
# tokens = ["present"]        # words in the count column meaning "present, not counted"

[duplicates]                  # a record this close to another source's record is a twin
# distance_km = 2.0
# minutes = 60
""",
    "gridded": """\
[variables]                   # file variable = CF standard name
# analysed_sst = "sea_surface_temperature"
# chlor_a = "mass_concentration_of_chlorophyll_a_in_sea_water"

[aggregate]
# period = "month"            # month | season
# layer = "surface"           # surface | near_bottom | by_layer
""",
    "effort": """\
[fishing]
# form = "pings"              # pings | logbook (guessed from the columns when absent)
# speed_min_kn = 2.0          # fishing speed window for bottom trawl (common practice)
# speed_max_kn = 5.0
# max_gap_h = 2.0             # a ping gets half of each neighbouring interval, capped
# pelagic_layer = "epipelagic"
""",
}


def profile_template(kind: str) -> str:
    """A commented profile for ``kind``, listing every adapter field from its Table Schema."""
    from harmonize.adapters.registry import get_adapter
    from harmonize.contract import fields

    adapter = get_adapter(kind)
    article = "an" if kind[0] in "aeiou" else "a"
    lines = [
        schema_line(kind),
        f"# Example profile for {article} {kind} source: {adapter.description}",
        "# Map your column names onto the adapter's fields; a field you do not map is looked for",
        "# under its own name. Uncomment what you need. Details: docs/sources/" + kind + ".md",
        "",
        "[source]",
        f'id = "my_{kind}_source"       # unique in the study',
        f'kind = "{kind}"',
        f'provider_type = "{_PROVIDER[kind]}"   # agency | volunteer | industry | model | remote_sensing',
    ]
    if kind in _PROTOCOL:
        lines.append(f'protocol = "{_PROTOCOL[kind]}"   # key into targets.csv (zero-filling)')
    lines += ['timezone = "UTC"              # zone of times written without an offset',
              '# ambiguous_times = "earlier"   # a local time that happens twice (clocks going back):',
              '                              # "earlier" or "later" instant; unset: quarantined', ""]
    units = []
    # An adapter with several file forms (effort: pings or logbook) lists each form's fields.
    forms = getattr(adapter, "forms", None)
    tables = [("rows", schema, form) for form, schema in forms.items()] if forms else [
        (role, schema, None) for role, schema in adapter.tables.items()]
    seen: set[str] = set()
    for i, (role, schema, form) in enumerate(tables):
        header = "[columns]" if role == "rows" else f"[columns.{role}]"
        if i == 0 or not form:
            lines.append(header + "               # adapter field = your column name")
        if form:
            lines.append(f"# --- {form} files ---")
        for spec in fields(schema):
            if spec.name in seen and form:
                continue
            seen.add(spec.name)
            need = "required" if spec.required else "optional"
            unit = f", {spec.unit}" if spec.unit and spec.unit not in ("1",) else ""
            lines.append(f'# {spec.name} = "..."'.ljust(34) + f"# {need}{unit}: {spec.description}")
            if spec.dimension:
                article = "an" if spec.dimension[0] in "aeiou" else "a"
                units.append(f'# {spec.name} = "{spec.unit}"'.ljust(34) + f"# {article} {spec.dimension} unit")
        lines.append("")
    if units:
        lines += ["[units]                       # your units, when not the default shown"] + units + [""]
    lines += ["[constants]                   # a value for every row when the files lack it", "# field = value", ""]
    lines += _formats_lines(kind, tables)
    if kind in _EXTRA:
        lines.append(_EXTRA[kind])
    return "\n".join(lines).rstrip() + "\n"


def _formats_lines(kind: str, tables: list) -> list[str]:
    """The [formats] section of a template: the kind's coordinate and fraction fields."""
    from harmonize.contract import fields

    if kind not in FORMATS_KINDS:
        return []
    lines = ["[formats]                     # how your files write a field, when not as decimal numbers"]
    times = []
    for role, schema, _form in tables:
        for spec in fields(schema):
            if is_coordinate(spec.unit):
                dm, dms = (("41°50.159'N", "41°50'09\"N") if spec.unit == "degree_north"
                           else ("153°02.5'W", "153°02'30\"W"))
                lines.append(f'# {spec.name} = "degrees_minutes"'.ljust(42)
                             + f"# {dm}; or degrees_minutes_seconds ({dms})")
            elif is_fraction(spec.type, spec.unit, spec.maximum):
                lines.append(f'# {spec.name} = "percent"'.ljust(42)
                             + "# 25 means 25 %; 1/4, 25% and 0.25 are always read")
            elif spec.type == "datetime" and kind in JOINED_KINDS:
                times.append((role, spec.name))
    if times:
        role, name = times[0]
        table = "[columns]" if role == "rows" else f"[columns.{role}]"
        lines.append(f'# date and time in two columns: in {table} write {name} = ["DATE", "TIME"]')
    return lines + [""]


def schema_line(kind: str | None) -> str:
    """The first line of a study.toml (kind None) or profile: where editors find its JSON Schema."""
    prefix = "./" if kind is None else "../"
    return f"#:schema {prefix}{SCHEMA_DIR}/{schema_file_name(kind)}"


TAXA_CSV = "taxon,group,aliases,sensitive,rank,parent,taxon_id,kingdom\n"
TARGETS_CSV = "protocol,taxon,first_year,last_year,life_stage\n"


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
    for kind in ("plankton", "transect", "opportunistic", "gridded", "effort"):
        written[folder / "profiles" / f"example_{kind}.toml"] = profile_template(kind)
    # the JSON Schemas the #:schema lines point to: editors validate while the user types
    (folder / SCHEMA_DIR).mkdir(exist_ok=True)
    for kind in (None, *KINDS):
        name = schema_file_name(kind)
        written[folder / SCHEMA_DIR / name] = shipped_schema(name)
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
