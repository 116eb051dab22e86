"""The annual report's accounting: data received, quarantine by reason, provenance, effort per year."""

from __future__ import annotations

import csv
from pathlib import Path

import pytest

from harmonize.api import open_study


@pytest.fixture
def ingested(study_dir: Path):  # type: ignore[no-untyped-def]
    hz = open_study(study_dir)
    done = hz.ingest("trawl_agency", events="hauls_messy.csv", records="catch_messy.csv")
    return hz, done[0], study_dir


def _data_rows(path: Path) -> int:
    with path.open(newline="", encoding="utf-8") as fh:
        return sum(1 for _ in csv.reader(fh)) - 1


def test_received_rows_reasons_and_hashes(ingested) -> None:  # type: ignore[no-untyped-def]
    hz, done, root = ingested
    result = hz.audit()
    r = result.received
    assert len(r.by_source) == 1
    row = r.by_source.iloc[0]
    # rows read = data rows of the two files, counted here with the csv module
    assert row["rows_read"] == _data_rows(root / "hauls_messy.csv") + _data_rows(root / "catch_messy.csv")
    assert row["rows_read"] == row["rows_accepted"] + row["rows_quarantined"]
    assert (row["files"], row["ingests"], row["masked_values"], row["twins"]) == (2, 1, 0, 0)
    # reasons: the quarantine table grouped by reason code
    q = hz.quarantine()
    expected = q.groupby("reason_code").size().to_dict()
    assert dict(zip(r.reasons["reason_code"], r.reasons["rows"], strict=True)) == expected
    assert sum(expected.values()) == row["rows_quarantined"]
    # provenance: the ingest, its two files and the files' SHA-256 in the store's ingest_files
    assert list(r.ingests["ingest_id"]) == [done.ingest_id]
    assert sorted(r.ingests["files"].iloc[0]) == ["catch_messy.csv", "hauls_messy.csv"]
    html = result.write_html(root / "r.html").read_text(encoding="utf-8")
    assert done.ingest_id in html
    assert str(r.ingests["config_sha256"].iloc[0])[:12] in html


def test_effort_totals_sum_one_value_per_haul(ingested) -> None:  # type: ignore[no-untyped-def]
    hz, _, root = ingested
    result = hz.audit()
    obs = hz.observations(columns=["source_id", "event_id", "season_year", "effort", "effort_unit", "row_flags"])
    per_event = obs.dropna(subset=["effort"]).drop_duplicates(["source_id", "event_id"])
    expected = per_event.groupby("season_year")["effort"].sum()
    eff = result.received.effort.set_index("season_year")
    assert set(eff["effort_unit"]) == {"km2"}
    for year, total in expected.items():
        assert eff.loc[int(year), "effort"] == pytest.approx(total, rel=1e-12)
        assert eff.loc[int(year), "events"] == (per_event["season_year"] == year).sum()
    html = result.write_html(root / "r.html").read_text(encoding="utf-8")
    for title in ("Data received", "Coverage by stratum", "Effort per year", "Provenance", "How this report counts"):
        assert f"<h2>{title}</h2>" in html
    assert "December 2023 is winter 2024" in html  # the season year explained in words
