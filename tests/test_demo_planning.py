"""The demo shows 'Since the last audit' and a plan that fills the strata its 2022 survey missed."""

from __future__ import annotations

import json

import duckdb
import pandas as pd
import pytest

from harmonize.demo.build import (
    CORRECTED_ROWS,
    CORRECTED_YEAR,
    LATE_YEAR,
    PLAN_SAMPLES,
    DemoRun,
    build_demo,
)
from harmonize.demo.sea import STRATA

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> DemoRun:
    return build_demo(tmp_path_factory.mktemp("planning") / "demo")


def test_the_report_says_what_changed_since_the_audit_before_2023(demo: DemoRun) -> None:
    out = demo.folder / "outputs"
    before = json.loads((out / f"audit_before_{LATE_YEAR}.json").read_text())
    after = json.loads((out / "audit.json").read_text())
    since = after["since_last_audit"]
    # the 2023 trawl files arrived, and the 2022 catch was re-delivered with weights fixed
    added = [e for e in since["effects"] if e["change"] == "added"]
    assert {(e["source_kind"], e["season_year"]) for e in added} == {("trawl", LATE_YEAR)}
    first = since["effects"][0]
    assert (first["change"], first["season_year"], first["revises_earlier_year"]) == ("corrected", CORRECTED_YEAR, True)
    # rows changed, counted independently from the two parquet generations in the store
    store = demo.folder / "store"
    with duckdb.connect(str(store / "harmonized.duckdb"), read_only=True) as con:
        old, new = con.execute(
            "SELECT ingest_id, superseded_by FROM ingests WHERE status = 'superseded'").fetchall()[0]
        files = {i: [str(store / r[0]) for r in con.execute(
            "SELECT path FROM observation_files WHERE ingest_id = ?", [i]).fetchall()] for i in (old, new)}
    frames = {i: pd.concat([pd.read_parquet(p, columns=["record_id", "value"]) for p in paths]) for i, paths in files.items()}
    merged = frames[old].merge(frames[new], on="record_id", suffixes=("_old", "_new"))
    changed = int((merged["value_old"] != merged["value_new"]).sum())
    assert 0 < changed <= CORRECTED_ROWS
    assert first["values_changed"] == changed
    # the previous audit did not cover the 2023 ingest; this one covers both
    assert len(after["ingests"]) == len(before["ingests"]) + 1
    html = (out / "audit.html").read_text()
    assert html.index("Since the last audit") < html.index("<h2>Findings</h2>")
    assert any("Since the last audit" in line and "audit.html" in line for line in demo.planning)


def test_the_plan_puts_the_20_hauls_in_the_strata_2022_missed(demo: DemoRun) -> None:
    plan = pd.read_csv(demo.folder / "outputs" / "plan_trawl_summer.csv")
    assert len(plan) == PLAN_SAMPLES
    # strata with no 2022 summer trawl haul, found from the store, not from the plan
    with duckdb.connect(str(demo.folder / "store" / "harmonized.duckdb"), read_only=True) as con:
        con.execute(f"SET file_search_path = '{demo.folder / 'store'}'")  # docs/store.md
        fished = {r[0] for r in con.execute(
            f"""SELECT DISTINCT stratum FROM observations WHERE source_kind = 'trawl' AND season = 'summer'
                AND season_year = {CORRECTED_YEAR} AND stratum IS NOT NULL""").fetchall()}
    missed = set(STRATA) - fished
    assert missed, "the demo's 2022 survey should miss strata"
    assert set(plan["stratum"]) == missed
    assert any(line.startswith("plan: 20 added summer trawl hauls") for line in demo.planning)
