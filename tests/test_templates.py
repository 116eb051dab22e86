"""harmonize init: the starter files load, and every example profile is valid for its adapter."""

from __future__ import annotations

from pathlib import Path

import pytest

from harmonize.adapters.registry import get_adapter, kinds
from harmonize.profile import load_profile
from harmonize.study import load_study
from harmonize.templates import write_starter

KINDS = kinds()


def test_starter_study_loads(tmp_path: Path) -> None:
    write_starter(tmp_path / "s")
    study = load_study(tmp_path / "s")
    assert [layer.name for layer in study.depth_layers] == ["epipelagic", "mesopelagic", "deep"]
    assert study.taxa.empty


@pytest.mark.parametrize("kind", KINDS)
def test_example_profile_is_valid_and_lists_every_field(tmp_path: Path, kind: str) -> None:
    write_starter(tmp_path / "s")
    study = load_study(tmp_path / "s")
    adapter = get_adapter(kind)
    path = tmp_path / "s" / "profiles" / f"example_{kind}.toml"
    profile = load_profile(path, study, adapter.table_fields())
    assert profile.kind == kind
    text = path.read_text()
    if kind == "trawl":  # hand-written with realistic column names
        return
    for names in adapter.table_fields().values():
        for name in names:
            assert f"# {name} = " in text


def test_init_refuses_to_overwrite(tmp_path: Path) -> None:
    write_starter(tmp_path / "s")
    with pytest.raises(Exception, match="already exists"):
        write_starter(tmp_path / "s")


@pytest.mark.parametrize("kind", KINDS)
def test_templates_show_the_provider_format_options(tmp_path: Path, kind: str) -> None:
    write_starter(tmp_path / "s")
    text = (tmp_path / "s" / "profiles" / f"example_{kind}.toml").read_text()
    if kind in ("gridded", "effort"):  # read by their own readers, without [formats]
        assert "[formats]" not in text
        return
    assert "[formats]" in text and '= "degrees_minutes"' in text and "degrees_minutes_seconds" in text
    if kind == "plankton":
        assert '# split_fraction = "percent"' in text and "1/4, 25% and 0.25 are always read" in text
    if kind != "opportunistic":
        assert 'write ' in text and '= ["DATE", "TIME"]' in text
