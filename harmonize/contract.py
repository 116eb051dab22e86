"""Load the Table Schema files in harmonize.schemas and build validators from them.

The JSON files are the single source of the contract: the store's column types, the
adapters' field vocabularies and the pandera validators all come from them.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from functools import cache
from importlib import resources
from typing import Any

import pandas as pd
import pandera.pandas as pa

CONTRACT_VERSION = "1"


@dataclass(frozen=True)
class FieldSpec:
    """One field of a Table Schema, with the constraints harmonize uses."""

    name: str
    type: str
    description: str = ""
    required: bool = False
    minimum: float | None = None
    maximum: float | None = None
    exclusive_minimum: float | None = None
    exclusive_maximum: float | None = None
    enum: tuple[str, ...] | None = None
    unit: str | None = None
    dimension: str | None = None
    sql_type: str | None = None

    def range_text(self) -> str:
        """The allowed range in words, for messages."""
        if self.minimum is not None and self.maximum is not None:
            return f"{self.minimum:g} to {self.maximum:g}"
        parts = []
        if self.minimum is not None:
            parts.append(f">= {self.minimum:g}")
        if self.exclusive_minimum is not None:
            parts.append(f"> {self.exclusive_minimum:g}")
        if self.maximum is not None:
            parts.append(f"<= {self.maximum:g}")
        if self.exclusive_maximum is not None:
            parts.append(f"< {self.exclusive_maximum:g}")
        return " and ".join(parts)


@cache
def table_schema(name: str) -> dict[str, Any]:
    """The parsed Table Schema ``<name>.schema.json`` of harmonize.schemas.

    An outside adapter names its own schemas ``"package:name"``: the file
    ``<name>.schema.json`` shipped as data of that package.
    """
    package, _, stem = name.rpartition(":")
    package = package or "harmonize.schemas"
    path = resources.files(package).joinpath(f"{stem}.schema.json")
    if not path.is_file():
        raise KeyError(f"no Table Schema named '{stem}' in {package}")
    return json.loads(path.read_text(encoding="utf-8"))


@cache
def fields(name: str) -> tuple[FieldSpec, ...]:
    """The fields of a Table Schema as :class:`FieldSpec`."""
    out = []
    for fd in table_schema(name)["fields"]:
        c = fd.get("constraints", {})
        out.append(
            FieldSpec(
                name=fd["name"],
                type=fd["type"],
                description=fd.get("description", ""),
                required=bool(c.get("required", False)),
                minimum=c.get("minimum"),
                maximum=c.get("maximum"),
                exclusive_minimum=c.get("exclusiveMinimum"),
                exclusive_maximum=c.get("exclusiveMaximum"),
                enum=tuple(c["enum"]) if "enum" in c else None,
                unit=fd.get("unit"),
                dimension=fd.get("dimension"),
                sql_type=fd.get("sqlType"),
            )
        )
    return tuple(out)


def _checks(spec: FieldSpec) -> list[pa.Check]:
    checks = []
    if spec.minimum is not None:
        checks.append(pa.Check.ge(spec.minimum))
    if spec.maximum is not None:
        checks.append(pa.Check.le(spec.maximum))
    if spec.exclusive_minimum is not None:
        checks.append(pa.Check.gt(spec.exclusive_minimum))
    if spec.exclusive_maximum is not None:
        checks.append(pa.Check.lt(spec.exclusive_maximum))
    if spec.enum is not None:
        checks.append(pa.Check.isin(list(spec.enum)))
    return checks


_PANDERA_DTYPES = {
    "string": None,  # pandas 3 string dtypes vary; content is checked, not the dtype
    "number": "float64",
    "integer": None,
    "boolean": None,
    "datetime": None,
    "array": None,
    "list": None,
}


@cache
def pandera_schema(name: str, coerce_types: bool = False) -> pa.DataFrameSchema:
    """A pandera DataFrameSchema built from a Table Schema.

    Required fields are non-nullable; minimum/maximum/exclusive bounds and enum become
    built-in (vectorised) checks. Unknown extra columns are allowed.
    """
    columns = {
        spec.name: pa.Column(
            _PANDERA_DTYPES.get(spec.type) if coerce_types else None,
            checks=_checks(spec),
            nullable=not spec.required,
            required=spec.required,
            coerce=coerce_types and _PANDERA_DTYPES.get(spec.type) is not None,
        )
        for spec in fields(name)
    }
    return pa.DataFrameSchema(columns, name=name, strict=False)


@cache
def observation_columns() -> tuple[FieldSpec, ...]:
    return fields("observations")


def observation_sql_columns() -> list[tuple[str, str]]:
    """(column, DuckDB type) pairs of the observations table, in contract order."""
    return [(s.name, s.sql_type or "VARCHAR") for s in observation_columns()]


#: Columns the long table (export and ``observations()``) adds after the store's columns.
LONG_EXTRA_FIELDS: tuple[dict[str, Any], ...] = (
    {"name": "data_generalizations", "type": "string",
     "description": "What the disclosure rules changed on the row (coordinates rounded, cell withheld); "
                    "null where nothing was changed."},
    {"name": "log_effort", "type": "number", "unit": "1",
     "description": "ln(effort) of effort in effort_unit: the offset of a count or biomass model; null where "
                    "effort is null or not positive."},
)
#: Store column -> its name in the long table (``flags`` collides with ``pandas.DataFrame.flags``).
LONG_RENAMED: dict[str, str] = {"flags": "row_flags"}


def long_table_schema() -> dict[str, Any]:
    """The Table Schema of the long table as exported (CSV and parquet): the shipped
    ``observations`` schema with ``flags`` named ``row_flags``, plus :data:`LONG_EXTRA_FIELDS`.

    A Table Schema v2 document (list columns are ``list`` fields with delimiter ``|``, as the
    CSV writes them); frictionless validates a long CSV against it.
    """
    base = table_schema("observations")
    fields_ = [{**f, "name": LONG_RENAMED.get(f["name"], f["name"])} for f in base["fields"]]
    fields_ += [dict(f) for f in LONG_EXTRA_FIELDS]
    return {**{k: v for k, v in base.items() if k not in ("fields", "primaryKey", "name")},
            "name": "long", "fields": fields_, "primaryKey": list(base.get("primaryKey", []))}


def validate_observations(frame: pd.DataFrame) -> None:
    """Raise pandera.errors.SchemaErrors if ``frame`` breaks the observation contract."""
    pandera_schema("observations").validate(frame, lazy=True)
