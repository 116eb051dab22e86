"""Provenance carried by every export: tool and contract versions, ingests, filters, suppression.

Where it goes depends on the format: parquet key-value metadata (key ``harmonize``), a
sidecar ``<file>-metadata.json`` beside a CSV file (named as the W3C "Model for Tabular Data
and Metadata on the Web", 2015, section 5.2 locates metadata for a CSV file), a table
``export_metadata`` in a GeoPackage, and the EML document of a Darwin Core Archive.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import duckdb
import pandas as pd

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


def kv_metadata_sql(meta: dict[str, Any]) -> str:
    """The ``KV_METADATA`` clause of a DuckDB parquet COPY carrying ``meta`` as JSON."""
    return f"KV_METADATA {{{PARQUET_KEY}: {sql_text(json.dumps(meta, default=str))}}}"


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
