"""A ping file's track made bucket of vessels by bucket gives the store of one pass.

harmonize.adapters.pings makes the track of a large file in buckets of whole vessels (the
vessels whose number has one remainder), so that the window sorts fit in memory; every
count of a cell (hours, pings, distinct vessels, the vessels behind it) is then summed over
the buckets. These tests ingest the same messy file with one bucket and with many and
compare the stores: the accounting, the quarantine (messages included) and every
observation column (hours to 1e-12 relative: another summation order may change the last
bits). The file holds what could fall apart between buckets: one vessel written under two
spellings of its id (one pseudonym, compared case- and whitespace-insensitively), one gear
under two spellings (one rule), duplicates, position jumps, missing speeds, a ping outside
the domain and an unknown gear.
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pytest
import shapely
from factories import messy_ping_text
from store_content import assert_same_fishing_store, store_tables

import harmonize.adapters.pings as pings_adapter
from harmonize import load_study, run
from harmonize.privacy import study_salt


def _messy_pings(path: Path, domain: Path, seed: int = 11) -> None:
    rng = np.random.default_rng(seed)
    df, _jumps = messy_ping_text(rng, 9, 120, "2021-05-25", ("OTB", "OTB", "TBB", "OTM", "OTB", "DRB",
                                                               "OTB", "TBB", "OTB"))
    n = len(df)
    first = df["vessel"] == df["vessel"].iloc[0]
    # the first vessel's id also written in lower case with spaces: the same vessel
    other = first & (rng.random(n) < 0.5)
    df.loc[other, "vessel"] = " " + df.loc[other, "vessel"].str.lower() + " "
    df.loc[first & (df["gear"] == "OTB") & (rng.random(n) < 0.5), "gear"] = "otb"
    df.loc[5, "gear"] = "XYZ"
    df.loc[7, "lat"] = "10.0"
    shape = shapely.geometry.shape(json.loads(domain.read_text())["features"][0]["geometry"])
    inside = np.flatnonzero(shapely.contains_xy(shape, df["lon"].astype(float), df["lat"].astype(float)))
    # two exact duplicates and one with another speed, of pings inside the domain
    extra = df.iloc[inside[[10, 200, 300]]].copy()
    extra.iloc[1, extra.columns.get_loc("sog")] = "9.9"
    df = pd.concat([df, extra], ignore_index=True)
    df.sample(frac=1.0, random_state=3).to_csv(path, index=False)  # vessels interleaved


def _ingest(study_dir: Path, target: Path, csv: Path, per_bucket: int, monkeypatch: pytest.MonkeyPatch) -> Path:
    shutil.copytree(study_dir, target)
    monkeypatch.setattr(pings_adapter, "PINGS_PER_BUCKET", per_bucket)
    result = run(load_study(target), "effort_pings", {"rows": csv})
    assert result.status == "complete"
    assert result.rows_read == result.rows_accepted + result.rows_quarantined
    return target


@pytest.mark.parametrize("per_bucket", [97, 400])
def test_buckets_of_vessels_give_the_store_of_one_pass(study_dir: Path, tmp_path: Path, per_bucket: int,
                                                       monkeypatch: pytest.MonkeyPatch) -> None:
    csv = tmp_path / "pings_messy.csv"
    _messy_pings(csv, study_dir / "domain.geojson")
    study_salt(study_dir)  # both copies hash vessel ids with the same salt
    seen: list[int] = []
    track = pings_adapter.PingReader._track

    def counting(self: pings_adapter.PingReader, con: duckdb.DuckDBPyConnection, pings: str) -> None:
        seen.append(con.execute(f"SELECT count(*) FROM {pings}").fetchall()[0][0])
        track(self, con, pings)

    monkeypatch.setattr(pings_adapter.PingReader, "_track", counting)
    one = store_tables(_ingest(study_dir, tmp_path / "one", csv, 10**9, monkeypatch))
    assert len(seen) == 1
    seen.clear()
    many = store_tables(_ingest(study_dir, tmp_path / "many", csv, per_bucket, monkeypatch))
    n_lines = sum(1 for _ in csv.open()) - 1
    assert len(seen) == -(-n_lines // per_bucket) and sum(seen) < n_lines  # several buckets, each a part

    assert_same_fishing_store(one, many)
    reasons = set(one["quarantine"]["reason_code"])
    assert {"implausible_speed", "duplicate_record", "outside_domain", "unknown_gear"} <= reasons
    a = one["observations"]
    assert a["flags"].map(lambda f: "speed_derived" in list(f)).any()
