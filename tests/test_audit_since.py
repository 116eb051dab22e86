"""audit --since: what changed since a previous audit, matched by ingest and by place, never by position."""

from __future__ import annotations

import hashlib
import json
import os
import random
import shutil
import subprocess
import sys
from pathlib import Path

import duckdb
import pandas as pd
import pytest
from factories import store_frames

from harmonize.audit.report import render_html
from harmonize.audit.run import audit, domain_cells
from harmonize.audit.since import AUDIT_SCHEMA_VERSION, finding_key
from harmonize.errors import HarmonizeError
from harmonize.study import Study, load_study

BIN = Path(sys.executable).parent / "harmonize"
FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"


def _survey(study: Study, year: int, cells: pd.DataFrame, values: list[float], *, replace: bool = False) -> None:
    """One file of trawl hauls for a summer: one haul per cell, one count per haul (effort 1 km2)."""
    ev = pd.DataFrame({"event_id": [f"{year}-{k:03d}" for k in range(len(cells))],
                       "event_start": f"{year}-07-10 08:00", "lat": cells["lat"].to_numpy(),
                       "lon": cells["lon"].to_numpy(), "depth_layer": "near_bottom"})
    va = pd.DataFrame({"event_id": ev["event_id"], "variable": "Ostravix keldensis", "value": values})
    store_frames(study, ev, va, source_id="survey", kind="trawl", protocol="keldmar_bottom_trawl",
                 file_name=f"hauls_{year}.csv", replace=replace)


@pytest.fixture(scope="module")
def built(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, pd.DataFrame]:
    """A first audit of 2018, 2019 and 2021 (2020 missing); then 2020 and a reduced 2022 arrive,
    and a corrected 2021 file changes three values and adds one haul. Built once; each test
    works on a copy (:func:`two_audits`)."""
    folder = tmp_path_factory.mktemp("since") / "study"
    shutil.copytree(FIXTURES / "keldmar", folder)
    study = load_study(folder)
    cells = domain_cells(study).sort_values("cell_id").reset_index(drop=True)
    full = cells.iloc[:30]
    for year in (2018, 2019, 2021):
        _survey(study, year, full, [float(k + 1) for k in range(30)])
    audit(study).write_json(folder / "audit_first.json")
    _survey(study, 2020, full, [float(k + 1) for k in range(30)])
    _survey(study, 2022, cells.iloc[31:37], [1.0] * 6)  # 6 hauls, in 6 cells sampled by no other file
    corrected = [float(k + 1) for k in range(31)]
    for k in (0, 5, 9):
        corrected[k] += 0.5
    _survey(study, 2021, cells.iloc[:31], corrected, replace=True)
    return folder, cells


@pytest.fixture
def study(built: tuple[Path, pd.DataFrame], tmp_path: Path) -> Study:
    """A copy of the built study for one test (tests may change it)."""
    folder = tmp_path / "study"
    shutil.copytree(built[0], folder)
    return load_study(folder)


@pytest.fixture
def two_audits(built: tuple[Path, pd.DataFrame], study: Study) -> dict:
    return {"first_path": study.root / "audit_first.json", "cells": built[1], "store_dir": study.store_dir}


def test_the_json_carries_what_the_comparison_needs(two_audits: dict) -> None:
    data = json.loads(Path(two_audits["first_path"]).read_text())
    assert data["format"] == "harmonize-audit" and data["schema_version"] == AUDIT_SCHEMA_VERSION
    assert [i["file_name"] for i in data["ingests"]] == ["hauls_2018.csv", "hauls_2019.csv", "hauls_2021.csv"]
    assert all(len(i["file_sha256"]) == 64 and i["files"] for i in data["ingests"])
    years = {(r["season_year"]): (r["events"], r["rows"], r["effort"]) for r in data["ingest_years"]}
    assert years == {2018: (30, 30, 30.0), 2019: (30, 30, 30.0), 2021: (30, 30, 30.0)}
    assert all(f["key"] == finding_key(f) for f in data["findings"])
    # the value digest, recomputed here from the stored rows with Python's hashlib: the xor of
    # md5(record_id|value to 17 significant digits), bytes read little-endian
    first_ingest = data["ingests"][0]["ingest_id"]
    study_store = Path(two_audits["store_dir"])
    with duckdb.connect(str(study_store / "harmonized.duckdb"), read_only=True) as con:
        paths = [str(study_store / r[0]) for r in con.execute(
            "SELECT path FROM observation_files WHERE ingest_id = ?", [first_ingest]).fetchall()]
    rows = pd.concat([pd.read_parquet(p, columns=["record_id", "value"]) for p in paths])
    digest = 0
    for rid, value in zip(rows["record_id"], rows["value"], strict=True):
        digest ^= int.from_bytes(hashlib.md5(f"{rid}|{value:.17g}".encode()).digest(), "little")
    recorded = next(r["value_digest"] for r in data["ingest_years"] if r["ingest_id"] == first_ingest)
    assert recorded == str(digest)
    assert data["layer_coverage"] == [{"source_kind": "trawl", "season": "summer", "depth_layer": "near_bottom",
                                       "events": 90, "cells_sampled": 30, "coverage_fraction": 30 / 165}]


def test_since_lists_corrections_first_then_additions(two_audits: dict, study: Study) -> None:
    result = audit(study, since=two_audits["first_path"])
    since = result.since
    eff = since.effects
    # the correction of 2021, a year the first audit had seen, comes first with the rows changed
    first = eff.iloc[0]
    assert (first["change"], first["season_year"], first["file_name"]) == ("corrected", 2021, "hauls_2021.csv")
    assert first["values_changed"] == 3 and first["revises_earlier_year"]
    assert (first["events_change"], first["rows_change"], first["effort_change"]) == (1, 1, 1.0)
    added = eff[eff["change"] == "added"].set_index("season_year")
    assert added.loc[2020, ["events_change", "rows_change"]].tolist() == [30, 30]
    assert added.loc[2022, ["events_change", "rows_change", "effort_change"]].tolist() == [6, 6, 6.0]
    assert not added["revises_earlier_year"].any()
    assert len(since.ingests_added) == 2 and len(since.ingests_superseded) == 1
    # findings: the missing 2020 is resolved; 2022's reduced survey is new
    f = since.findings
    resolved = f[f["status"] == "resolved"]
    assert ("missing_year", 2020) in set(zip(resolved["code"], resolved["season_year"], strict=True))
    new = f[f["status"] == "new"]
    assert ("coverage_drop", 2022) in set(zip(new["code"], new["season_year"], strict=True))
    assert "coverage_drop" in since.new_codes()
    # coverage: 30 cells before; 31 (the corrected file's extra haul) + 6 after
    cov = since.coverage.iloc[0]
    assert (cov["cells_sampled_before"], cov["cells_sampled_after"]) == (30, 37)
    assert (cov["events_before"], cov["events_after"]) == (90, 30 + 30 + 30 + 31 + 6)
    assert cov["coverage_fraction_after"] == pytest.approx(37 / 165)
    # the same in the JSON and the HTML
    data = result.to_json_dict()["since_last_audit"]
    assert data["effects"][0]["values_changed"] == 3
    html = render_html(result)
    assert "Since the last audit" in html and "hauls_2021.csv" in html


def test_findings_are_matched_by_place_not_position(two_audits: dict, study: Study, tmp_path: Path) -> None:
    data = json.loads(Path(two_audits["first_path"]).read_text())
    baseline = audit(study, since=data).since.findings
    shuffled = dict(data)
    shuffled["findings"] = [dict(f, message=f"reworded {i}") for i, f in enumerate(data["findings"])]
    random.Random(3).shuffle(shuffled["findings"])
    again = audit(study, since=shuffled).since.findings
    cols = ["status", "code", "season_year", "severity_before", "severity_after"]
    key = lambda frame: sorted(map(tuple, frame[cols].astype(str).to_numpy().tolist()))  # noqa: E731
    assert key(again) == key(baseline)
    # a severity that changed is reported as such, not as one new and one resolved finding
    now_keys = {tuple(finding_key(f)) for f in audit(study).findings}
    kept = next(f for f in data["findings"] if tuple(f["key"]) in now_keys)
    bumped = dict(data)
    bumped["findings"] = [dict(f, severity="info") if f is kept else f for f in data["findings"]]
    changed = audit(study, since=bumped).since.findings
    hit = changed[changed["key"].map(tuple) == tuple(kept["key"])]
    assert hit["status"].tolist() == ["severity changed"]
    assert (hit["severity_before"].iloc[0], hit["severity_after"].iloc[0]) == ("info", kept["severity"])
    # comparing an audit with itself: nothing new, nothing resolved
    now = audit(study)
    same = audit(study, since=now.to_json_dict()).since
    assert same.findings.empty and same.effects.empty and same.coverage.empty


def test_without_the_superseded_rows_the_count_is_unknown_but_the_change_is_not_hidden(
        two_audits: dict, study: Study) -> None:
    with duckdb.connect(str(study.store_dir / "harmonized.duckdb"), read_only=True) as con:
        old = con.execute("SELECT ingest_id FROM ingests WHERE status = 'superseded'").fetchall()[0][0]
        paths = [r[0] for r in con.execute("SELECT path FROM observation_files WHERE ingest_id = ?", [old]).fetchall()]
    for p in paths:
        os.remove(study.store_dir / p)
    since = audit(study, since=two_audits["first_path"]).since
    first = since.effects.iloc[0]
    assert first["change"] == "corrected" and first["revises_earlier_year"]
    assert first["values_changed"] is None or pd.isna(first["values_changed"])
    assert any("number of rows whose value changed is unknown" in n for n in since.notes)


def _refusal(study: Study, tmp_path: Path, content: str) -> str:
    path = tmp_path / "previous.json"
    path.write_text(content)
    with pytest.raises(HarmonizeError) as err:
        audit(study, since=path)
    assert "\n" not in str(err.value)
    return str(err.value)


def test_older_foreign_and_other_study_jsons_are_refused(two_audits: dict, study: Study, tmp_path: Path) -> None:
    data = json.loads(Path(two_audits["first_path"]).read_text())
    old = {k: v for k, v in data.items() if k not in ("format", "schema_version", "ingests")}
    assert "was written by an older harmonize (an audit JSON without schema_version)" in _refusal(
        study, tmp_path, json.dumps(old))
    assert "is not a harmonize audit JSON" in _refusal(study, tmp_path, json.dumps({"type": "FeatureCollection"}))
    assert "is not a harmonize audit JSON" in _refusal(study, tmp_path, "[1, 2]")
    assert "cannot be read as JSON" in _refusal(study, tmp_path, "{not json")
    assert "update harmonize to compare with it" in _refusal(
        study, tmp_path, json.dumps(dict(data, schema_version=AUDIT_SCHEMA_VERSION + 1)))
    assert "is the audit of study 'Somewhere else', not of 'Keldmar Sea test study'" in _refusal(
        study, tmp_path, json.dumps(dict(data, study="Somewhere else")))
    assert "the key 'ingest_years' is missing or not a list" in _refusal(
        study, tmp_path, json.dumps({k: v for k, v in data.items() if k != "ingest_years"}))


@pytest.mark.subprocess
def test_cli_since_and_fail_on_new(two_audits: dict, study: Study, tmp_path: Path) -> None:
    run = [str(BIN), "--study", str(study.root), "audit"]
    env = {**os.environ, "COLUMNS": "200"}
    out = subprocess.run([*run, "--since", str(two_audits["first_path"]), "--fail-on-new", "coverage_drop",
                          "--json", str(tmp_path / "second.json"), "--html", str(tmp_path / "second.html")],
                         capture_output=True, text=True, timeout=120, env=env)
    assert out.returncode == 1, out.stderr
    assert "failing: new findings with code(s) coverage_drop since the previous audit" in out.stdout
    assert "corrected hauls_2021.csv (survey) changed values in season year 2021" in out.stdout
    assert "Since the last audit" in (tmp_path / "second.html").read_text()
    # against this audit's own JSON nothing is new: exit 0
    again = subprocess.run([*run, "--since", str(tmp_path / "second.json"), "--fail-on-new", "coverage_drop"],
                           capture_output=True, text=True, timeout=120, env=env)
    assert again.returncode == 0, again.stdout + again.stderr
    # --fail-on-new without --since, and an older JSON: one line, exit 2
    for args, message in ((["--fail-on-new", "coverage_drop"], "--fail-on-new needs --since PREVIOUS.json"),
                          (["--since", str(tmp_path / "old.json")], "was written by an older harmonize")):
        (tmp_path / "old.json").write_text(json.dumps({"study": "x", "coverage": [], "findings": []}))
        res = subprocess.run([*run, *args], capture_output=True, text=True, timeout=120, env=env)
        assert res.returncode == 2 and message in res.stderr and res.stderr.strip().count("\n") == 0, res.stderr
