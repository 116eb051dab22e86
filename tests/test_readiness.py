"""Model readiness and identification changes in the audit, on the store of tests/rollup_store.py."""

from __future__ import annotations

import dataclasses
import json
from pathlib import Path

import pytest
from rollup_store import split_study

from harmonize.api import open_study
from harmonize.audit.run import audit
from harmonize.errors import HarmonizeError
from harmonize.study import AuditSettings, Study


@pytest.fixture(scope="module")
def study(tmp_path_factory: pytest.TempPathFactory) -> Study:
    base = split_study(tmp_path_factory.mktemp("readiness") / "study")
    # six encounters per season x layer make a taxon modelable in this small store
    return dataclasses.replace(base, audit=AuditSettings(min_events=1, min_encounters=6))


def test_the_genus_split_is_a_resolution_change_with_its_rollup(study: Study) -> None:
    result = audit(study)
    found = [f for f in result.findings if f.code == "resolution_change"]
    assert len(found) == 1
    f = found[0]
    assert f.variable == "Keldora" and f.severity == "warning"
    assert f.details["own_years"] == [2018, 2019] and f.details["finer_years"] == [2020, 2021]
    assert f.details["suggested_rollup"] == {"Keldora alba": "Keldora", "Keldora nigra": "Keldora"}
    assert "2018, 2019" in f.message and "--consistent-taxa" in f.message
    assert "split_trawl" in f.details["own_sources"]


def test_sparse_taxa_are_listed_and_a_common_one_is_not(study: Study) -> None:
    result = audit(study)
    sparse = result.readiness.too_sparse.set_index("taxon")
    # hand counts (tests/rollup_store.py): Ostravix caught in all 8 hauls; Keldora in H1, H3;
    # K. alba in H4, H6, H8; K. nigra in H4 (trawl) and present in P1, P2 (volunteers' presence-only
    # records: its best cell, 2 against 1)
    assert "Ostravix keldensis" not in sparse.index
    assert sparse.loc["Keldora", "encounters"] == 2
    # as recorded, the genus's samples are the hauls of the years it was recorded: H1, H2, H3
    assert sparse.loc["Keldora", "samples"] == 3
    assert sparse.loc["Keldora alba", "encounters"] == 3
    nigra = sparse.loc["Keldora nigra"]
    assert (nigra["best_source_kind"], nigra["encounters"], nigra["presence_only_records"]) == ("opportunistic", 0, 2)
    assert "roll it up into Keldora" in sparse.loc["Keldora alba", "advice"]
    assert "merge it with related taxa" in sparse.loc["Keldora", "advice"]
    few = {f.variable for f in result.findings if f.code == "few_encounters"}
    assert few == set(sparse.index)
    row = result.readiness.table.set_index(["taxon", "source_kind"]).loc[("Ostravix keldensis", "trawl")]
    assert (row["samples"], row["encounters"], row["share_zeros"], row["years_with_encounters"]) == (8, 8, 0.0, 4)
    assert bool(row["enough"]) is True


def test_readiness_at_genus_level_from_python(study: Study) -> None:
    handle = open_study(study.root)
    handle.study = study  # the lowered threshold of the fixture
    ready = handle.model_readiness(taxon_level="genus")
    row = ready.table.set_index(["taxon", "source_kind"]).loc[("Keldora", "trawl")]
    # an encounter of any member is an encounter of the genus: H1, H3, H4, H6, H8 of 8 hauls
    assert (row["samples"], row["encounters"]) == (8, 5)
    assert row["share_zeros"] == pytest.approx(1 - 5 / 8)
    assert row["years_with_encounters"] == 4
    assert ready.rolled_into == {"Keldora alba": "Keldora", "Keldora nigra": "Keldora"}
    with pytest.raises(HarmonizeError, match="taxon level 'genera' is not a rank"):
        handle.model_readiness(taxon_level="genera")


def test_readiness_in_json_and_html(study: Study, tmp_path: Path) -> None:
    result = audit(study)
    doc = json.loads(result.write_json(tmp_path / "a.json").read_text())
    ready = doc["model_readiness"]
    assert ready["min_encounters"] == 6
    assert {r["taxon"] for r in ready["too_sparse"]} == {"Keldora", "Keldora alba", "Keldora nigra"}
    assert any(f["code"] == "resolution_change" for f in doc["findings"])
    html = result.write_html(tmp_path / "a.html").read_text()
    assert "Too sparse to model alone: merge, roll up or drop (3)" in html
    assert "Identification level changes (1)" in html
