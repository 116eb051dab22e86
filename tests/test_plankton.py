"""Plankton net tows: volume filtered, raised counts, densities, depth layers, zeros and bad tows."""

from __future__ import annotations

import math
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pint
import pytest

from harmonize import Store, load_study, run
from harmonize.adapters.plankton import (
    individuals_per_m2,
    mouth_area_m2,
    normalise_life_stage,
    raised_count,
    volume_filtered_m3,
)
from harmonize.errors import ConfigError

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures" / "plankton"
UREG = pint.UnitRegistry()


@pytest.fixture
def plankton_dir(study_dir: Path) -> Path:
    for f in FIXTURES.glob("*.csv"):
        shutil.copy(f, study_dir / f.name)
    return study_dir


def _inputs(folder: Path) -> dict[str, Path]:
    return {"events": folder / "tows_messy.csv", "records": folder / "counts_messy.csv"}


def _observations(study_dir: Path) -> pd.DataFrame:
    with Store(study_dir / "store").connect() as con:
        return con.sql("SELECT * FROM observations ORDER BY event_id, variable, life_stage").df()


# --- the computations against outside sources ----------------------------------------------

def test_worked_example_volume_density_and_per_m2() -> None:
    # Worked example (arithmetic on the formulas of the BCO-DMO parameter documentation for
    # net tows; /work/shared/NOTES.md): a 60 cm ring (0.28274 m2) with 268.73 m of water
    # through it filters 75.98 m3; 500 animals give 6.5805 per m3, 1,316.1 per m2 over 0-200 m.
    area = mouth_area_m2(np.array([0.60]))
    assert area[0] == pytest.approx(0.28274, abs=5e-6)
    assert area[0] == pytest.approx(math.pi * 0.60**2 / 4, rel=1e-15)  # pi d^2 / 4
    volume = volume_filtered_m3(np.array([1000.0]), np.array([0.26873]), area)  # 1000 revs x 0.26873 m = 268.73 m
    assert volume[0] == pytest.approx(75.98, abs=0.005)
    density = 500 / volume
    assert density[0] == pytest.approx(6.5805, abs=5e-5)
    assert individuals_per_m2(density, [0.0], [200.0])[0] == pytest.approx(1316.1, abs=0.05)


def test_split_counts_are_raised_by_the_fraction() -> None:
    # A quarter split counted 30 animals: the whole sample held 30 / 0.25 = 120
    # (subsampling arithmetic, BCO-DMO parameter documentation); a blank split is the whole sample.
    assert raised_count(np.array([30.0, 64.0, 12.0]), np.array([0.25, 0.125, np.nan])).tolist() == [120.0, 512.0, 12.0]


def test_provider_units_convert_like_pint() -> None:
    # The profile gives the mouth in cm and the volume in litres; pint (reference library)
    # says what those are in m and m3.
    from harmonize.units import to_canonical

    assert to_canonical(np.array([60.0]), "length", "cm")[0] == pytest.approx(UREG.Quantity(60, "cm").to("m").magnitude)
    assert to_canonical(np.array([50000.0]), "volume", "L")[0] == pytest.approx(UREG.Quantity(50000, "L").to("m**3").magnitude)


def test_life_stages_are_singular_and_lower_case() -> None:
    stages = normalise_life_stage(pd.Series(["Larvae", "ADULTS", " adult ", None, "copepodite"]))
    assert stages.tolist()[:3] == ["larva", "adult", "adult"] and pd.isna(stages[3]) and stages[4] == "copepodite"


# --- the messy fixture end to end ----------------------------------------------------------

def test_messy_tows_accounting_and_reasons(plankton_dir: Path) -> None:
    study = load_study(plankton_dir)
    result = run(study, "plankton_agency", _inputs(plankton_dir))
    assert result.status == "complete"
    assert result.rows_read == 16 + 18
    assert result.rows_read == result.rows_accepted + result.rows_quarantined
    q = result.quarantine
    reasons = dict(zip(q["source_row"].astype(str) + "@" + q["source_file"], q["reason_code"], strict=True))
    assert reasons == {
        "4@tows_messy.csv": "duplicate_record",
        "5@tows_messy.csv": "out_of_range",        # depth_min deeper than depth_max
        "6@tows_messy.csv": "clogged_net",         # net_status "Clogged"
        "7@tows_messy.csv": "bad_effort",          # 0 revolutions: nothing filtered
        "8@tows_messy.csv": "implausible_speed",   # 90000 revolutions in 5 minutes
        "10@tows_messy.csv": "outside_domain",
        "11@tows_messy.csv": "bad_time",
        "12@tows_messy.csv": "missing_value",      # neither flowmeter nor volume
        "13@tows_messy.csv": "end_before_start",
        "14@tows_messy.csv": "bad_type",           # mouth diameter 'sixty'
        "16@tows_messy.csv": "clogged_net",        # filtration efficiency 0.5 < 0.7
        "10@counts_messy.csv": "out_of_range",     # counts of the upside-down tow follow it
        "11@counts_messy.csv": "clogged_net",      # counts of the clogged tow follow it
        "13@counts_messy.csv": "orphan_record",
        "14@counts_messy.csv": "unknown_taxon",
        "15@counts_messy.csv": "out_of_range",     # split fraction 4
        "16@counts_messy.csv": "out_of_range",     # negative count
        "17@counts_messy.csv": "bad_type",         # count 'many'
        "18@counts_messy.csv": "missing_value",    # no taxon
    }
    messages = dict(zip(q["source_row"].astype(str) + "@" + q["source_file"], q["message"], strict=True))
    assert "split_fraction (column 'SPLIT') = 4" in messages["15@counts_messy.csv"]
    assert "depth_min_m 150 m is deeper than depth_max_m 50 m" in messages["5@tows_messy.csv"]
    assert "filtration efficiency 0.50" in messages["16@tows_messy.csv"]
    assert "80.62 m/s" in messages["8@tows_messy.csv"]
    assert Store(study.store_dir).check() == []


def test_messy_tows_volumes_densities_layers(plankton_dir: Path) -> None:
    run(load_study(plankton_dir), "plankton_agency", _inputs(plankton_dir))
    obs = _observations(plankton_dir)
    tows = obs.drop_duplicates("event_id").set_index("event_id")
    assert sorted(tows.index) == ["P001", "P002", "P003", "P009", "P015"]
    area60, area50 = math.pi * 0.6**2 / 4, math.pi * 0.5**2 / 4  # pi d^2 / 4
    expected_volume = {"P001": 1000 * 0.26873 * area60, "P002": 800 * 0.26873 * area60,
                       "P003": 1500 * 0.26873 * area60, "P009": 50.0, "P015": 100 * 0.26873 * area50}
    for tow, v in expected_volume.items():
        assert tows.loc[tow, "effort"] == pytest.approx(v, rel=1e-12)
    assert set(obs["effort_unit"]) == {"m3"}
    # the study's layers: surface 0-10, epipelagic 10-200, mesopelagic 200-1000 m
    assert tows["depth_layer"].to_dict() == {"P001": "integrated", "P002": "epipelagic", "P003": "mesopelagic",
                                             "P009": "epipelagic", "P015": "surface"}
    assert tows["season"].to_dict() == {"P001": "spring", "P002": "spring", "P003": "autumn",
                                        "P009": "spring", "P015": "autumn"}
    assert "volume_given" in tows.loc["P009", "flags"]

    row = obs.set_index(["event_id", "variable", "life_stage"])
    # 500 adults in P001 (the worked example): 6.5805 per m3, 1,316.1 per m2 over 0-200 m
    p1 = row.loc[("P001", "Thysseia borealis", "adult")]
    assert p1["density"] == pytest.approx(6.5805, abs=5e-5)
    assert p1["density"] * (p1["depth_max_m"] - p1["depth_min_m"]) == pytest.approx(1316.1, abs=0.05)
    # 120 larvae counted in a half split -> 240; 30 adults in a quarter + 10 in a whole -> 130
    assert row.loc[("P001", "Thysseia borealis", "larva"), "value"] == 240
    copelix = row.loc[("P001", "Copelix marina", "adult")]
    assert copelix["value"] == 130 and sorted(copelix["flags"]) == [
        "counts_incomplete", "merged_rows", "mixed_subsample_fractions", "raised_from_subsample"]
    # what was counted stays: 30 + 10 = 40 animals, 40 / 130 of the sample (issue 17)
    assert copelix["count_observed"] == 40 and copelix["subsample_fraction"] == pytest.approx(40 / 130)
    assert list(copelix["source_record_rows"]) == [3, 4]
    assert row.loc[("P002", "Copelix marina", "adult"), "density"] == pytest.approx(512 / expected_volume["P002"])
    assert row.loc[("P003", "Copelix marina", "adult"), "value"] == 3  # "ADULTS" read as adult


def test_zero_filling_by_stage(plankton_dir: Path) -> None:
    run(load_study(plankton_dir), "plankton_agency", _inputs(plankton_dir))
    obs = _observations(plankton_dir)
    zeros = obs[obs["zero_filled"]]
    got = {(e, v, s if isinstance(s, str) else None) for e, v, s in zip(zeros["event_id"], zeros["variable"], zeros["life_stage"], strict=True)}
    assert got == {
        ("P001", "Nauplia keldica", None),
        # P002: Thysseia counted without a stage could be adults or larvae: no zero for either
        # P003: quarantined Nauplia and Copelix rows block their zeros; larvae of Thysseia absent
        ("P003", "Thysseia borealis", "larva"),
        ("P009", "Nauplia keldica", None), ("P009", "Thysseia borealis", "adult"), ("P009", "Thysseia borealis", "larva"),
        # P015 caught nothing: every target and stage is a zero
        ("P015", "Copelix marina", "adult"), ("P015", "Nauplia keldica", None),
        ("P015", "Thysseia borealis", "adult"), ("P015", "Thysseia borealis", "larva"),
    }
    assert (zeros["value"] == 0).all() and (zeros["density"] == 0).all()
    assert obs["record_id"].is_unique


def test_mouth_area_column_and_volume_only_source(study_dir: Path) -> None:
    (study_dir / "t.csv").write_text(
        "event_id,time,duration,lat,lon,depth_min_m,depth_max_m,mouth_area_m2,flowmeter_revs,m_per_rev,volume_m3\n"
        "A,2020-03-01T10:00,10,43,-152,0,50,0.5,2000,0.3,\n"
        "B,2020-03-01T11:00,,43,-152,0,50,,,,-4\n"
        "C,2020-03-01T12:00,10,43,-152,0,50,,2000,0.3,\n")
    (study_dir / "c.csv").write_text("event_id,taxon,count\nA,copelix,10\n")
    (study_dir / "profiles" / "plankton_plain.toml").write_text(
        '[source]\nid = "plain"\nkind = "plankton"\nprovider_type = "agency"\n\n[units]\nduration = "min"\n')
    result = run(load_study(study_dir), "plankton_plain", {"events": study_dir / "t.csv", "records": study_dir / "c.csv"})
    q = result.quarantine.set_index("source_row")
    assert q.loc[2, "reason_code"] == "bad_effort" and "-4 m3" in q.loc[2, "message"]
    assert q.loc[3, "reason_code"] == "missing_value" and "mouth_area_m2 or mouth_diameter_m" in q.loc[3, "message"]
    obs = _observations(study_dir)
    # no protocol: nothing zero-filled; 2000 revs x 0.3 m x 0.5 m2 = 300 m3 in 10 min (1 m/s)
    assert len(obs) == 1 and obs["effort"].iloc[0] == pytest.approx(300.0)
    assert obs["density"].iloc[0] == pytest.approx(10 / 300)
    assert obs["event_end"].iloc[0] == pd.Timestamp("2020-03-01T10:10", tz="UTC")


@pytest.mark.parametrize(("section", "match"), [
    ('[clogging]\nmin_efficiency = 1.5\n', r"clogging\.min_efficiency: expected a filtration efficiency between 0 and 1"),
    ('[clogging]\nstatus_values = "clogged"\n', r"clogging\.status_values: expected a list"),
    ('[tow]\nmax_speed_m_s = 0\n', r"tow\.max_speed_m_s: expected a positive number"),
    ('[tow]\nmax_speed = 2\n', r"tow\.max_speed: unknown key"),
])
def test_bad_tow_rules_are_config_errors(plankton_dir: Path, section: str, match: str) -> None:
    profile = plankton_dir / "profiles" / "plankton_agency.toml"
    text = profile.read_text().split("[clogging]")[0]
    profile.write_text(text + section)
    with pytest.raises(ConfigError, match=match):
        run(load_study(plankton_dir), "plankton_agency", _inputs(plankton_dir), write=False)
