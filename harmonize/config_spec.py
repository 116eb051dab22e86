"""Every table and key of study.toml and of the profiles: one definition, two uses.

The definition below is what ``load_study`` and ``load_profile`` check first (an unknown
section or key is a ``ConfigError`` naming the closest valid name), and what the JSON Schemas
shipped in ``harmonize/schemas/config/`` are generated from (``python -m harmonize.config_spec``
rewrites them; a test checks they are current). Editors with TOML schema support read the
``#:schema`` line that ``harmonize init`` writes at the top of each file.

This module is light: it imports neither pandas nor the adapters. What it knows of each source
kind (its name, its own profile sections, whether it reads [formats]) comes from the adapter
classes through the registry, loaded only when a profile is checked or a schema generated.
"""

from __future__ import annotations

import difflib
import json
import tomllib
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from harmonize.errors import ConfigError


def read_toml(path: Path) -> dict[str, Any]:
    """The tables of a study.toml or profile file; a ConfigError naming the file when it is not
    UTF-8 text or not valid TOML."""
    try:
        return tomllib.loads(Path(path).read_text(encoding="utf-8"))
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(path, None, f"is not valid TOML ({exc})") from None
    except UnicodeDecodeError:
        raise ConfigError(path, None, "is not UTF-8 text") from None


SCHEMA_DIALECT = "https://json-schema.org/draft/2020-12/schema"
SCHEMA_FOLDER = "config"  # inside the harmonize.schemas package
PROVIDER_TYPES = ("agency", "volunteer", "industry", "model", "remote_sensing")

#: How a provider writes a coordinate field ([formats] in a profile).
COORDINATE_FORMATS = ("decimal", "degrees_minutes", "degrees_minutes_seconds")
#: How a provider writes a fraction field such as split_fraction ([formats] in a profile).
FRACTION_FORMATS = ("decimal", "percent")


def kinds(**traits: object) -> tuple[str, ...]:
    """The registered source kinds (imports the adapters); ``traits`` filter by class attribute.

    ``kinds(reads_formats=True)``: kinds whose files are read by reading.coerce_fields, which
    applies [formats]; ``kinds(joins_date_time=True)``: kinds that take a date-time field from
    two columns ([date column, time column]).
    """
    from harmonize.adapters.registry import kinds as registered

    return registered(**traits)


def _adapter_class(kind: str) -> Any:
    from harmonize.adapters.registry import adapter_class

    return adapter_class(kind)


def is_coordinate(unit: str | None) -> bool:
    """A latitude or longitude field (its Table Schema unit)."""
    return unit in ("degree_north", "degree_east")


def is_fraction(type_: str, unit: str | None, maximum: float | None) -> bool:
    """A share of something (split_fraction): a number of unit 1, at most 1."""
    return type_ == "number" and unit == "1" and maximum == 1


@dataclass(frozen=True)
class FieldInfo:
    """What the schemas need to know of an adapter field."""

    name: str
    description: str = ""
    type: str = "string"
    unit: str | None = None
    maximum: float | None = None


# ----------------------------------------------------------------------------- the vocabulary
@dataclass(frozen=True)
class Value:
    """A leaf value: TOML string, number, integer, boolean, array or any."""

    type: str
    description: str = ""
    enum: tuple[Any, ...] | None = None
    items: str | None = None  # item type of an array
    minimum: float | None = None
    exclusive_minimum: float | None = None
    maximum: float | None = None
    default: Any = None
    any_of: tuple[Value | Table, ...] = ()

    def json_schema(self) -> dict[str, Any]:
        if self.any_of:
            out: dict[str, Any] = {"anyOf": [v.json_schema() for v in self.any_of]}
        elif self.type == "any":
            out = {}
        else:
            out = {"type": self.type}
        if self.items:
            out["items"] = {"type": self.items}
        for key, value in (("enum", list(self.enum) if self.enum else None), ("minimum", self.minimum),
                           ("exclusiveMinimum", self.exclusive_minimum), ("maximum", self.maximum),
                           ("default", self.default)):
            if value is not None:
                out[key] = value
        if self.description:
            out["description"] = self.description
        return out


@dataclass(frozen=True)
class Table:
    """A TOML table whose keys are all known (an unknown key is an error)."""

    keys: Mapping[str, Value | Table | Map | TableArray]
    description: str = ""
    required: tuple[str, ...] = ()

    def json_schema(self) -> dict[str, Any]:
        out: dict[str, Any] = {"type": "object",
                               "properties": {k: v.json_schema() for k, v in self.keys.items()},
                               "additionalProperties": False}
        if self.required:
            out["required"] = list(self.required)
        if self.description:
            out["description"] = self.description
        return out


@dataclass(frozen=True)
class Map:
    """A TOML table with keys the user chooses (season names, field names, gear codes)."""

    value: Value | Table
    description: str = ""
    key_description: str = ""

    def json_schema(self) -> dict[str, Any]:
        out: dict[str, Any] = {"type": "object", "additionalProperties": self.value.json_schema()}
        if self.description:
            out["description"] = self.description
        return out


@dataclass(frozen=True)
class TableArray:
    """An array of tables ([[name]])."""

    item: Table
    description: str = ""

    def json_schema(self) -> dict[str, Any]:
        out: dict[str, Any] = {"type": "array", "items": self.item.json_schema(), "minItems": 1}
        if self.description:
            out["description"] = self.description
        return out


def number(description: str, **kw: Any) -> Value:
    """A number key (adapters declare their profile sections with these)."""
    return Value("number", description, **kw)


def text(description: str, **kw: Any) -> Value:
    """A text key."""
    return Value("string", description, **kw)


_num, _text = number, text


# ----------------------------------------------------------------------------- study.toml
STUDY = Table({
    "study": Table({
        "name": _text("Name of the study."),
        "crs": _text("Projected equal-area CRS in metres for the grid cells, e.g. EPSG:6933."),
        "cell_size_km": _num("Side of a square grid cell (km).", exclusive_minimum=0),
        "domain": _text("GeoJSON polygon(s), lon/lat WGS84; records outside go to quarantine."),
        "strata": _text("Optional GeoJSON polygons, each with a property \"stratum\"."),
        "timezone": _text("IANA zone of the study calendar: seasons, season years and target year windows "
                          "are computed in it; stored times stay UTC.", default="UTC"),
    }, "Space: name, CRS, grid and domain; the study calendar's time zone.", required=("name", "crs", "cell_size_km", "domain")),
    "seasons": Map(Value("array", "Months (1..12) of the season; every month exactly once.", items="integer"),
                   "Season name = list of months; default: DJF, MAM, JJA, SON."),
    "depth_layers": TableArray(Table({
        "name": _text("Layer name (not near_bottom or integrated)."),
        "top_m": _num("Top of the layer, metres below the surface.", minimum=0),
        "bottom_m": _num("Bottom of the layer, metres below the surface.", exclusive_minimum=0),
    }, required=("name", "top_m", "bottom_m")), "Depth layers, contiguous from 0 m."),
    "depth": Table({
        "near_bottom_m": _num("A sample within this distance above the bottom is tagged near_bottom.",
                              exclusive_minimum=0, default=10),
    }, "Depth tagging."),
    "taxa": Table({
        "list": _text("CSV of taxa: taxon, group, aliases (|-separated), sensitive."),
        "targets": _text("CSV of zero-filling targets: protocol, taxon, first_year, last_year, life_stage."),
    }, "Taxa and zero-filling targets.", required=("list",)),
    "audit": Table({
        "min_events": _num("Fewer events in a cell of the audit -> thin_samples.", exclusive_minimum=0, default=5),
        "coverage_drop": _num("Coverage below this share of the median of earlier years -> coverage_drop.",
                              exclusive_minimum=0, default=0.5),
        "min_encounters": _num("Fewer non-zero records of a taxon in a season x layer -> few_encounters.",
                               exclusive_minimum=0, default=10),
        "tolerance": Map(_num("Tolerance in the variable's canonical unit.", exclusive_minimum=0),
                         "Per physical variable: how far two sources may disagree (source_disagreement)."),
    }, "Thresholds of the coverage audit."),
    "confidentiality": Table({
        "min_vessels": _num("Fishing-effort cells with fewer vessels are suppressed in outputs.",
                            exclusive_minimum=0, default=3),
        "generalise_deg": _num("Rounding (degrees) of the positions of events where a sensitive taxon was "
                               "recorded, in every output (Chapman 2020).", exclusive_minimum=0, maximum=1,
                               default=0.1),
    }, "Disclosure rules."),
}, "study.toml: one study, many sources.", required=("study", "depth_layers", "taxa"))


# ----------------------------------------------------------------------------- profiles
SOURCE = Table({
    "id": _text("Source id, unique in the study."),
    "kind": _text("Source kind (adapter)."),
    "provider_type": _text("Who provides the data.", enum=PROVIDER_TYPES),
    "protocol": _text("Key into targets.csv (zero-filling)."),
    "timezone": _text("IANA zone of times written without an offset.", default="UTC"),
    "encoding": _text("Text encoding of the files.", default="utf-8"),
    "delimiter": _text("Field delimiter (guessed when absent)."),
    "dayfirst": Value("boolean", "Dates such as 03/04/2021 are day first.", default=False),
    "time_format": _text("strftime format of the times (ISO 8601 when absent)."),
    "description": _text("Free text about the source."),
    "ambiguous_times": _text("A local time that happens twice at a clock change: which of the two instants "
                             "(absent: quarantined as ambiguous_local_time).", enum=("earlier", "later")),
}, "Who the provider is and how its files are written.", required=("id", "kind", "provider_type"))

#: A provider column name, or [date column, time column] for a date-time field.
COLUMN = Value("string", any_of=(
    _text("The provider's column name."),
    Value("array", "Date column and time column, joined with a space (date-time fields only).",
          items="string"),
))

_COMMON_SECTIONS = ("source", "columns", "units", "constants", "formats")

def profile_spec(kind: str, table_fields: Mapping[str, Sequence[FieldInfo]] | None = None) -> Table:
    """The profile definition of one kind.

    ``table_fields`` (role -> fields) names the adapter's fields; without it [columns], [units],
    [constants] and [formats] accept any field name (the loaders check them against the adapter).
    """
    adapter = _adapter_class(kind)
    fields: dict[str, FieldInfo] = {}
    for specs in (table_fields or {}).values():
        for info in specs:
            fields.setdefault(info.name, info)
    any_format = _text("How the provider writes the field.",
                       enum=tuple(dict.fromkeys(COORDINATE_FORMATS + FRACTION_FORMATS)))

    def column(info: FieldInfo) -> Value:
        if info.type == "datetime" and adapter.joins_date_time:
            return Value(COLUMN.type, info.description, any_of=COLUMN.any_of)
        return _text(info.description)

    def per_field(value: Value, description: str) -> Table | Map:
        if not fields:
            return Map(value, description)
        return Table({n: Value(value.type, f.description, enum=value.enum, items=value.items, any_of=value.any_of)
                      for n, f in sorted(fields.items())}, description)

    if table_fields and set(table_fields) != {"rows"}:
        columns: Table | Map = Table({
            role: Table({f.name: column(f) for f in specs}, f"The {role} table: adapter field = provider column.")
            for role, specs in table_fields.items()
        }, "Adapter field = provider column name, per table.")
    elif fields:
        columns = Table({n: column(f) for n, f in sorted(fields.items())}, "Adapter field = provider column name.")
    else:
        columns = Map(COLUMN, "Adapter field = provider column name.")
    source = Table({**SOURCE.keys, "kind": _text("Source kind (adapter).", enum=kinds())},
                   SOURCE.description, SOURCE.required)
    sections: dict[str, Value | Table | Map | TableArray] = {
        "source": source,
        "columns": columns,
        "units": per_field(_text("Provider unit of the field."), "Provider unit of a field, when not the default."),
        "constants": per_field(Value("any", "Value of the field for every row."),
                               "A field's value for every row, when the files lack it."),
    }
    # the loader (no fields given) lets [formats] through for every kind: profile.py then says
    # which kinds read it, a clearer message than "unknown section"
    if adapter.reads_formats or not fields:
        description = "How the provider writes a field: coordinates in degrees and minutes, fractions in percent."
        if fields:
            formats: Table | Map = Table({
                n: _text(f.description, enum=COORDINATE_FORMATS if is_coordinate(f.unit) else FRACTION_FORMATS)
                for n, f in sorted(fields.items())
                if is_coordinate(f.unit) or is_fraction(f.type, f.unit, f.maximum)}, description)
        else:
            formats = Map(any_format, description)
        sections["formats"] = formats
    sections.update(adapter.profile_sections)
    return Table(sections, f"A {kind} profile: how one provider's files map onto the {kind} adapter.",
                 required=("source",))


# ----------------------------------------------------------------------------- checking
def check_known(path: Path | str, raw: Mapping[str, Any], spec: Table, where: tuple[str, ...] = ()) -> None:
    """Raise ConfigError for the first unknown section or key of ``raw`` under ``spec``.

    The message names the file, the key, the closest valid name and the valid ones. Types and
    values are left to the loaders, which know what each key means.
    """
    _walk(path, raw, spec, where)


def _walk(path: Path | str, raw: Any, spec: Value | Table | Map | TableArray, where: tuple[str, ...]) -> None:
    if isinstance(spec, Table) and isinstance(raw, Mapping):
        for key, value in raw.items():
            if key not in spec.keys:
                _unknown(path, where, str(key), list(spec.keys), value)
            _walk(path, value, spec.keys[key], (*where, str(key)))
    elif isinstance(spec, Map) and isinstance(raw, Mapping):
        for key, value in raw.items():
            _walk(path, value, spec.value, (*where, str(key)))
    elif isinstance(spec, TableArray) and isinstance(raw, list):
        for i, item in enumerate(raw, start=1):
            _walk(path, item, spec.item, (*where[:-1], f"{where[-1]}[{i}]") if where else (f"[{i}]",))
    elif isinstance(spec, Value) and spec.any_of and isinstance(raw, Mapping):
        for option in spec.any_of:
            if isinstance(option, Table):
                _walk(path, raw, option, where)


def _unknown(path: Path | str, where: tuple[str, ...], key: str, valid: list[str], value: Any) -> None:
    is_section = isinstance(value, Mapping) or (isinstance(value, list) and value and isinstance(value[0], Mapping))
    dotted = ".".join((*where, key))
    what = f"unknown section [{dotted}]" if is_section else "unknown key"
    close = difflib.get_close_matches(key, valid, n=1, cutoff=0.5)
    hint = f"; did you mean '{close[0]}'?" if close else "."
    place = f"in [{'.'.join(where)}]" if where else "at the top level"
    raise ConfigError(path, dotted, f"{what}{hint} Valid names {place}: {', '.join(valid)}")


# ----------------------------------------------------------------------------- JSON Schema
def study_json_schema() -> dict[str, Any]:
    """JSON Schema of study.toml."""
    out = {"$schema": SCHEMA_DIALECT, "$id": "harmonize:study.schema.json", "title": "harmonize study.toml"}
    out.update(STUDY.json_schema())
    return out


def profile_json_schema(kind: str, table_fields: Mapping[str, Sequence[FieldInfo]] | None) -> dict[str, Any]:
    """JSON Schema of a profile of ``kind`` (the adapter's fields listed when given)."""
    out = {"$schema": SCHEMA_DIALECT, "$id": f"harmonize:profile-{kind}.schema.json",
           "title": f"harmonize {kind} profile"}
    out.update(profile_spec(kind, table_fields).json_schema())
    return out


def schema_file_name(kind: str | None) -> str:
    """File name of the schema of study.toml (kind None) or of a kind's profile."""
    return "study.schema.json" if kind is None else f"profile-{kind}.schema.json"


def adapter_fields(kind: str) -> dict[str, list[FieldInfo]]:
    """Role -> fields of the kind's adapter (imports the adapters)."""
    from harmonize.adapters.registry import get_adapter
    from harmonize.contract import fields

    adapter = get_adapter(kind)
    forms = getattr(adapter, "forms", None)
    tables = {"rows": list(forms.values())} if forms else {role: [schema] for role, schema in adapter.tables.items()}
    out: dict[str, list[FieldInfo]] = {}
    for role, schemas in tables.items():
        seen: dict[str, FieldInfo] = {}
        for schema in schemas:
            for spec in fields(schema):
                seen.setdefault(spec.name, FieldInfo(spec.name, spec.description, spec.type, spec.unit, spec.maximum))
        out[role] = list(seen.values())
    return out


def generated_schemas() -> dict[str, str]:
    """File name -> JSON text of every configuration schema (study.toml and each kind's profile)."""
    docs = {schema_file_name(None): study_json_schema()}
    for kind in kinds():
        docs[schema_file_name(kind)] = profile_json_schema(kind, adapter_fields(kind))
    return {name: json.dumps(doc, indent=1, ensure_ascii=False) + "\n" for name, doc in docs.items()}


def shipped_schema(name: str) -> str:
    """Text of a shipped configuration schema."""
    from importlib import resources

    return resources.files("harmonize.schemas").joinpath(SCHEMA_FOLDER, name).read_text(encoding="utf-8")


def _write_shipped() -> None:  # pragma: no cover - a maintainer's tool
    from importlib import resources

    folder = Path(str(resources.files("harmonize.schemas"))) / SCHEMA_FOLDER
    folder.mkdir(exist_ok=True)
    for name, text in generated_schemas().items():
        (folder / name).write_text(text, encoding="utf-8")
        print(folder / name)  # noqa: T201 - maintainer's tool, not the library


if __name__ == "__main__":  # pragma: no cover
    _write_shipped()
