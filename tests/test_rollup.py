"""Taxon roll-up in exports: sums, zeros and presences checked against hand arithmetic."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest
from rollup_store import split_study

from harmonize.errors import HarmonizeError
from harmonize.export.long import read_long
from harmonize.export.run import export
from harmonize.export.selection import ExportFilters
from harmonize.export.wide import read_wide
from harmonize.study import Study

BIN = Path(sys.executable).parent / "harmonize"


@pytest.fixture(scope="module")
def study(tmp_path_factory: pytest.TempPathFactory) -> Study:
    return split_study(tmp_path_factory.mktemp("rollup") / "study")


# The hand arithmetic of tests/rollup_store.py: Keldora count per km2 at each haul.
EXPECTED_GENUS_DENSITY = {"H1": 8.0, "H2": 0.0, "H3": 12.0, "H4": 16.0, "H5": 0.0, "H6": 4.0}


#: The wide export's column of a taxon's density over area swept (one column per taxon and unit).
PER_KM2 = "{} (per km2)"


def _keldora(wide: pd.DataFrame) -> dict[str, float]:
    trawl = wide[wide["source_id"] == "split_trawl"].set_index("event_id")[PER_KM2.format("Keldora")]
    return {k: float(v) for k, v in trawl.items() if pd.notna(v)}


def test_genus_level_sums_and_zeros(study: Study) -> None:
    wide = read_wide(study, ExportFilters(taxon_level="genus"), link_gridded=False)
    assert _keldora(wide) == EXPECTED_GENUS_DENSITY
    # incompletely recorded hauls: not recorded, not a zero nor an undercount
    trawl = wide[wide["source_id"] == "split_trawl"].set_index("event_id")
    assert trawl.loc[["H7", "H8"], PER_KM2.format("Keldora")].isna().all()
    assert PER_KM2.format("Keldora alba") not in wide.columns and PER_KM2.format("Keldora nigra") not in wide.columns
    # a taxon without a genus stays as it is
    assert trawl[PER_KM2.format("Ostravix keldensis")].tolist() == [1.0 / e for e in (0.5, 0.25, 0.5, 0.5, 0.25, 0.5, 0.5, 0.5)]


def test_without_rollup_the_series_breaks(study: Study) -> None:
    wide = read_wide(study, link_gridded=False)
    trawl = wide[wide["source_id"] == "split_trawl"]
    years_with_genus = set(trawl.loc[trawl[PER_KM2.format("Keldora")].notna(), "season_year"])
    assert years_with_genus == {2018, 2019}


def test_consistent_taxa_gives_a_continuous_yearly_series(study: Study) -> None:
    wide = read_wide(study, ExportFilters(consistent_taxa=True), link_gridded=False)
    trawl = wide[wide["source_id"] == "split_trawl"]
    per_year = trawl.groupby("season_year")[PER_KM2.format("Keldora")].apply(lambda s: s.notna().sum())
    assert per_year.to_dict() == {2018: 2, 2019: 1, 2020: 2, 2021: 1}
    assert _keldora(wide) == EXPECTED_GENUS_DENSITY


def test_long_rows_zero_filled_flags_and_presence(study: Study) -> None:
    long = read_long(study, ExportFilters(taxon_level="genus"))
    k = long[long["variable"] == "Keldora"].set_index("event_id")
    assert k.loc["H4", "value"] == 8.0 and k.loc["H4", "density"] == 16.0
    assert "taxon_rolled_up" in list(k.loc["H4", "row_flags"])
    assert bool(k.loc["H5", "zero_filled"]) is True          # both members inferred
    assert bool(k.loc["H6", "zero_filled"]) is False         # one member caught
    assert "taxon_rolled_up" not in list(k.loc["H1", "row_flags"])   # the genus's own record
    # presence: any member present -> present once (value 1, not the number of members)
    assert k.loc["P1", "quantity"] == "presence" and k.loc["P1", "value"] == 1.0
    assert k.loc["P2", "value"] == 1.0
    assert len(long["record_id"]) == long["record_id"].nunique()


def test_rollup_metadata_and_left_out_count(study: Study, tmp_path: Path) -> None:
    result = export(study, "long", tmp_path / "long.csv", ExportFilters(taxon_level="genus"))
    info = result.metadata["counts"]["taxon_rollup"]
    assert info["rolled_into"] == {"Keldora alba": "Keldora", "Keldora nigra": "Keldora"}
    assert info["values_left_out_incomplete"] == 2      # H7 and H8
    assert result.metadata["filters"]["taxon_level"] == "genus"


def test_unknown_rank_is_refused(study: Study) -> None:
    with pytest.raises(HarmonizeError, match=r"taxon level 'genera' is not a rank; choose from kingdom, phylum"):
        read_long(study, ExportFilters(taxon_level="genera"))


@pytest.mark.subprocess
def test_cli_wide_consistent_taxa(study: Study, tmp_path: Path) -> None:
    out = tmp_path / "wide.csv"
    res = subprocess.run([str(BIN), "--study", str(study.root), "export", "wide", str(out), "--consistent-taxa"],
                         capture_output=True, text=True, timeout=120, env={**os.environ, "COLUMNS": "200"})
    assert res.returncode == 0, res.stderr
    assert "taxa rolled up: 2 into 1 (Keldora); 2 values left out" in res.stdout
    wide = pd.read_csv(out)
    assert PER_KM2.format("Keldora alba") not in wide.columns and wide[PER_KM2.format("Keldora")].notna().sum() == 6
    res = subprocess.run([str(BIN), "--study", str(study.root), "export", "long", str(tmp_path / "l.csv"),
                          "--taxon-level", "genra"], capture_output=True, text=True, timeout=120)
    assert res.returncode == 2 and "taxon level 'genra' is not a rank" in res.stderr
    assert len(res.stderr.strip().splitlines()) == 1


def test_dwca_carries_taxon_id_as_scientific_name_id(study: Study, tmp_path: Path) -> None:
    import csv
    import io
    import zipfile

    def occurrences(filters: ExportFilters) -> list[dict[str, str]]:
        out = tmp_path / "a.zip"
        export(study, "dwca", out, filters)
        with zipfile.ZipFile(out) as zf:
            text = zf.read("occurrence.txt").decode("utf-8")
        return list(csv.DictReader(io.StringIO(text), delimiter="\t", quoting=csv.QUOTE_NONE))

    ids = {(r["scientificName"], r["scientificNameID"]) for r in occurrences(ExportFilters())}
    # tests/rollup_store.py: taxon ids urn:test:<name>; Ostravix keldensis has none
    assert ("Keldora alba", "urn:test:alba") in ids and ("Keldora", "urn:test:keldora") in ids
    assert ("Ostravix keldensis", "") in ids
    rolled = {r["scientificName"] for r in occurrences(ExportFilters(taxon_level="genus"))}
    assert "Keldora" in rolled and "Keldora alba" not in rolled


def test_a_targets_own_record_keeps_its_id(study: Study) -> None:
    plain = read_long(study).set_index(["event_id", "variable", "quantity"])["record_id"]
    rolled = read_long(study, ExportFilters(taxon_level="genus"))
    k = rolled[rolled["variable"] == "Keldora"].set_index(["event_id", "variable", "quantity"])["record_id"]
    assert k.loc[("H1", "Keldora", "count")] == plain.loc[("H1", "Keldora", "count")]
    assert k.loc[("H4", "Keldora", "count")] not in set(plain)
