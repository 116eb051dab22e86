"""The demo's planted identification change and sparse taxon, on its trawl survey alone (faster than the whole demo)."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from harmonize.audit.run import audit
from harmonize.demo.sea import SPLIT_YEAR, YEARS, write_study
from harmonize.demo.sources import trawl
from harmonize.ingest import run
from harmonize.study import Study, load_study

BIN = Path(sys.executable).parent / "harmonize"


@pytest.fixture(scope="module")
def demo_trawl(tmp_path_factory: pytest.TempPathFactory) -> Study:
    folder = tmp_path_factory.mktemp("demo_taxa") / "demo"
    write_study(folder)
    study = load_study(folder)
    for item in trawl.generate(folder, np.random.default_rng(1)):
        run(study, folder / item.profile, {role: folder / rel for role, rel in item.inputs.items()})
    return study


def test_demo_taxa_carry_ranks_and_parents(demo_trawl: Study) -> None:
    taxa = demo_trawl.taxa.set_index("taxon")
    assert taxa.loc["Vossaria borealis", "rank"] == "species" and taxa.loc["Vossaria borealis", "parent"] == "Vossaria"
    assert taxa.loc["Vossaria", "rank"] == "genus"
    assert (taxa["rank"] != "").all()


def test_demo_audit_reports_the_split_and_the_sparse_taxon(demo_trawl: Study) -> None:
    result = audit(demo_trawl)
    change = [f for f in result.findings if f.code == "resolution_change"]
    assert [f.variable for f in change] == ["Vossaria"]
    assert change[0].details["own_years"] == list(range(YEARS[0], SPLIT_YEAR))
    assert change[0].details["finer_years"] == list(range(SPLIT_YEAR, YEARS[-1] + 1))
    assert change[0].details["suggested_rollup"] == {"Vossaria australis": "Vossaria", "Vossaria borealis": "Vossaria"}
    sparse = set(result.readiness.too_sparse["taxon"])
    assert "Bathyra thornensis" in sparse
    assert "Ostravix keldensis" not in sparse and "Vossaria" not in sparse


#: The wide export's column of a taxon's density over area swept (one column per taxon and unit).
DENSITY = "{} (per km2)"


def test_demo_wide_consistent_taxa_gives_a_continuous_series(demo_trawl: Study, tmp_path: Path) -> None:
    env = {**os.environ, "COLUMNS": "200"}
    plain, rolled = tmp_path / "plain.csv", tmp_path / "rolled.csv"
    for out, extra in ((plain, []), (rolled, ["--consistent-taxa"])):
        res = subprocess.run([str(BIN), "--study", str(demo_trawl.root), "export", "wide", str(out), *extra],
                             capture_output=True, text=True, timeout=300, env=env)
        assert res.returncode == 0, res.stderr
    before = pd.read_csv(plain)
    after = pd.read_csv(rolled)
    years = set(YEARS)
    # as recorded, the genus column stops and the species columns start at the split
    assert set(before.loc[before[DENSITY.format("Vossaria")].notna(), "season_year"]) == set(range(YEARS[0], SPLIT_YEAR))
    assert set(before.loc[before[DENSITY.format("Vossaria borealis")].notna(), "season_year"]) == set(range(SPLIT_YEAR, YEARS[-1] + 1))
    # rolled up: one column, a value (zero or more) at every haul of every year
    assert DENSITY.format("Vossaria borealis") not in after.columns and DENSITY.format("Vossaria australis") not in after.columns
    assert set(after["season_year"]) == years and after[DENSITY.format("Vossaria")].notna().all()
    # from the split on, the genus is the sum of its two species, haul by haul
    split = before[before["season_year"] >= SPLIT_YEAR].set_index(["source_id", "event_id"])
    summed = split[DENSITY.format("Vossaria borealis")] + split[DENSITY.format("Vossaria australis")]
    got = after.set_index(["source_id", "event_id"]).loc[summed.index, DENSITY.format("Vossaria")]
    assert np.allclose(got.to_numpy(), summed.to_numpy())
