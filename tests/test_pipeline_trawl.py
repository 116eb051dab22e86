"""End-to-end: the messy trawl fixture through ingest, the store and its accounting."""

from __future__ import annotations

from pathlib import Path

import duckdb
import pytest

from harmonize import Store, load_study, run
from harmonize.errors import DuplicateIngestError


def _inputs(study_dir: Path) -> dict[str, Path]:
    return {"events": study_dir / "hauls_messy.csv", "records": study_dir / "catch_messy.csv"}


def test_messy_trawl_accounting_and_reasons(study_dir: Path) -> None:
    study = load_study(study_dir)
    result = run(study, "trawl_agency", _inputs(study_dir))
    assert result.status == "complete"
    # every input row accepted or quarantined
    assert result.rows_read == 11 + 12
    assert result.rows_read == result.rows_accepted + result.rows_quarantined
    reasons = dict(zip(result.quarantine["source_row"].astype(str) + "@" + result.quarantine["source_file"],
                       result.quarantine["reason_code"], strict=True))
    assert reasons == {
        "3@hauls_messy.csv": "duplicate_record",
        "4@hauls_messy.csv": "end_before_start",
        "5@hauls_messy.csv": "out_of_range",       # latitude and longitude swapped
        "6@hauls_messy.csv": "implausible_speed",
        "7@hauls_messy.csv": "bad_time",
        "8@hauls_messy.csv": "bad_type",
        "3@catch_messy.csv": "unknown_taxon",
        "6@catch_messy.csv": "out_of_range",
        "8@catch_messy.csv": "end_before_start",   # catch of a rejected haul follows it
        "9@catch_messy.csv": "orphan_record",
        "11@catch_messy.csv": "missing_value",
    }
    assert Store(study.store_dir).check() == []


def test_reingest_is_a_noop_and_replace_supersedes(study_dir: Path) -> None:
    study = load_study(study_dir)
    first = run(study, "trawl_agency", _inputs(study_dir))
    again = run(study, "trawl_agency", _inputs(study_dir))
    assert again.status == "unchanged" and again.ingest_id == first.ingest_id
    con = duckdb.connect(str(study.store_dir / "harmonized.duckdb"), read_only=True)
    assert con.execute("SELECT count(*) FROM ingests").fetchall()[0][0] == 1
    con.close()
    # a corrected catch file under the same name needs --replace
    catch = study_dir / "catch_messy.csv"
    catch.write_text(catch.read_text().replace("H099,keld cod", "H010,keld cod"))
    with pytest.raises(DuplicateIngestError, match="--replace"):
        run(study, "trawl_agency", _inputs(study_dir))
    third = run(study, "trawl_agency", _inputs(study_dir), replace=True)
    assert third.superseded == [first.ingest_id]
    store = Store(study.store_dir)
    ingests = store.ingests()
    assert dict(zip(ingests["ingest_id"], ingests["status"], strict=True)) == {
        first.ingest_id: "superseded", third.ingest_id: "complete"}
    with store.connect() as con:
        live = con.execute("SELECT DISTINCT ingest_id FROM observations").fetchall()
    assert live == [(third.ingest_id,)]
    assert store.check() == []
