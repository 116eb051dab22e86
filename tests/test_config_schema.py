"""Strict configuration: every section and key is known, and the JSON Schemas agree with the loaders."""

from __future__ import annotations

import json
import re
import tomllib
from pathlib import Path

import jsonschema
import numpy as np
import pytest
from cli_runner import run_cli

from harmonize.config_spec import generated_schemas, kinds, schema_file_name, shipped_schema
from harmonize.demo.build import generators
from harmonize.demo.sea import write_study
from harmonize.errors import ConfigError
from harmonize.study import load_study
from harmonize.templates import write_starter

ROOT = Path(__file__).resolve().parent.parent
KINDS = kinds()


def _schema(name: str, fragment: bool = False) -> dict:
    doc = json.loads(shipped_schema(name))
    return {**doc, "required": []} if fragment else doc


def _schema_for(doc: dict, fallback: str | None) -> str:
    source = doc.get("source")
    if isinstance(source, dict) and source.get("kind") in KINDS:
        return schema_file_name(source["kind"])
    if fallback == "study":
        return schema_file_name(None)
    return schema_file_name(fallback)


def _assert_valid(doc: dict, name: str, where: str, fragment: bool = False) -> None:
    schema = _schema(name, fragment)
    jsonschema.Draft202012Validator.check_schema(schema)
    errors = [f"{'.'.join(map(str, e.path))}: {e.message}"
              for e in jsonschema.Draft202012Validator(schema).iter_errors(doc)]
    assert not errors, f"{where} against {name}: {errors}"


def test_shipped_schemas_are_generated_from_the_definition() -> None:
    # python -m harmonize.config_spec rewrites them; a stale file fails here
    for name, text in generated_schemas().items():
        assert shipped_schema(name) == text, f"{name} is stale: run python -m harmonize.config_spec"


def test_schemas_refuse_what_the_loaders_refuse() -> None:
    study = _schema(schema_file_name(None))
    validator = jsonschema.Draft202012Validator(study)
    assert not validator.is_valid({"study": {"name": "x", "crs": "EPSG:6933", "cell_size_km": 25,
                                             "domain": "d.geojson", "cel_size": 3}})
    assert not validator.is_valid({"season": {"winter": [1]}})
    trawl = jsonschema.Draft202012Validator(_schema(schema_file_name("trawl")))
    base = {"source": {"id": "x", "kind": "trawl", "provider_type": "agency"}}
    assert trawl.is_valid({**base, "units": {"weight": "g"}})
    assert not trawl.is_valid({**base, "unit": {"weight": "g"}})
    assert not trawl.is_valid({**base, "units": {"wieght": "g"}})  # fields come from the Table Schema
    assert trawl.is_valid({**base, "columns": {"events": {"start_time": ["DATE", "TIME"]}}})
    assert not trawl.is_valid({**base, "columns": {"events": {"event_id": ["A", "B"]}}})  # date-time fields only
    assert trawl.is_valid({**base, "formats": {"start_lat": "degrees_minutes_seconds"}})
    assert not trawl.is_valid({**base, "formats": {"start_lat": "percent"}})
    assert not trawl.is_valid({**base, "formats": {"net_width_m": "percent"}})
    plankton = jsonschema.Draft202012Validator(_schema(schema_file_name("plankton")))
    p_base = {"source": {"id": "x", "kind": "plankton", "provider_type": "agency"}}
    assert plankton.is_valid({**p_base, "formats": {"split_fraction": "percent", "lat": "degrees_minutes"}})
    assert not plankton.is_valid({**p_base, "formats": {"split_fraction": "degrees_minutes"}})
    effort = jsonschema.Draft202012Validator(_schema(schema_file_name("effort")))
    e_base = {"source": {"id": "x", "kind": "effort", "provider_type": "industry"}}
    assert not effort.is_valid({**e_base, "formats": {"lat": "degrees_minutes"}})  # read by its own reader
    assert not trawl.is_valid({**base, "source": {**base["source"], "provider_type": "friend"}})


def test_every_fixture_profile_and_study_validates() -> None:
    files = sorted((ROOT / "fixtures").rglob("*.toml"))
    files = [f for f in files if "fuzz" not in f.parts]
    assert len(files) >= 9
    for path in files:
        doc = tomllib.loads(path.read_text(encoding="utf-8"))
        _assert_valid(doc, _schema_for(doc, "study" if path.name == "study.toml" else None), str(path))


def test_every_documented_toml_example_validates() -> None:
    # fragments (a [fishing] section alone) are checked without the required sections
    pages = sorted((ROOT / "docs").rglob("*.md")) + [ROOT / "README.md"]
    seen = 0
    for page in pages:
        for block in re.findall(r"```toml\n(.*?)```", page.read_text(encoding="utf-8"), re.S):
            doc = tomllib.loads(block)
            fallback = page.stem if page.parent.name == "sources" else "study"
            _assert_valid(doc, _schema_for(doc, fallback), str(page), fragment=True)
            seen += 1
    assert seen >= 6


def test_init_templates_point_to_their_schema_and_validate(tmp_path: Path) -> None:
    write_starter(tmp_path / "s")
    study_toml = tmp_path / "s" / "study.toml"
    first = study_toml.read_text().splitlines()[0]
    assert first == "#:schema ./schemas/study.schema.json"
    assert (tmp_path / "s" / "schemas" / "study.schema.json").read_text() == shipped_schema("study.schema.json")
    _assert_valid(tomllib.loads(study_toml.read_text()), "study.schema.json", str(study_toml))
    for kind in KINDS:
        path = tmp_path / "s" / "profiles" / f"example_{kind}.toml"
        text = path.read_text()
        line = text.splitlines()[0]
        assert line == f"#:schema ../schemas/profile-{kind}.schema.json"
        assert (path.parent / line.split(" ", 1)[1]).resolve().is_file()
        _assert_valid(tomllib.loads(text), f"profile-{kind}.schema.json", str(path))


@pytest.fixture(scope="module")
def demo_profiles(tmp_path_factory: pytest.TempPathFactory) -> Path:
    folder = tmp_path_factory.mktemp("demo")
    write_study(folder)
    for generate in generators().values():
        generate(folder, np.random.default_rng(1))
    return folder


def test_every_demo_profile_validates(demo_profiles: Path) -> None:
    _assert_valid(tomllib.loads((demo_profiles / "study.toml").read_text()), "study.schema.json", "demo study")
    profiles = sorted((demo_profiles / "profiles").glob("*.toml"))
    assert {tomllib.loads(p.read_text())["source"]["kind"] for p in profiles} == set(KINDS)
    for path in profiles:
        doc = tomllib.loads(path.read_text())
        _assert_valid(doc, _schema_for(doc, None), str(path))


# --------------------------------------------------------------------------- misspelt sections
# Each config-file kind: the misspelling, the message's key and the closest valid name.
STUDY_MISTAKES = [
    ("[seasons]", "[season]", "season", "seasons"),
    ("[audit]", "[audti]", "audti", "audit"),
    ("cell_size_km = 25", "cel_size = 25\ncell_size_km = 25", "study.cel_size", "cell_size_km"),
    ("[depth]", "[dept]", "dept", "depth"),
]


@pytest.mark.parametrize(("old", "new", "key", "closest"), STUDY_MISTAKES)
def test_misspelt_study_section_is_exit_2_with_the_closest_name(study_dir: Path, old: str, new: str, key: str,
                                                                  closest: str) -> None:
    path = study_dir / "study.toml"
    text = path.read_text()
    assert old in text
    path.write_text(text.replace(old, new, 1))
    with pytest.raises(ConfigError, match=rf"study\.toml: {re.escape(key)}: unknown .*did you mean '{closest}'"):
        load_study(study_dir)
    result = run_cli("--study", str(study_dir), "status")
    assert result.exit_code == 2
    assert result.stdout == ""
    line = result.stderr.strip()
    assert "\n" not in line
    assert f"did you mean '{closest}'?" in line and "study.toml" in line
    assert "Valid names" in line


# kind -> (profile text to add a misspelt section to, the misspelt section, its closest valid name)
PROFILE_MISTAKES = {
    "trawl": ("[unit]\nweight = \"g\"\n", "unit", "units"),
    "plankton": ("[cloging]\nstatus_values = [\"clogged\"]\n", "cloging", "clogging"),
    "transect": ("[strips]\nflying = \"snapshot\"\n", "strips", "strip"),
    "opportunistic": ("[duplicate]\ndistance_km = 1.0\n", "duplicate", "duplicates"),
    "gridded": ("[aggregates]\nperiod = \"season\"\n", "aggregates", "aggregate"),
    "effort": ("[fishin]\nspeed_min_kn = 1.0\n", "fishin", "fishing"),
}


@pytest.mark.parametrize("kind", KINDS)
def test_misspelt_profile_section_is_exit_2_with_the_closest_name(study_dir: Path, kind: str) -> None:
    extra, section, closest = PROFILE_MISTAKES[kind]
    write_starter(study_dir / "fresh")  # the example profile of every kind
    profile = study_dir / "profiles" / f"mine_{kind}.toml"
    text = (study_dir / "fresh" / "profiles" / f"example_{kind}.toml").read_text()
    profile.write_text(text + "\n" + extra)
    result = run_cli("--study", str(study_dir), "check", f"mine_{kind}", str(study_dir / "nothing.csv"))
    assert result.exit_code == 2, result.stdout + result.stderr
    line = result.stderr.strip()
    assert "\n" not in line
    assert f"mine_{kind}.toml: {section}: unknown section [{section}]; did you mean '{closest}'?" in line
    assert "source" in line.split("Valid names", 1)[1]


def test_unknown_key_inside_a_section_names_the_closest_key(study_dir: Path) -> None:
    profile = study_dir / "profiles" / "trawl_agency.toml"
    profile.write_text(profile.read_text().replace("[source]\n", "[source]\ntimezon = \"UTC\"\n", 1))
    result = run_cli("--study", str(study_dir), "check", "trawl_agency", "--events", "a.csv", "--records", "b.csv")
    assert result.exit_code == 2
    assert "source.timezon: unknown key; did you mean 'timezone'?" in result.stderr


def test_gear_table_keys_are_checked_too(study_dir: Path) -> None:
    profile = study_dir / "profiles" / "effort_pings.toml"
    profile.write_text(profile.read_text() + "\n[fishing.gears.XYZ]\ncontakt = \"bottom\"\n")
    result = run_cli("--study", str(study_dir), "check", "effort_pings", "x.csv")
    assert result.exit_code == 2
    assert "fishing.gears.XYZ.contakt: unknown key; did you mean 'contact'?" in result.stderr
