"""study.toml and profile validation: every mistake names the file, the key and what is expected."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from harmonize.errors import ConfigError
from harmonize.profile import find_profile
from harmonize.study import load_study


def _edit(study_dir: Path, old: str, new: str, name: str = "study.toml") -> None:
    path = study_dir / name
    text = path.read_text()
    assert old in text, old
    path.write_text(text.replace(old, new))


def test_fixture_study_loads(study_dir: Path) -> None:
    study = load_study(study_dir)
    assert study.name == "Keldmar Sea test study"
    assert [layer.name for layer in study.depth_layers] == ["surface", "epipelagic", "mesopelagic"]
    assert [name for name, _ in study.strata] == ["Vossa Bank", "Thorne Deep"]
    assert study.month_to_season[12] == "winter" and study.month_to_season[7] == "summer"
    assert study.taxa.loc[study.taxa["taxon"] == "Calverion rubrum", "sensitive"].item() is True


@pytest.mark.parametrize(
    ("old", "new", "pattern"),
    [
        ('crs = "EPSG:6933"', 'crs = "EPSG:999999"', r"study\.toml: study\.crs: 'EPSG:999999' is not a CRS"),
        ('crs = "EPSG:6933"', 'crs = "EPSG:4326"', r"study\.crs: 'EPSG:4326' is geographic"),
        ("cell_size_km = 25", "cell_size_km = -5", r"study\.cell_size_km: expected a number above 0, got -5"),
        ("cell_size_km = 25", 'cell_size_km = "big"', r"study\.cell_size_km: expected a number, got 'big'"),
        ("autumn = [9, 10, 11]", "autumn = [9, 10, 11, 12]", r"seasons\.autumn: month 12 is already in season 'winter'"),
        ("autumn = [9, 10, 11]", "autumn = [9, 10]", r"\[seasons\]: months \[11\] belong to no season"),
        ("top_m = 200", "top_m = 150", r"depth_layers\[3\]\.top_m: expected 200 \(layers are contiguous from 0\), got 150"),
        ('domain = "domain.geojson"', 'domain = "../outside.geojson"', r"study\.domain: path '\.\./outside\.geojson' leads outside the study folder"),
        ('domain = "domain.geojson"', 'domain = "nowhere.geojson"', r"study\.domain: file 'nowhere\.geojson' does not exist"),
        ('list = "taxa.csv"', 'list = "missing.csv"', r"taxa\.list: file 'missing\.csv' does not exist"),
        ('name = "Keldmar Sea test study"\n', "", r"study\.name: is missing"),
        ("[study]", "[studdy]", r"studdy: unknown section \[studdy\]; did you mean 'study'\? Valid names at the top level: study, seasons,"),
        ("near_bottom_m = 10", "near_bottom_m = 10\nnear_bottom_m = 5", r"study\.toml: is not valid TOML"),
    ],
)
def test_study_mistakes_name_file_key_and_expectation(study_dir: Path, old: str, new: str, pattern: str) -> None:
    _edit(study_dir, old, new)
    with pytest.raises(ConfigError, match=pattern) as info:
        load_study(study_dir)
    assert "\n" not in str(info.value)


def test_targets_must_name_known_taxa(study_dir: Path) -> None:
    with open(study_dir / "targets.csv", "a") as fh:
        fh.write("keldmar_bottom_trawl,Imaginaria nowhere,,,\n")
    with pytest.raises(ConfigError, match=r"targets\.csv: taxa\.targets: target taxa \['Imaginaria nowhere'\] are not in the taxa list"):
        load_study(study_dir)


def test_alias_given_to_two_taxa_is_refused(study_dir: Path) -> None:
    with open(study_dir / "taxa.csv", "a") as fh:
        fh.write("Ostravix minor,fish,Keld Cod,false\n")
    with pytest.raises(ConfigError, match=r"name 'keld cod' is given to more than one taxon"):
        load_study(study_dir)


def test_missing_study_file(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match=r"no study\.toml here; run 'harmonize init DIR'"):
        load_study(tmp_path)


def test_profile_outside_study_is_refused(study_dir: Path, tmp_path: Path) -> None:
    outside = tmp_path / "elsewhere.toml"
    outside.write_text((study_dir / "profiles" / "trawl_agency.toml").read_text())
    study = load_study(study_dir)
    with pytest.raises(ConfigError, match=re.escape("profile lies outside the study folder")):
        find_profile(study, outside)


def test_unknown_profile_lists_known_ones(study_dir: Path) -> None:
    study = load_study(study_dir)
    with pytest.raises(ConfigError, match=r"no such profile; profiles in the study: .*trawl_agency"):
        find_profile(study, "trawl_agensy")
