"""Provenance carried by every export: tool and contract versions, ingests, filters, suppression.

Where it goes depends on the format: parquet key-value metadata (key ``harmonize``), a
sidecar ``<file>-metadata.json`` beside a CSV file (named as the W3C "Model for Tabular Data
and Metadata on the Web", 2015, section 5.2 locates metadata for a CSV file), a table
``export_metadata`` in a GeoPackage, and the EML document of a Darwin Core Archive.
"""

from __future__ import annotations

import base64
import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import duckdb
import pandas as pd
import pyarrow as pa

from harmonize import __version__
from harmonize.contract import CONTRACT_VERSION
from harmonize.disclosure import Disclosure
from harmonize.export.selection import ExportFilters, sql_text
from harmonize.files import public_name
from harmonize.study import Study

PARQUET_KEY = "harmonize"
CAUTION = (
    "harmonize prepares data; it does not assess stocks or populations. Official survey "
    "protocols and local rules on confidential data prevail over anything in this export."
)


@dataclass
class ExportResult:
    """What an export wrote.

    Attributes
    ----------
    format
        long, wide, grid, gpkg or dwca.
    path
        The main output file.
    rows
        Rows in the main table (events for wide, cells x periods for grid, layer and archive
        rows as described in ``metadata``).
    metadata
        The provenance written with the export.
    files
        Every file written (main file and sidecars).
    """

    format: str
    path: Path
    rows: int
    metadata: dict[str, Any]
    files: list[Path] = field(default_factory=list)

    @property
    def notes(self) -> list[str]:
        return list(self.metadata.get("notes", []))


def ingests_used(con: duckdb.DuckDBPyConnection, ingest_ids: list[str]) -> list[dict[str, Any]]:
    """The given ingests as records (id, source, kind, file, sha256, finished, tool version)."""
    frame = con.execute(
        """SELECT ingest_id, source_id, source_kind, file_name, file_sha256,
                  strftime(finished_at, '%Y-%m-%dT%H:%M:%SZ') AS finished_at, tool_version
           FROM ingests WHERE ingest_id = ANY(?::VARCHAR[])
           ORDER BY started_at, ingest_id""", [list(ingest_ids)]
    ).df()
    return [{k: (None if pd.isna(v) else v) for k, v in rec.items()} for rec in frame.to_dict("records")]


def provenance(con: duckdb.DuckDBPyConnection, study: Study, fmt: str, filters: ExportFilters,
               counts: dict[str, Any], options: dict[str, Any] | None = None,
               notes: list[str] | None = None) -> dict[str, Any]:
    """The metadata record of one export (a JSON-ready dict).

    ``counts`` comes from :func:`harmonize.export.selection.base_counts` (its ``ingest_ids``
    become the ``ingests`` records).
    """
    numbers = {k: v for k, v in counts.items() if k not in ("ingest_ids", "rules", "disclosure")}
    rules = counts.get("rules") or Disclosure.for_study(study)
    withheld = dict(counts.get("disclosure") or {})
    return {
        "generated_by": f"harmonize {__version__}",
        "tool_version": __version__,
        "contract_version": CONTRACT_VERSION,
        "generated_at": pd.Timestamp.now("UTC").strftime("%Y-%m-%dT%H:%M:%SZ"),
        "study": study.name,
        "format": fmt,
        "filters": filters.as_dict(),
        "options": dict(options or {}),
        "confidentiality": rules.metadata(withheld),
        "counts": numbers,
        "ingests": ingests_used(con, list(counts.get("ingest_ids", []))),
        "notes": [*rules.notes(withheld), *(notes or [])],
        "caution": CAUTION,
    }


#: Units (UDUNITS-2 spelling) of exported numeric columns whose unit is the same on every row.
FIXED_UNITS: dict[str, str] = {
    "lat": "degrees_north", "lon": "degrees_east", "track_start_lat": "degrees_north",
    "track_start_lon": "degrees_east", "track_end_lat": "degrees_north", "track_end_lon": "degrees_east",
    "depth_min_m": "m", "depth_max_m": "m", "bottom_depth_m": "m",
    "n_vessels": "1", "n_values": "1", "count_observed": "1", "subsample_fraction": "1",
    "log_effort": "1", "events": "1", "share_zero": "1", "suppressed_events": "1",
    "year": "1", "season_year": "1", "source_row": "1",
    "cell_lon": "degrees_east", "cell_lat": "degrees_north", "cell_x_m": "m", "cell_y_m": "m",
}
#: Exported numeric columns whose unit is given on each row by another column.
UNIT_COLUMNS: dict[str, str] = {
    "value": "unit", "effort": "effort_unit", "density": "density_unit",
    "total_value": "unit", "mean_value": "unit", "total_effort": "effort_unit", "mean_density": "density_unit",
}
_UNIT_NOTES = {
    "log_effort": "natural logarithm of effort in effort_unit",
    "year": "calendar year (an index, not a quantity)",
    "season_year": "season year (an index, not a quantity)",
    "source_row": "1-based data row of the input file (an index)",
}


def unit_field_metadata(schema: pa.Schema) -> pa.Schema:
    """``schema`` with the unit of every numeric column in its field metadata: ``unit`` (a
    UDUNITS-2 string) or ``unit_column`` (the column that holds each row's unit)."""
    fields = []
    for f in schema:
        meta: dict[str, str] = {}
        numeric = pa.types.is_integer(f.type) or pa.types.is_floating(f.type)
        if numeric and f.name in UNIT_COLUMNS and UNIT_COLUMNS[f.name] in schema.names:
            meta["unit_column"] = UNIT_COLUMNS[f.name]
        elif numeric and f.name in FIXED_UNITS:
            meta["unit"] = FIXED_UNITS[f.name]
        if f.name in _UNIT_NOTES and meta:
            meta["unit_note"] = _UNIT_NOTES[f.name]
        fields.append(f.with_metadata(meta) if meta else f)
    return pa.schema(fields)


def kv_metadata_sql(meta: dict[str, Any], con: duckdb.DuckDBPyConnection | None = None,
                    query: str | None = None) -> str:
    """The ``KV_METADATA`` clause of a DuckDB parquet COPY carrying ``meta`` as JSON.

    Given the connection and the query being copied, the clause also carries the Arrow
    schema of the result with each numeric column's unit in its field metadata
    (:func:`unit_field_metadata`), under the key ``ARROW:schema`` that Arrow readers use to
    restore a file's schema (Apache Arrow, Parquet format integration: the base64 IPC schema).
    """
    entries = {PARQUET_KEY: json.dumps(meta, default=str)}
    if con is not None and query is not None:
        schema = unit_field_metadata(con.sql(query).limit(0).to_arrow_table().schema)
        entries["ARROW:schema"] = base64.b64encode(schema.serialize().to_pybytes()).decode("ascii")
    body = ", ".join(f"{sql_text(k)}: {sql_text(v)}" for k, v in entries.items())
    return f"KV_METADATA {{{body}}}"


def sidecar_path(path: Path) -> Path:
    """``data.csv`` -> ``data.csv-metadata.json`` (the CSVW convention for a file's metadata)."""
    return path.with_name(path.name + "-metadata.json")


def write_sidecar(path: Path, meta: dict[str, Any], columns: list[tuple[str, str]] | None = None) -> Path:
    """Write the metadata of a CSV export beside it; returns the sidecar's path.

    The document is CSVW-shaped (``@context``, ``url``, ``tableSchema``) with the harmonize
    provenance under ``dc:provenance``, so CSVW tools and people can both read it.
    """
    doc: dict[str, Any] = {
        "@context": "http://www.w3.org/ns/csvw",
        "url": public_name(path),  # the name it has once the export is complete
        "dc:title": f"{meta.get('study', '')}: harmonize {meta.get('format', '')} export",
        "dc:provenance": meta,
    }
    if columns:
        doc["tableSchema"] = {"columns": [{"name": c, "datatype": _csvw_type(t)} for c, t in columns]}
    target = sidecar_path(path)
    target.write_text(json.dumps(doc, indent=2, default=str), encoding="utf-8")
    return target


def read_export_metadata(path: str | Path) -> dict[str, Any]:
    """The provenance of an export written by harmonize (parquet, CSV, GeoPackage or dwca zip)."""
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix == ".parquet":
        import pyarrow.parquet as pq

        raw = (pq.read_metadata(path).metadata or {}).get(PARQUET_KEY.encode())
        if raw is None:
            raise ValueError(f"{path} carries no harmonize metadata")
        return json.loads(raw)
    if suffix == ".gpkg":
        import pyogrio

        table = pyogrio.read_dataframe(path, layer="export_metadata")
        return json.loads(str(table.loc[table["key"] == "provenance", "value"].iloc[0]))
    if suffix == ".zip":
        from harmonize.export.dwca import read_provenance

        return read_provenance(path)
    doc = json.loads(sidecar_path(path).read_text(encoding="utf-8"))
    return doc["dc:provenance"]


def _csvw_type(sql_type: str) -> str:
    t = sql_type.upper()
    if t in ("DOUBLE", "FLOAT", "REAL") or t.startswith("DECIMAL"):
        return "double"
    if t in ("INTEGER", "BIGINT", "SMALLINT", "HUGEINT", "TINYINT"):
        return "integer"
    if t == "BOOLEAN":
        return "boolean"
    if t.startswith("TIMESTAMP"):
        return "datetime"
    if t == "DATE":
        return "date"
    return "string"
