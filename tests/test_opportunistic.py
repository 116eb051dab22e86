"""Volunteer and opportunistic records: checklists, incidental records, accounting, plausibility."""

from __future__ import annotations

import shutil
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pytest

from harmonize import Store, load_study, run
from harmonize.adapters.opportunistic import parse_counts, parse_effort_text
from harmonize.errors import ConfigError
from harmonize.privacy import pseudonymise, study_salt

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures" / "opportunistic"
PROFILE = "opportunistic_volunteer"


@pytest.fixture
def messy(study_dir: Path) -> Path:
    shutil.copy(FIXTURES / "volunteer_messy.csv", study_dir)
    return study_dir / "volunteer_messy.csv"


def _observations(study_dir: Path, where: str = "TRUE") -> pd.DataFrame:
    store = Store(study_dir / "store")
    with store.connect() as con:
        return con.execute(f"SELECT * FROM observations WHERE {where} ORDER BY event_id, variable").df()


def test_messy_volunteer_file_accounting_and_reasons(study_dir: Path, messy: Path) -> None:
    study = load_study(study_dir)
    result = run(study, PROFILE, {"rows": messy})
    assert result.status == "complete"
    assert result.rows_read == 18
    assert result.rows_read == result.rows_accepted + result.rows_quarantined
    reasons = dict(zip(result.quarantine["source_row"], result.quarantine["reason_code"], strict=True))
    assert reasons == {
        5: "absence_outside_checklist",   # a count of 0 in an incidental record
        6: "outside_domain",              # a position on land / far outside the sea
        7: "bad_time",                    # in the future
        8: "bad_time",                    # before [plausibility] earliest
        9: "unknown_taxon",
        10: "duplicate_record",           # record id S001 again
        11: "bad_type",                   # count "many"
        12: "duplicate_record",           # checklist L4 repeats checklist L1 ...
        13: "duplicate_record",           # ... row for row
        17: "out_of_range",               # a negative count
    }
    messages = dict(zip(result.quarantine["source_row"], result.quarantine["message"], strict=True))
    assert "checklist 'L4' repeats checklist 'L1'" in messages[12]
    assert "how_many" in messages[11] and "'many'" in messages[11]
    assert "1921-11-15 is before 2000-01-01" in messages[8]
    assert Store(study.store_dir).check() == []


def test_complete_checklists_carry_effort_and_zeros_incidental_records_do_not(study_dir: Path, messy: Path) -> None:
    run(load_study(study_dir), PROFILE, {"rows": messy})
    obs = _observations(study_dir)
    assert set(obs["provider_type"]) == {"volunteer"}
    by = {(e, v): r for e, v, r in zip(obs["event_id"], obs["variable"], obs.itertuples(), strict=True)}
    # L1: complete, 90 minutes -> effort 1.5 h; 12 fulmars -> 8 per hour; pale gull "noted" (the profile's [presence] token) -> presence
    fulmar = by[("L1", "Procellix keldica")]
    assert (fulmar.quantity, fulmar.value, fulmar.effort, fulmar.effort_unit) == ("count", 12.0, 1.5, "h")
    assert fulmar.density == pytest.approx(8.0)
    gull = by[("L1", "Larivox pallens")]
    assert gull.quantity == "presence" and gull.value == 1.0
    assert pd.isna(gull.effort) and pd.isna(gull.density) and not gull.zero_filled
    aukelle = by[("L1", "Aukelle minima")]
    assert aukelle.zero_filled and aukelle.value == 0.0 and aukelle.effort == 1.5
    # L5: a complete checklist in which nothing was seen -> a zero for each of the 3 targets
    assert sorted(obs.loc[obs["event_id"] == "L5", "variable"]) == ["Aukelle minima", "Larivox pallens", "Procellix keldica"]
    assert obs.loc[obs["event_id"] == "L5", "zero_filled"].all()
    # L6 lost its fulmar row (count -3): no zero is invented for the fulmar, the list is flagged
    l6 = obs[obs["event_id"] == "L6"]
    assert "Procellix keldica" not in set(l6["variable"])
    assert all("checklist_incomplete" in list(f) for f in l6["flags"])
    # L7: 400 minutes of watching is flagged as long effort
    assert all("long_effort" in list(f) for f in obs.loc[obs["event_id"] == "L7", "flags"])
    # L2 (not complete) and the incidental sighting: presence only, never zeros or densities
    loose = obs[obs["event_id"].isin(["L2"]) | obs["event_id"].str.startswith("inc-")]
    assert len(loose) == 2
    assert (loose["quantity"] == "presence").all() and (loose["value"] == 1.0).all()
    assert loose["effort"].isna().all() and loose["density"].isna().all() and not loose["zero_filled"].any()
    # zero rows exist only in complete checklists, and presence rows never carry effort
    assert set(obs.loc[obs["zero_filled"], "event_id"]) == {"L1", "L5", "L7"}
    presence = obs[obs["quantity"] == "presence"]
    assert presence["effort"].isna().all() and presence["density"].isna().all()


def test_observer_names_are_pseudonymised(study_dir: Path, messy: Path) -> None:
    study = load_study(study_dir)
    run(study, PROFILE, {"rows": messy})
    obs = _observations(study_dir)
    expected = pseudonymise(pd.Series(["Ann Vell"]), study_salt(study.root)).iloc[0]
    assert set(obs.loc[obs["event_id"] == "L1", "observer_id"]) == {expected}
    con = duckdb.connect()
    text = con.execute(
        "SELECT string_agg(CAST(COLUMNS(*) AS VARCHAR), '|') FROM read_parquet(?, hive_partitioning = true)",
        [str(study.store_dir / "observations" / "**" / "*.parquet")],
    ).fetchall()
    assert "Ann Vell" not in str(text) and "Vell" not in str(text)


def test_reingest_is_a_noop(study_dir: Path, messy: Path) -> None:
    study = load_study(study_dir)
    first = run(study, PROFILE, {"rows": messy})
    again = run(study, PROFILE, {"rows": messy})
    assert again.status == "unchanged" and again.ingest_id == first.ingest_id


def test_parse_counts() -> None:
    text = pd.Series(["3", "seen", "SEEN", "", None, "0", "many", "2.5", "-1", " 12 ", "present"])
    values, bad, fractional = parse_counts(text, ("seen",))
    np.testing.assert_array_equal(values[[0, 5, 8, 9]], [3.0, 0.0, -1.0, 12.0])
    assert np.isnan(values[[1, 2, 3, 4, 6, 10]]).all()
    # "present" is not a marker once the profile names its own
    assert bad.tolist() == [False] * 6 + [True] + [False] * 3 + [True]
    assert fractional.tolist() == [False] * 7 + [True] + [False] * 3


def test_default_presence_token_is_the_word_present_and_no_single_letter() -> None:
    values, bad, _ = parse_counts(pd.Series(["present", " Present ", "X", "x", "+"]))
    assert np.isnan(values[:2]).all() and bad.tolist() == [False, False, True, True, True]


PRESENCE_CASES = [
    ('[presence]\ntokens = "noted"\n', "presence.tokens.*list of non-empty words"),
    ('[presence]\ntokens = []\n', "presence.tokens.*list of non-empty words"),
    ('[presence]\ntokens = ["noted", " "]\n', "presence.tokens.*list of non-empty words"),
    ('[presence]\ntokens = ["0"]\n', "presence.tokens.*'0' is a number"),
    ('[presence]\ntoken = ["noted"]\n', "presence.token.*did you mean 'tokens'"),
]


@pytest.mark.parametrize(("section", "match"), PRESENCE_CASES)
def test_bad_presence_section_is_a_config_error(study_dir: Path, messy: Path, section: str, match: str) -> None:
    profile = study_dir / "profiles" / f"{PROFILE}.toml"
    text = profile.read_text()
    start, end = text.index("[presence]"), text.index("[plausibility]")
    profile.write_text(text[:start] + section + "\n" + text[end:])
    with pytest.raises(ConfigError, match=match):
        run(load_study(study_dir), PROFILE, {"rows": messy}, write=False)


def test_a_providers_own_marker_is_refused_until_the_profile_maps_it(study_dir: Path) -> None:
    data = study_dir / "marks.csv"
    data.write_text(HEADER_ROW + "d1,,2021-11-14T09:30,44.5,-152.0,Ann Vell,keld fulmar,X,,,\n")
    profile = study_dir / "profiles" / f"{PROFILE}.toml"
    result = run(load_study(study_dir), PROFILE, {"rows": data}, write=False)
    assert result.rows_quarantined == 1
    message = result.quarantine["message"].iloc[0]
    assert "'X'" in message and "'noted'" in message and "[presence] tokens" in message
    profile.write_text(profile.read_text().replace('tokens = ["noted"]', 'tokens = ["noted", "X"]'))
    assert run(load_study(study_dir), PROFILE, {"rows": data}, write=False).rows_quarantined == 0


def test_effort_text_and_units() -> None:
    # ISO 8601 durations: PT2H = 2 h, PT1H30M = 1.5 h (ISO 8601-1:2019, 5.5.2)
    hours = parse_effort_text(pd.Series(["90 minutes", "2 h", "PT2H", "PT1H30M", "45 min", "two hours", None]))
    np.testing.assert_allclose(hours[:5], [1.5, 2.0, 2.0, 1.5, 0.75])
    assert np.isnan(hours[5:]).all()


def test_duration_in_hours_with_units_section(study_dir: Path, messy: Path) -> None:
    profile = study_dir / "profiles" / f"{PROFILE}.toml"
    profile.write_text(profile.read_text() + '\n[units]\nduration_min = "h"\n')
    text = messy.read_text().replace(",true,90,0", ",true,1.5,0")
    messy.write_text(text)
    run(load_study(study_dir), PROFILE, {"rows": messy})
    obs = _observations(study_dir, "event_id = 'L1' AND quantity = 'count'")
    assert set(obs["effort"]) == {1.5}


def test_checklist_without_duration_keeps_its_zeros_without_effort(study_dir: Path) -> None:
    data = study_dir / "lists.csv"
    data.write_text(
        "sighting_id,list_id,obs_time,latitude,longitude,observer_name,species,how_many,all_reported,"
        "minutes_watched,km_travelled\n"
        "Q1a,Q1,2021-11-14T09:00,44.5,-152.0,Ann Vell,keld fulmar,4,true,,\n"
    )
    run(load_study(study_dir), PROFILE, {"rows": data})
    obs = _observations(study_dir)
    assert len(obs) == 3 and obs["effort"].isna().all() and obs["density"].isna().all()
    assert all("effort_missing" in list(f) for f in obs["flags"])


@pytest.mark.parametrize(("section", "match"), [
    ("[duplicates]\ndistance_km = -1\n", "duplicates.distance_km: expected a number above 0"),
    ("[duplicates]\nminutes = 'an hour'\n", "duplicates.minutes"),
    ("[duplicates]\nradius = 2\n", "duplicates.radius: unknown key"),
    ("[plausibility]\nearliest = 'soon'\n", "plausibility.earliest: 'soon' is not a date"),
])
def test_bad_profile_sections_are_config_errors(study_dir: Path, messy: Path, section: str, match: str) -> None:
    profile = study_dir / "profiles" / f"{PROFILE}.toml"
    text = profile.read_text()
    text = text.split("[plausibility]")[0] + section
    profile.write_text(text)
    with pytest.raises(ConfigError, match=match):
        run(load_study(study_dir), PROFILE, {"rows": messy}, write=False)


def test_day_first_dates_with_slashes_are_not_read_as_intervals(study_dir: Path) -> None:
    profile = study_dir / "profiles" / f"{PROFILE}.toml"
    profile.write_text(profile.read_text().replace('timezone = "UTC"', 'timezone = "UTC"\ndayfirst = true'))
    data = study_dir / "slashes.csv"
    data.write_text(HEADER_ROW + "d1,,14/11/2021 09:30,44.5,-152.0,Ann Vell,keld fulmar,noted,,,\n")
    result = run(load_study(study_dir), PROFILE, {"rows": data})
    assert result.rows_quarantined == 0
    obs = _observations(study_dir)
    assert str(obs["event_start"].iloc[0]) == "2021-11-14 09:30:00+00:00"


HEADER_ROW = ("sighting_id,list_id,obs_time,latitude,longitude,observer_name,species,how_many,all_reported,"
              "minutes_watched,km_travelled\n")
