"""The audit's heavy aggregations, defined once (harmonize.engines.audit_rules), on both engines.

A golden test: a small store of hand-made observation files whose per-event and per-record
aggregates are written out by hand below, computed by the DuckDB SQL generated from the rules
and by the pandas implementation of the Dask engine, file by file and on a Dask cluster.
"""

from __future__ import annotations

from pathlib import Path

import duckdb
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from harmonize.audit.engines import AuditInputs, audit_engine, audit_engines, register_audit_engine
from harmonize.engines import ENGINES
from harmonize.engines.audit_rules import (
    EVENT_TAGS,
    KEPT_SQL,
    RECORD_KEYS,
    event_aggregates_sql,
    records_sql,
)
from harmonize.errors import HarmonizeError

DUP = ["probable_duplicate"]


def _row(event: str, variable: str, kind: str, quantity: str, value: float | None, *, source: str = "s1",
         flags: list[str] | None = None, n_vessels: int | None = None, season: str = "summer",
         cell: str = "c1", provider: str = "agency") -> dict:
    return {"record_id": f"{event}-{variable}-{quantity}", "ingest_id": "i1", "source_id": source,
            "protocol": "p", "provider_type": provider, "event_id": event, "season": season,
            "depth_layer": "surface", "cell_id": cell, "stratum": "north", "variable": variable,
            "variable_kind": kind, "quantity": quantity, "value": value, "unit": "1",
            "n_vessels": n_vessels, "flags": flags or []}


# source_kind=trawl/season_year=2020: two files; event E1 has rows in both
FILES = {
    "source_kind=trawl/season_year=2020/a.parquet": [
        _row("E1", "cod", "taxon", "count", 3.0),
        _row("E1", "haddock", "taxon", "count", 0.0),            # a zero: a record, no encounter
        _row("E2", "cod", "taxon", "presence", 1.0),             # presence only: not effort-bearing
    ],
    "source_kind=trawl/season_year=2020/b.parquet": [
        _row("E1", "sea_water_temperature", "physical", "measurement", 8.5),
        _row("E3", "cod", "taxon", "count", 2.0, flags=DUP),     # a twin: kept out of every count
    ],
    "source_kind=effort/season_year=2021/c.parquet": [
        _row("F1", "fishing_hours", "effort", "measurement", 4.0, source="fleet", n_vessels=5, cell="c2",
             provider="industry"),
        _row("F1", "fishing_hours", "effort", "measurement", 2.0, source="fleet", n_vessels=2, cell="c2",
             provider="industry"),
    ],
}

# by hand from the rows above (source_id, event_id) -> tags and measures
EXPECTED_EVENTS = {
    ("s1", "E1"): {"source_kind": "trawl", "season_year": 2020, "cell_id": "c1", "effort_bearing": True,
                   "biological": True, "n_vessels": None},
    ("s1", "E2"): {"source_kind": "trawl", "season_year": 2020, "cell_id": "c1", "effort_bearing": False,
                   "biological": True, "n_vessels": None},
    ("fleet", "F1"): {"source_kind": "effort", "season_year": 2021, "cell_id": "c2", "effort_bearing": True,
                      "biological": False, "n_vessels": 2},
}
# (variable, quantity) -> (records, encounters) of the kept taxon rows
EXPECTED_RECORDS = {("cod", "count"): (1, 1), ("haddock", "count"): (1, 0), ("cod", "presence"): (1, 1)}


@pytest.fixture
def files(tmp_path: Path) -> list[str]:
    paths = []
    for rel, rows in FILES.items():
        path = tmp_path / rel
        path.parent.mkdir(parents=True, exist_ok=True)
        frame = pd.DataFrame(rows).astype({"value": float, "n_vessels": "Int32"})
        table = pa.Table.from_pandas(frame.drop(columns="flags"), preserve_index=False)
        pq.write_table(table.append_column("flags", pa.array(frame["flags"].tolist(), pa.list_(pa.string()))), path)
        paths.append(str(path))
    return paths


def _source(paths: list[str]) -> str:
    listing = ", ".join(f"'{p}'" for p in paths)
    return (f"(SELECT * FROM read_parquet([{listing}], hive_partitioning = true, "
            "hive_types = {'source_kind': VARCHAR, 'season_year': INTEGER}))")


def _events_frame(events: pd.DataFrame) -> dict:
    out = {}
    for r in events.to_dict("records"):
        n = r["n_vessels"]
        out[(r["source_id"], r["event_id"])] = {
            "source_kind": r["source_kind"], "season_year": int(r["season_year"]), "cell_id": r["cell_id"],
            "effort_bearing": bool(r["effort_bearing"]), "biological": bool(r["biological"]),
            "n_vessels": None if pd.isna(n) else int(n)}
    return out


def _records_frame(records: pd.DataFrame) -> dict:
    return {(r["variable"], r["quantity"]): (int(r["records"]), int(r["encounters"]))
            for r in records.to_dict("records")}


def test_duckdb_sql_of_the_rules_gives_the_hand_counts(files: list[str]) -> None:
    con = duckdb.connect()
    events = con.execute(f"""SELECT source_id, event_id, {event_aggregates_sql()} FROM {_source(files)}
                             WHERE {KEPT_SQL} GROUP BY source_id, event_id""").df()
    assert _events_frame(events) == EXPECTED_EVENTS
    assert list(events.columns) == ["source_id", "event_id", *EVENT_TAGS, "effort_bearing", "biological",
                                    "n_vessels"]
    records = con.execute(records_sql(_source(files))).df()
    assert _records_frame(records) == EXPECTED_RECORDS
    assert list(records.columns) == [*RECORD_KEYS, "records", "encounters"]
    # an annual audit of 2020 leaves the 2021 fishing event out
    assert _records_frame(con.execute(records_sql(_source(files), max_year=2019)).df()) == {}


def test_dask_partials_of_each_file_give_the_hand_counts(files: list[str]) -> None:
    from harmonize.engines.dask_engine import _file_partials

    parts = [_file_partials(p, frozenset(), None) for p in files]
    per_file = [_events_frame(ev) for ev, _ in parts]
    # E1 spans two files: each file holds part of it; F1 and E2 are whole in one file
    assert per_file[2] == {("fleet", "F1"): EXPECTED_EVENTS[("fleet", "F1")]}
    assert per_file[0][("s1", "E2")] == EXPECTED_EVENTS[("s1", "E2")]
    assert per_file[1] == {("s1", "E1"): {**EXPECTED_EVENTS[("s1", "E1")], "biological": False}}
    records = pd.concat([r for _, r in parts]).groupby(list(RECORD_KEYS), dropna=False)[
        ["records", "encounters"]].sum().reset_index()
    assert _records_frame(records) == EXPECTED_RECORDS
    # the store-wide flags (store_flags) keep a row out as its own flag does
    flagged = _file_partials(files[0], frozenset({"E1-cod-count|i1"}), None)[1]
    assert _records_frame(flagged) == {("haddock", "count"): (1, 0), ("cod", "presence"): (1, 1)}


@pytest.mark.dask
def test_dask_engine_equals_the_duckdb_sql_on_the_same_files(files: list[str]) -> None:
    from harmonize.engines.dask_engine import audit_tables

    tables = audit_tables(files)
    assert _events_frame(tables.events) == EXPECTED_EVENTS
    assert _records_frame(tables.records) == EXPECTED_RECORDS


def test_every_engine_has_an_audit_and_unknown_ones_are_refused() -> None:
    assert set(audit_engines()) == set(ENGINES) == {"duckdb", "dask"}
    with pytest.raises(HarmonizeError, match="the audit has no implementation on engine 'spark'; choose one of"):
        audit_engine("spark")
    with pytest.raises(ValueError, match="'spark' is not an engine; the engines are duckdb, dask"):
        register_audit_engine("spark")


def test_the_audit_runs_the_engine_registered_under_the_name(study_dir: Path) -> None:
    from harmonize import load_study, run
    from harmonize.audit.run import audit

    study = load_study(study_dir)
    run(study, "trawl_agency", {"events": study_dir / "hauls_messy.csv", "records": study_dir / "catch_messy.csv"})
    calls: list[AuditInputs] = []
    duckdb_engine = audit_engine("duckdb")

    def stub(inputs: AuditInputs):  # type: ignore[no-untyped-def]
        calls.append(inputs)
        return duckdb_engine(inputs)

    original = audit_engine("dask")
    register_audit_engine("dask")(stub)
    try:
        via_stub = audit(study, engine="dask", scheduler="tcp://nowhere:1")
    finally:
        register_audit_engine("dask")(original)
    assert len(calls) == 1 and calls[0].scheduler == "tcp://nowhere:1"
    assert calls[0].live_paths and all(Path(p).is_file() for p in calls[0].live_paths)
    pd.testing.assert_frame_equal(via_stub.coverage, audit(study).coverage)
