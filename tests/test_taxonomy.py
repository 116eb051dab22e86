"""The taxa.csv hierarchy: ranks, parents, validation, ancestor lookup, resolution changes."""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import pytest

from harmonize.errors import ConfigError
from harmonize.study import load_study
from harmonize.taxonomy import Hierarchy, coarsest_targets, consistent_targets, resolution_changes

# An invented lineage (no real taxa): kingdom > ... > genus Keldora > species K. alba, K. nigra.
HIERARCHY_CSV = """\
taxon,group,aliases,sensitive,rank,parent,taxon_id,kingdom
Animalia keldica,,,false,kingdom,,urn:test:1,Animalia
Keldidae,fish,,false,family,Animalia keldica,urn:test:2,
Keldora,fish,,false,genus,Keldidae,urn:test:3,
Keldora alba,fish,white keldora,false,species,Keldora,urn:test:4,
Keldora nigra,fish,,false,species,Keldora,urn:test:5,Animalia
Ostravix keldensis,fish,keld cod,false,species,,,
"""


def _write(study_dir: Path, text: str) -> None:
    (study_dir / "taxa.csv").write_text(text, encoding="utf-8")
    (study_dir / "targets.csv").write_text("protocol,taxon\n", encoding="utf-8")


def test_old_taxa_file_without_hierarchy_columns_still_reads(study_dir: Path) -> None:
    study = load_study(study_dir)   # the fixture's taxa.csv has no rank/parent columns
    assert set(study.taxa["rank"]) == {""}
    assert set(study.taxa["parent"]) == {""}
    assert Hierarchy.from_taxa(study.taxa).at_rank("genus") == {}


def test_hierarchy_columns_are_read_and_kingdom_inherited(study_dir: Path) -> None:
    _write(study_dir, HIERARCHY_CSV)
    taxa = load_study(study_dir).taxa.set_index("taxon")
    assert taxa.loc["Keldora alba", "rank"] == "species"
    assert taxa.loc["Keldora alba", "parent"] == "Keldora"
    assert taxa.loc["Keldora alba", "taxon_id"] == "urn:test:4"
    # blank kingdom inherited from the kingdom row, three parents up
    assert taxa.loc["Keldora alba", "kingdom"] == "Animalia"
    assert taxa.loc["Ostravix keldensis", "kingdom"] == ""


def test_ancestor_at_rank(study_dir: Path) -> None:
    h = Hierarchy.from_taxa(_taxa(study_dir))
    assert h.at_rank("genus") == {"Keldora": "Keldora", "Keldora alba": "Keldora", "Keldora nigra": "Keldora"}
    fam = h.at_rank("family")
    assert fam["Keldora nigra"] == "Keldidae" and "Animalia keldica" not in fam
    assert "Ostravix keldensis" not in fam   # an unplaced species stays as it is
    assert h.at_rank("kingdom")["Keldora alba"] == "Animalia keldica"


def _taxa(study_dir: Path) -> pd.DataFrame:
    _write(study_dir, HIERARCHY_CSV)
    return load_study(study_dir).taxa


@pytest.mark.parametrize(("change", "message"), [
    (("Keldora alba,fish,white keldora,false,species,Keldora,", "Keldora alba,fish,white keldora,false,specie,Keldora,"),
     r"taxa\.list: data row 4 \(taxon 'Keldora alba'\) has rank 'specie'; expected one of kingdom, phylum"),
    (("Keldora nigra,fish,,false,species,Keldora,", "Keldora nigra,fish,,false,species,Keldra,"),
     r"data row 5 \(taxon 'Keldora nigra'\) has parent 'Keldra', which is not a taxon of this file"),
    (("Keldidae,fish,,false,family,Animalia keldica,", "Keldidae,fish,,false,family,Keldora alba,"),
     r"parents form a cycle \('.*' -> .* -> '.*'\); a taxon cannot be its own ancestor"),
    (("Keldora,fish,,false,genus,Keldidae,", "Keldora,fish,,false,genus,Keldora,"),
     r"parents form a cycle \('Keldora' -> 'Keldora'\)"),
    (("Keldora,fish,,false,genus,", "Keldora,fish,,false,order,"),
     r"data row 3: taxon 'Keldora' is a order but its ancestor 'Keldidae' is a family; ranks must descend"),
    (("urn:test:5", "urn:test:4"), r"taxon_id 'urn:test:4' is given to more than one taxon"),
    (("Keldora nigra,fish,,false,species,Keldora,urn:test:5,Animalia", "Keldora nigra,fish,,false,species,Keldora,urn:test:5,Plantae"),
     r"data row 5: taxon 'Keldora nigra' is in kingdom 'Plantae' but its ancestor 'Animalia keldica' is in kingdom 'Animalia'"),
])
def test_bad_hierarchy_is_refused_in_one_line(study_dir: Path, change: tuple[str, str], message: str) -> None:
    text = HIERARCHY_CSV.replace(*change)
    assert text != HIERARCHY_CSV
    _write(study_dir, text)
    with pytest.raises(ConfigError, match=message) as err:
        load_study(study_dir)
    assert "\n" not in str(err.value)


def test_rank_gap_through_unranked_parent_is_checked(study_dir: Path) -> None:
    # an unranked taxon between a species and another species: the nearest ranked ancestor counts
    text = HIERARCHY_CSV + "Keldora group,fish,,false,,Keldora alba,,\nKeldora minima,fish,,false,species,Keldora group,,\n"
    _write(study_dir, text)
    with pytest.raises(ConfigError, match=r"'Keldora minima' is a species but its ancestor 'Keldora alba' is a species"):
        load_study(study_dir)


def _recorded(rows: list[tuple[str, int, str]]) -> pd.DataFrame:
    return pd.DataFrame(rows, columns=["variable", "season_year", "source_id"]).assign(source_kind="trawl")


def test_genus_to_species_split_is_found(study_dir: Path) -> None:
    h = Hierarchy.from_taxa(_taxa(study_dir))
    rec = _recorded([("Keldora", y, "s1") for y in (2018, 2019)]
                    + [(sp, y, "s1") for y in (2020, 2021) for sp in ("Keldora alba", "Keldora nigra")]
                    + [("Ostravix keldensis", y, "s1") for y in (2018, 2019, 2020, 2021)])
    found = resolution_changes(rec, h)
    assert list(found["taxon"]) == ["Keldora"]
    row = found.iloc[0]
    assert row["own_years"] == [2018, 2019] and row["finer_years"] == [2020, 2021]
    assert row["finer"] == ["Keldora alba", "Keldora nigra"]
    assert row["only_own"] == ["s1 2018", "s1 2019"]
    assert consistent_targets(rec, h) == {"Keldora": "Keldora", "Keldora alba": "Keldora", "Keldora nigra": "Keldora"}


def test_same_resolution_everywhere_is_no_change(study_dir: Path) -> None:
    h = Hierarchy.from_taxa(_taxa(study_dir))
    # "Keldora sp." recorded beside its species in every year: consistent through time
    rec = _recorded([(t, y, "s1") for y in (2018, 2019) for t in ("Keldora", "Keldora alba")])
    assert resolution_changes(rec, h).empty
    assert consistent_targets(rec, h) == {}


def test_genus_in_one_source_species_in_another_is_a_change(study_dir: Path) -> None:
    h = Hierarchy.from_taxa(_taxa(study_dir))
    rec = _recorded([("Keldora", 2020, "volunteers"), ("Keldora alba", 2020, "agency")])
    found = resolution_changes(rec, h)
    assert found.iloc[0]["own_sources"] == ["volunteers"] and found.iloc[0]["finer_sources"] == ["agency"]


def test_nested_change_reports_the_coarsest(study_dir: Path) -> None:
    h = Hierarchy.from_taxa(_taxa(study_dir))
    rec = _recorded([("Keldidae", 2018, "s1"), ("Keldora", 2019, "s1"), ("Keldora alba", 2020, "s1")])
    assert list(resolution_changes(rec, h)["taxon"]) == ["Keldidae"]
    assert consistent_targets(rec, h)["Keldora alba"] == "Keldidae"


def test_coarsest_of_two_targets(study_dir: Path) -> None:
    h = Hierarchy.from_taxa(_taxa(study_dir))
    out = coarsest_targets(h, {"Keldora alba": "Keldora"}, {"Keldora alba": "Keldidae", "Keldora": "Keldidae"})
    assert out == {"Keldora alba": "Keldidae", "Keldora": "Keldidae"}


def test_ancestors_of_a_sensitive_taxon_are_sensitive(study_dir: Path) -> None:
    _write(study_dir, HIERARCHY_CSV.replace("Keldora nigra,fish,,false", "Keldora nigra,fish,,true"))
    taxa = load_study(study_dir).taxa.set_index("taxon")["sensitive"]
    # the species, its genus, family and kingdom; not its sister species nor an unrelated taxon
    assert taxa[taxa].index.tolist() == ["Animalia keldica", "Keldidae", "Keldora", "Keldora nigra"]
