"""The small items of issue 17 (finding 11), each from its rule."""

from __future__ import annotations

import re
from pathlib import Path
from types import SimpleNamespace

import numpy as np

import harmonize.colocate
from harmonize import load_study, run
from harmonize.audit.findings import DEFAULT_TOLERANCES
from harmonize.gridded.cf import CANONICAL_VARIABLES
from harmonize.store import Store
from harmonize.tagging import tag_depth_layer

ROOT = Path(__file__).resolve().parent.parent
LAYERS = [SimpleNamespace(name="surface", top_m=0, bottom_m=10), SimpleNamespace(name="deep", top_m=10, bottom_m=1000)]


def test_a_tow_from_the_surface_at_a_shallow_station_is_not_near_bottom() -> None:
    """0-8 m at a 9 m station samples the whole column (common practice); 6-8 m there and
    190-200 m at a 200 m station sample the water over the bottom."""
    got = tag_depth_layer(np.array([0.0, 6.0, 190.0, 50.0]), np.array([8.0, 8.0, 200.0, 60.0]),
                          np.array([9.0, 9.0, 200.0, 200.0]), LAYERS, 10.0)
    assert list(got) == ["surface", "near_bottom", "near_bottom", "deep"]


def test_every_default_tolerance_names_a_stored_variable() -> None:
    """The 0.2 salinity tolerance applies to the variable the store holds (CF standard name
    sea_water_practical_salinity), so no default is dead."""
    assert set(DEFAULT_TOLERANCES) <= set(CANONICAL_VARIABLES)
    assert DEFAULT_TOLERANCES["sea_water_practical_salinity"] == 0.2


def test_docs_name_only_hooks_that_exist() -> None:
    """docs/exports.md names harmonize functions; each must exist (event_covariates did not)."""
    text = (ROOT / "docs" / "exports.md").read_text()
    assert "event_covariates" not in text or hasattr(harmonize.colocate, "event_covariates")
    for module, name in re.findall(r"harmonize\.(colocate|export\.wide)\.(\w+)", text):
        mod = __import__(f"harmonize.{module}", fromlist=[name])
        assert hasattr(mod, name), f"docs/exports.md names harmonize.{module}.{name}, which does not exist"


def test_a_haul_whose_catch_rows_were_all_quarantined_is_not_a_sample(study_dir: Path) -> None:
    """docs/audit.md: what such a haul caught is unknown, so it infers no zero for any target
    and yields no observation row (it is kept in events_without_values)."""
    from trawl_profiles import BASIC_PROFILE

    (study_dir / "profiles" / "trawl_basic.toml").write_text(BASIC_PROFILE)
    (study_dir / "h.csv").write_text(
        "HAUL_NO,START,END,LAT_S,LON_S,LAT_E,LON_E,WING_M,DEPTH_FM\n"
        "A1,2021-07-01T06:00,2021-07-01T06:30,43.0,-153.0,43.025,-153.0,20,40\n"
        "A2,2021-07-02T06:00,2021-07-02T06:30,43.5,-151.5,43.525,-151.5,20,60\n")
    (study_dir / "c.csv").write_text("HAUL,SPECIES,WT_G,N\nA1,Keldmar mystery fish,1000,2\nA2,keld cod,500,1\n")
    study = load_study(study_dir)
    result = run(study, "trawl_basic", {"events": study_dir / "h.csv", "records": study_dir / "c.csv"})
    assert list(result.events_without_values["event_id"]) == ["A1"]
    with Store(study.store_dir).connect() as con:
        events = {r[0] for r in con.sql("SELECT DISTINCT event_id FROM observations").fetchall()}
    assert events == {"A2"}
