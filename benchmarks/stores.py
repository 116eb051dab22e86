"""Synthetic stores of N observation rows, and the audit and wide-export measurements over them.

The observation rows are generated in DuckDB SQL (bounded memory, any N), written as the
store's hive-partitioned zstd parquet into a staging folder and registered through
``harmonize.store.Store.commit`` with hand-made ``IngestRecord`` rows, one ingest per
source kind, so the store is a real one: the ``observations`` view, the manifest and the
audit and exports see it as they would see ingested data.

Shape (invented, Keldmar Sea): 10 rows per event; events spread over 34 season years
(1990-2023), four seasons, the study's domain cells and strata. Trawl events (two agency
sources) hold five taxa x (count, biomass) with a third of them zero-filled, plus a bottom
temperature, so source comparisons have pairs; plankton and transect events hold counts;
effort events hold fishing hours with 1-8 vessels (some confidential).
"""

from __future__ import annotations

import shutil
import time
from pathlib import Path
from typing import Any

import duckdb
import pandas as pd

from harmonize.contract import observation_sql_columns
from harmonize.demo.sea import write_study

ROWS_PER_EVENT = 10
_BLOCK_ROWS = 10_000_000
KINDS = ("trawl", "plankton", "transect", "effort")
TAXA = ("Ostravix keldensis", "Lumbrena pallida", "Syrranthus minor", "Pelagon argentea", "Calverion rubrum")


def _select_sql(kind: str, n_rows: int, cells: list[str], ingest_id: str, first_row: int = 0) -> str:
    """SELECT of ``n_rows`` synthetic observation rows of one source kind (contract columns)."""
    k = KINDS.index(kind)
    cells_sql = "[" + ", ".join(f"'{c}'" for c in cells) + "]"
    taxa_sql = "[" + ", ".join(f"'{t}'" for t in TAXA) + "]"
    strata_sql = "['Ellery Shelf', 'Vossa Bank', 'Thorne Deep', NULL]"
    if kind == "trawl":
        variable = (f"CASE WHEN j = 9 THEN 'sea_water_temperature_at_sea_floor' "
                    f"ELSE ({taxa_sql})[1 + j % 5] END")
        vkind = "CASE WHEN j = 9 THEN 'physical' ELSE 'taxon' END"
        quantity = "CASE WHEN j = 9 THEN 'measurement' WHEN j < 5 THEN 'count' ELSE 'biomass' END"
        unit = "CASE WHEN j = 9 THEN 'degC' WHEN j < 5 THEN '1' ELSE 'kg' END"
        value = ("CASE WHEN j = 9 THEN 4 + (h2 % 800) / 100.0 WHEN zero THEN 0.0 "
                 "ELSE (h2 % 100000) / 100.0 END")
        effort, effort_unit, layer = "0.05 + (h1 % 50) / 1000.0", "'km2'", "'near_bottom'"
        source = "'shelf_trawl_' || (e % 2)"
    elif kind == "effort":
        variable, vkind, quantity, unit = "'fishing_hours'", "'effort'", "'measurement'", "'h'"
        value = "(h2 % 5000) / 10.0"
        effort, effort_unit, layer = "(h2 % 5000) / 10.0", "'h'", "'near_bottom'"
        source = "'fleet_pings'"
    else:
        variable = f"({taxa_sql})[1 + j % 5]"
        vkind, quantity, unit = "'taxon'", "'count'", "'1'"
        value = "CASE WHEN zero THEN 0.0 ELSE (h2 % 500)::DOUBLE END"
        effort = "10 + (h1 % 300)" if kind == "plankton" else "0.5 + (h1 % 100) / 100.0"
        effort_unit = "'m3'" if kind == "plankton" else "'km2'"
        layer = "'epipelagic'" if kind == "plankton" else "'surface'"
        source = f"'{kind}_survey'"
    exprs = {
        "record_id": "substr(md5(r::VARCHAR || '" + kind + "'), 1, 24)",
        "ingest_id": f"'{ingest_id}'",
        "source_id": source,
        "source_kind": f"'{kind}'",
        "provider_type": "'industry'" if kind == "effort" else "'agency'",
        "protocol": "'keldmar_bottom_trawl'" if kind == "trawl" else "NULL",
        "event_id": f"'{kind[0]}' || e",
        "event_start": "start",
        "event_end": "start + INTERVAL 30 MINUTE",
        "year": "year(start)",
        "season_year": "year(start) + CASE WHEN month(start) = 12 THEN 1 ELSE 0 END",
        "season": "(['winter','winter','spring','spring','spring','summer','summer','summer',"
                  "'autumn','autumn','autumn','winter'])[month(start)]",
        "depth_layer": layer,
        "lat": "41.5 + (h1 % 4000) / 1000.0",
        "lon": "-155.5 + (h1 % 7000) / 1000.0",
        "cell_id": f"({cells_sql})[1 + h1 % {len(cells)}]",
        "stratum": f"({strata_sql})[1 + h1 % 4]",
        "depth_min_m": "(h1 % 400)::DOUBLE", "depth_max_m": "(h1 % 400)::DOUBLE",
        "bottom_depth_m": "(h1 % 400)::DOUBLE",
        "variable": variable, "variable_kind": vkind, "life_stage": "NULL", "quantity": quantity,
        "value": value, "unit": unit,
        "effort": f"CASE WHEN {quantity} IN ('count', 'biomass') OR {vkind} = 'effort' THEN {effort} END",
        "effort_unit": f"CASE WHEN {quantity} IN ('count', 'biomass') OR {vkind} = 'effort' THEN {effort_unit} END",
        "density": f"CASE WHEN {quantity} IN ('count', 'biomass') THEN ({value}) / ({effort}) END",
        "zero_filled": f"(zero AND {vkind} = 'taxon')",
        "n_vessels": "CASE WHEN " + vkind + " = 'effort' THEN 1 + (h1 % 8) END",
        "n_values": "1", "observer_id": "NULL", "flags": "[]::VARCHAR[]",
        "source_file": f"'{kind}_synthetic.csv'", "source_row": "e + 1",
        "source_record_rows": "[]::BIGINT[]", "behavior": "NULL",
        "gear": "CASE WHEN " + vkind + " = 'effort' THEN 'OTB' END",
    }
    select = ", ".join(f'CAST({exprs[c]} AS {t}) AS "{c}"' for c, t in observation_sql_columns())
    return f"""
        SELECT {select} FROM (
            SELECT r, e, j, h1, h2, (h2 % 3 = 0) AS zero,
                   TIMESTAMP '1990-01-01' + to_days(CAST(h1 % 12410 AS INTEGER))
                       + to_minutes(CAST(h2 % 1440 AS INTEGER)) AS start
            FROM (SELECT r, r // {ROWS_PER_EVENT} AS e, r % {ROWS_PER_EVENT} AS j,
                         CAST(hash(r // {ROWS_PER_EVENT}, {k}) >> 2 AS BIGINT) AS h1,
                         CAST(hash(r, {k} + 7) >> 2 AS BIGINT) AS h2
                  FROM range({first_row}, {first_row + n_rows}) t(r)))"""


def make_store(folder: Path, n_rows: int) -> dict[str, Any]:
    """A study at ``folder`` whose store holds ``n_rows`` synthetic observation rows."""
    from harmonize import load_study
    from harmonize.audit.run import domain_cells
    from harmonize.store import IngestRecord, Store

    write_study(folder)
    study = load_study(folder)
    cells = domain_cells(study)["cell_id"].tolist()
    store = Store(study.store_dir)
    per_kind = n_rows // len(KINDS)
    for i, kind in enumerate(KINDS):
        n = per_kind if i < len(KINDS) - 1 else n_rows - per_kind * (len(KINDS) - 1)
        ingest_id = f"20260101T00000{i}-synth{i:03d}"
        staged = store.staging_dir(ingest_id)
        con = duckdb.connect()
        try:
            con.execute("SET preserve_insertion_order = false")
            con.execute("SET memory_limit = '3GB'")
            # blocks of rows: a partitioned COPY holds every open partition's buffers
            for r0 in range(0, n, _BLOCK_ROWS):
                block = _select_sql(kind, min(_BLOCK_ROWS, n - r0), cells, ingest_id, r0)
                con.execute(f"""COPY ({block}) TO '{staged / "parts"}'
                                (FORMAT parquet, PARTITION_BY (source_kind, season_year), COMPRESSION zstd,
                                 ROW_GROUP_SIZE 500000, FILENAME_PATTERN 'part-{{uuid}}', OVERWRITE_OR_IGNORE)""")
        finally:
            con.close()
        now = pd.Timestamp.now("UTC").tz_localize(None)
        events = n // ROWS_PER_EVENT
        record = IngestRecord(
            ingest_id=ingest_id, source_id=f"synthetic_{kind}", source_kind=kind,
            provider_type="industry" if kind == "effort" else "agency", file_name=f"{kind}_synthetic.csv",
            file_sha256="0" * 64, inputs_sha256=f"{i}" * 64, config_sha256="0" * 64, started_at=now,
            finished_at=now, rows_read=events, rows_accepted=events, rows_quarantined=0,
            records_written=n, records_zero_filled=0, profile_file="synthetic.toml")
        files = [{"role": "rows", "file_name": record.file_name, "file_sha256": record.file_sha256,
                  "rows_read": events, "rows_accepted": events, "rows_quarantined": 0}]
        store.commit(record, files, staged, pd.DataFrame(), [], lambda previous: [])
        store.discard(staged)  # releases the staging folder's lock
    size = sum(p.stat().st_size for p in (study.store_dir / "observations").rglob("*.parquet"))
    return {"rows": n_rows, "parquet_mb": size / 2**20}


def _observation_glob(folder: Path) -> str:
    return str(folder / "store" / "observations" / "**" / "*.parquet")


def run_audit(folder: Path, engine: str = "duckdb") -> dict[str, Any]:
    """The coverage audit of the store (the library call the CLI makes)."""
    from harmonize import load_study
    from harmonize.audit.run import audit

    kwargs = {"engine": engine} if engine != "duckdb" else {}
    start = time.perf_counter()
    result = audit(load_study(folder), **kwargs)
    return {"audit_s": time.perf_counter() - start, "findings": len(result.findings),
            "events": int(result.extent["events"].sum())}


def audit_floor(folder: Path) -> dict[str, Any]:
    """The least an audit must do: one DuckDB pass grouping the rows by event."""
    con = duckdb.connect()
    try:
        n = con.execute(f"""SELECT count(*) FROM (
            SELECT source_id, event_id, season_year, season, depth_layer, cell_id,
                   bool_or(quantity <> 'presence') AS samples
            FROM read_parquet('{_observation_glob(folder)}', hive_partitioning = true) GROUP BY ALL)""").fetchall()[0][0]
    finally:
        con.close()
    return {"events": int(n)}


def run_wide(folder: Path, out: Path) -> dict[str, Any]:
    """The wide export (events x taxa) of the store to parquet."""
    from harmonize import load_study
    from harmonize.export.run import export

    result = export(load_study(folder), "wide", out)
    return {"rows_out": getattr(result, "rows", None), "out_mb": out.stat().st_size / 2**20}


def wide_floor(folder: Path, out: Path) -> dict[str, Any]:
    """The same pivot by raw DuckDB: densities of taxon counts per event, no checks."""
    con = duckdb.connect()
    try:
        con.execute("SET preserve_insertion_order = false")
        con.execute(f"""COPY (PIVOT (SELECT source_id, event_id, variable, density
                                     FROM read_parquet('{_observation_glob(folder)}', hive_partitioning = true)
                                     WHERE variable_kind = 'taxon' AND quantity = 'count')
                              ON variable USING sum(density) GROUP BY source_id, event_id)
                        TO '{out}' (FORMAT parquet, COMPRESSION zstd)""")
    finally:
        con.close()
    return {"out_mb": out.stat().st_size / 2**20}


def cleanup(folder: Path) -> None:
    shutil.rmtree(folder, ignore_errors=True)
