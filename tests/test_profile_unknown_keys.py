"""An unknown key in a kind's profile section is refused by the profile's definition
(harmonize.config_spec, from the adapter's ``profile_sections``) before any adapter reads it:
the adapters keep no second list of their keys."""

from __future__ import annotations

import re
from pathlib import Path

import pytest
from gridded_files import write_profile

from harmonize.errors import ConfigError
from harmonize.ingest import prepare
from harmonize.study import load_study


def _with_key(study_dir: Path, profile: str, section: str, line: str) -> None:
    path = study_dir / "profiles" / f"{profile}.toml"
    text = path.read_text(encoding="utf-8")
    header = re.compile(rf"^\[{re.escape(section)}\][^\n]*\n", re.M)
    if header.search(text):
        text = header.sub(lambda m: m.group(0) + line + "\n", text, count=1)
    else:
        text += f"\n[{section}]\n{line}\n"
    path.write_text(text, encoding="utf-8")


@pytest.mark.parametrize(("profile", "section", "line", "message"), [
    ("effort_pings", "fishing", "max_gap_hours = 2", "fishing.max_gap_hours: unknown key; did you mean 'max_gap_h'?"),
    ("effort_pings", "fishing.gears.TBB", "speed_min = 2",
     "fishing.gears.TBB.speed_min: unknown key; did you mean 'speed_min_kn'?"),
    ("opportunistic_volunteer", "presence", 'token = ["seen"]', "presence.token: unknown key; did you mean 'tokens'?"),
    ("opportunistic_volunteer", "plausibility", 'earliest_date = "2015-01-01"',
     "plausibility.earliest_date: unknown key; did you mean 'earliest'?"),
    ("opportunistic_volunteer", "duplicates", "distance = 1", "duplicates.distance: unknown key; did you mean 'distance_km'?"),
    ("transect_agency", "strip", "width = 300", r"strip.width: unknown key. Valid names in \[strip\]: flying, max_speed_kn"),
    ("plankton_agency", "tow", "max_speed = 3", "tow.max_speed: unknown key; did you mean 'max_speed_m_s'?"),
    ("plankton_agency", "clogging", "min_eff = 0.5", "clogging.min_eff: unknown key; did you mean 'min_efficiency'?"),
])
def test_unknown_section_key_is_refused_by_the_definition(study_dir: Path, profile: str, section: str, line: str,
                                                          message: str) -> None:
    _with_key(study_dir, profile, section, line)
    with pytest.raises(ConfigError, match=message):
        prepare(load_study(study_dir), profile)


def test_unknown_aggregate_key_of_a_gridded_profile(study_dir: Path) -> None:
    write_profile(study_dir, "sst_sat", 'sst = "sea_surface_temperature"', extra="chunk = 8\n")
    with pytest.raises(ConfigError, match="aggregate.chunk: unknown key; did you mean 'chunk_mb'?"):
        prepare(load_study(study_dir), "sst_sat")


def test_unknown_key_of_a_variable_table(study_dir: Path) -> None:
    write_profile(study_dir, "sst_sat", 'sst = {name = "sea_surface_temperature", units = "K"}')
    with pytest.raises(ConfigError, match=r"variables.sst.units: unknown key; did you mean 'unit'\? Valid names in "
                                          r"\[variables.sst\]: name, unit, force_unit"):
        prepare(load_study(study_dir), "sst_sat")


@pytest.mark.parametrize(("content", "message"), [
    (b'[source]\nid = "keldmar_trawl\n', r"trawl_agency\.toml: is not valid TOML \("),
    ('[source]\nid = "kj\u00f8l"\n'.encode("latin-1"), r"trawl_agency\.toml: is not UTF-8 text"),
])
def test_a_profile_that_is_not_toml_text_is_named(study_dir: Path, content: bytes, message: str) -> None:
    """study.toml and the profiles are read by one function: the same two messages for both."""
    (study_dir / "profiles" / "trawl_agency.toml").write_bytes(content)
    with pytest.raises(ConfigError, match=message):
        prepare(load_study(study_dir), "trawl_agency")
    (study_dir / "study.toml").write_bytes(content)
    with pytest.raises(ConfigError, match=message.replace("trawl_agency", "study")):
        load_study(study_dir)
