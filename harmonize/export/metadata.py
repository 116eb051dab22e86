"""Provenance carried by every export: tool and contract versions, ingests, filters, suppression.

Where it goes depends on the format: parquet key-value metadata (key ``harmonize``), a
sidecar ``<file>-metadata.json`` beside a CSV file (named as the W3C "Model for Tabular Data
and Metadata on the Web", 2015, section 5.2 locates metadata for a CSV file), a table
``export_metadata`` in a GeoPackage, and the EML document of a Darwin Core Archive.
"""

from __future__ import annotations

import base64
import json
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import duckdb
import pandas as pd
import pyarrow as pa

from harmonize import __version__
from harmonize.contract import CONTRACT_VERSION
from harmonize.disclosure import Disclosure
from harmonize.export.safe_csv import header_text
from harmonize.export.selection import ExportFilters
from harmonize.files import public_name
from harmonize.sql import sql_text
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
    "year": "1", "season_year": "1", "source_row": "1", "source_record_rows": "1",
    # columns of the GeoPackage layers
    "area_km2": "km2", "fishing_hours": "h", "n_rows": "1", "ix": "1", "iy": "1", "season_years": "1",
    "first_season_year": "1", "last_season_year": "1",
    "cell_lon": "degrees_east", "cell_lat": "degrees_north", "cell_x_m": "m", "cell_y_m": "m",
    "cell_periods": "1",
}
#: Prefixes of exported count columns named after a source kind (``events_trawl``): unit "1".
_COUNT_PREFIXES = ("events_",)
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
    "source_record_rows": "1-based data rows of the records file (indices)",
    "ix": "grid column index in the study CRS (an index, not a quantity)",
    "iy": "grid row index in the study CRS (an index, not a quantity)",
    "first_season_year": "season year (an index, not a quantity)",
    "last_season_year": "season year (an index, not a quantity)",
}


def column_unit(name: str, numeric: bool, names: Sequence[str],
                extra: Mapping[str, str] | None = None) -> dict[str, str]:
    """The unit entry of one exported column: ``{"unit": UDUNITS text}``, ``{"unit_column":
    column}`` (the column that holds each row's unit) or ``{}`` (not numeric, no unit); with
    ``unit_note`` for columns that are indices rather than quantities.

    ``extra`` gives units of columns the export names itself (the wide table's taxon columns).
    """
    meta: dict[str, str] = {}
    if extra and name in extra:
        meta["unit"] = extra[name]
    elif numeric and name in UNIT_COLUMNS and UNIT_COLUMNS[name] in names:
        meta["unit_column"] = UNIT_COLUMNS[name]
    elif numeric and name in FIXED_UNITS:
        meta["unit"] = FIXED_UNITS[name]
    elif numeric and name.startswith(_COUNT_PREFIXES):
        meta["unit"] = "1"
    if name in _UNIT_NOTES and meta:
        meta["unit_note"] = _UNIT_NOTES[name]
    return meta


def _is_numeric(t: pa.DataType) -> bool:
    # a list of numbers (source_record_rows) has the unit of its items
    if pa.types.is_list(t) or pa.types.is_large_list(t):
        return _is_numeric(t.value_type)
    return pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_decimal(t)


def unit_field_metadata(schema: pa.Schema, extra: Mapping[str, str] | None = None) -> pa.Schema:
    """``schema`` with the unit of every numeric column in its field metadata: ``unit`` (a
    UDUNITS-2 string) or ``unit_column`` (the column that holds each row's unit)."""
    fields = []
    for f in schema:
        meta = column_unit(f.name, _is_numeric(f.type), schema.names, extra)
        fields.append(f.with_metadata({**(f.metadata or {}), **{k.encode(): v.encode() for k, v in meta.items()}})
                      if meta else f)
    return pa.schema(fields, metadata=schema.metadata)


def describe_columns(schema: pa.Schema, extra: Mapping[str, str] | None = None) -> list[dict[str, str]]:
    """Every column of an export with its type and unit, for the provenance record
    (``columns``): ``name``, ``type`` (Arrow), and ``unit`` or ``unit_column`` for numbers."""
    return [{"name": f.name, "type": str(f.type), **column_unit(f.name, _is_numeric(f.type), schema.names, extra)}
            for f in schema]


def query_schema(con: duckdb.DuckDBPyConnection, query: str) -> pa.Schema:
    """The Arrow schema of a query's result (no rows are read)."""
    return con.sql(query).limit(0).to_arrow_table().schema


def describe_gpkg_columns(path: Path) -> int:
    """Write the unit of every numeric column of every layer of the GeoPackage ``path`` into
    its ``gpkg_data_columns`` table (``description``: "unit: km2", or the column holding each
    row's unit), the GeoPackage Schema extension (OGC 12-128r18, GeoPackage Encoding Standard
    1.3.1, Annex F.9 "Schema": tables gpkg_data_columns and gpkg_data_column_constraints,
    registered in gpkg_extensions as gpkg_schema). Returns the number of columns described.
    """
    import sqlite3

    numeric_type = re.compile(r"^((TINY|SMALL|MEDIUM|BIG)?INT(EGER)?|REAL|FLOAT|DOUBLE|NUMERIC)\b")
    con = sqlite3.connect(path)
    try:
        with con:
            con.execute("""CREATE TABLE IF NOT EXISTS gpkg_data_columns (
                table_name TEXT NOT NULL, column_name TEXT NOT NULL, name TEXT, title TEXT,
                description TEXT, mime_type TEXT, constraint_name TEXT,
                CONSTRAINT pk_gdc PRIMARY KEY (table_name, column_name),
                CONSTRAINT gdc_tn UNIQUE (table_name, name))""")
            con.execute("""CREATE TABLE IF NOT EXISTS gpkg_data_column_constraints (
                constraint_name TEXT NOT NULL, constraint_type TEXT NOT NULL, value TEXT, min NUMERIC,
                min_is_inclusive BOOLEAN, max NUMERIC, max_is_inclusive BOOLEAN, description TEXT,
                CONSTRAINT gdcc_ntv UNIQUE (constraint_name, constraint_type, value))""")
            for table in ("gpkg_data_columns", "gpkg_data_column_constraints"):
                if not con.execute("SELECT 1 FROM gpkg_extensions WHERE table_name = ? AND extension_name = "
                                   "'gpkg_schema'", [table]).fetchall():
                    con.execute("INSERT INTO gpkg_extensions VALUES (?, NULL, 'gpkg_schema', "
                                "'http://www.geopackage.org/spec/#extension_schema', 'read-write')", [table])
            n = 0
            layers = [r[0] for r in con.execute(
                "SELECT table_name FROM gpkg_contents WHERE data_type IN ('features', 'attributes')")]
            for layer in layers:
                info = con.execute(f'PRAGMA table_info("{layer.replace(chr(34), chr(34) * 2)}")').fetchall()
                names = [r[1] for r in info]
                for _, column, sql_type, *_rest in info:
                    if column == "fid":
                        continue
                    unit = column_unit(column, bool(numeric_type.match(str(sql_type).upper())), names)
                    if not unit:
                        continue
                    text = (f"unit: {unit['unit']}" if "unit" in unit
                            else f"in the unit named on each row by column {unit['unit_column']}")
                    if "unit_note" in unit:
                        text += f"; {unit['unit_note']}"
                    con.execute("INSERT OR REPLACE INTO gpkg_data_columns (table_name, column_name, name, "
                                "description) VALUES (?, ?, ?, ?)", [layer, column, column, text])
                    n += 1
    finally:
        con.close()
    return n


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
        schema = unit_field_metadata(query_schema(con, query))
        entries["ARROW:schema"] = base64.b64encode(schema.serialize().to_pybytes()).decode("ascii")
    body = ", ".join(f"{sql_text(k)}: {sql_text(v)}" for k, v in entries.items())
    return f"KV_METADATA {{{body}}}"


def sidecar_path(path: Path) -> Path:
    """``data.csv`` -> ``data.csv-metadata.json`` (the CSVW convention for a file's metadata)."""
    return path.with_name(path.name + "-metadata.json")


def csvw_name(title: str) -> str:
    """A CSVW column ``name`` for a header text: every character but ASCII letters, digits and
    ``_`` percent-encoded as UTF-8 (``Ostravix keldensis (per km2)`` ->
    ``Ostravix%20keldensis%20%28per%20km2%29``), and a leading ``_`` too (names starting with
    ``_`` are reserved). This is the default name CSVW derives from a title (W3C, Metadata
    Vocabulary for Tabular Data, 2015, section 5.6, ``name``: the URI-template variable form,
    RFC 6570 ``varname``); ``urllib.parse.unquote`` gives the title back.
    """
    out = []
    for i, ch in enumerate(title):
        if (ch.isascii() and (ch.isalnum() or ch == "_")) and not (i == 0 and ch == "_"):
            out.append(ch)
        else:
            out.append("".join(f"%{b:02X}" for b in ch.encode("utf-8")))
    return "".join(out) or "_"


def write_sidecar(path: Path, meta: dict[str, Any], columns: list[tuple[str, str]] | None = None,
                  units: Mapping[str, str] | None = None) -> Path:
    """Write the metadata of a CSV export beside it; returns the sidecar's path.

    The document is CSVW metadata (W3C, Metadata Vocabulary for Tabular Data, 2015): ``url``,
    and a ``tableSchema`` whose columns have a valid ``name`` (:func:`csvw_name`), the header
    text as ``titles``, the ``datatype``, ``separator`` ``|`` for list columns (CSV has no
    lists), and the unit of every numeric column as ``schema:unitText`` (a fixed unit) or in
    ``dc:description`` (the column that holds each row's unit). The harmonize provenance is
    under ``dc:provenance``. ``units`` gives units of columns the export names itself.
    """
    doc: dict[str, Any] = {
        "@context": "http://www.w3.org/ns/csvw",
        "url": public_name(path),  # the name it has once the export is complete
        "dc:title": f"{meta.get('study', '')}: harmonize {meta.get('format', '')} export",
        "dc:provenance": meta,
    }
    if columns:
        names = [c for c, _ in columns]
        cols = []
        for name, sql_type in columns:
            is_list = sql_type.upper().endswith("[]")
            datatype = _csvw_type(sql_type[:-2] if is_list else sql_type)
            col: dict[str, Any] = {"name": csvw_name(name), "titles": header_text(name), "datatype": datatype}
            if is_list:
                col["separator"] = "|"
            unit = column_unit(name, datatype in ("double", "integer"), names, units)
            if "unit" in unit:
                col["schema:unitText"] = unit["unit"]
            if "unit_column" in unit:
                col["dc:description"] = f"in the unit named on each row by column {unit['unit_column']}"
            if "unit_note" in unit:
                col["dc:description"] = unit["unit_note"]
            cols.append(col)
        doc["tableSchema"] = {"columns": cols}
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
