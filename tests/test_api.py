"""The Python API: the CLI's verbs as methods returning objects and DataFrames."""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import pytest

from harmonize.api import StudyHandle, open_study
from harmonize.errors import ConfigError, HarmonizeError
from harmonize.export.metadata import read_export_metadata


def test_open_ingest_status_quarantine_and_observations(study_dir: Path, tmp_path: Path) -> None:
    hz = open_study(study_dir)
    assert isinstance(hz, StudyHandle) and hz.study.name == "Keldmar Sea test study"
    checked = hz.check("trawl_agency", events="hauls_messy.csv", records="catch_messy.csv")
    assert checked[0].status == "checked" and checked[0].rows_quarantined == 11
    with pytest.raises(HarmonizeError, match="no store"):
        hz.status()                                  # check wrote nothing
    done = hz.ingest("trawl_agency", events="hauls_messy.csv", records="catch_messy.csv")
    assert done[0].status == "complete" and done[0].rows_read == done[0].rows_accepted + done[0].rows_quarantined
    again = hz.ingest("trawl_agency", events="hauls_messy.csv", records="catch_messy.csv")
    assert again[0].status == "unchanged"
    status = hz.status(check=True)
    assert list(status.ingests["ingest_id"]) == [done[0].ingest_id] and status.problems == []
    assert status["summary"]["rows"].sum() == done[0].records_written
    rejected = hz.quarantine(reason="orphan_record")
    assert list(rejected["source_row"]) == [9] and rejected["message"].str.len().gt(20).all()
    summer = hz.observations(seasons="summer", variables="Ostravix keldensis", columns=["event_id", "season", "density"])
    assert list(summer.columns) == ["event_id", "season", "density"]
    assert set(summer["season"]) == {"summer"} and len(summer) > 0
    wide = hz.wide(kinds="trawl")
    assert len(wide) == summer["event_id"].nunique() + 1   # + the December haul (winter)
    result = hz.export("long", tmp_path / "long.parquet", years="2020", seasons="summer")
    assert result.rows == len(pd.read_parquet(result.path))
    assert read_export_metadata(result.path)["filters"]["seasons"] == ["summer"]
    with pytest.raises(HarmonizeError, match="unknown export format 'xls'"):
        hz.export("xls", tmp_path / "x.xls")


def test_status_lists_events_without_values(study_dir: Path) -> None:
    # Without a protocol, haul H010 (no catch row) yields no observation row.
    text = (study_dir / "profiles" / "trawl_agency.toml").read_text()
    (study_dir / "profiles" / "trawl_bare.toml").write_text(text.replace('protocol = "keldmar_bottom_trawl"\n', ""))
    hz = open_study(study_dir)
    checked = hz.check("trawl_bare", events="hauls_messy.csv", records="catch_messy.csv")
    assert list(checked[0].events_without_values["event_id"]) == ["H010"]
    done = hz.ingest("trawl_bare", events="hauls_messy.csv", records="catch_messy.csv")
    status = hz.status(check=True)
    assert status.problems == []
    empty = status["events_without_values"]
    assert list(zip(empty["ingest_id"], empty["event_id"], empty["source_row"], strict=True)) == [
        (done[0].ingest_id, "H010", 10)]


def test_audit_through_the_api(study_dir: Path) -> None:
    hz = open_study(study_dir)
    hz.ingest("trawl_agency", events="hauls_messy.csv", records="catch_messy.csv")
    report = hz.audit()
    doc = report.to_json_dict()
    assert doc["study"] == "Keldmar Sea test study"      # CONTRACT section 6
    assert {"extent", "coverage", "findings"} <= set(doc)


def test_open_study_without_study_toml(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match="no study.toml here"):
        open_study(tmp_path)
