"""The study calendar (issue 17, finding 7): seasons, season years, years and target windows
are read on the local date of the study's time zone; stored times stay UTC.

The rule, written here from docs/study.md: an instant's local date is its UTC time shifted by
the zone's offset at that instant (IANA tz database, via Python's zoneinfo); its season is the
season holding the local month; a season that holds December and January belongs to the
year of its January (contract section 2).
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path
from zoneinfo import ZoneInfo

import duckdb
import pandas as pd
import pytest
from examples import scaled
from hypothesis import given, settings
from hypothesis import strategies as st

from harmonize import load_study, run
from harmonize.errors import ConfigError
from harmonize.export.long import read_long
from harmonize.tagging.season import calendar_year, season_sql, tag_season

SEASON_SETS = [
    {"winter": (12, 1, 2), "spring": (3, 4, 5), "summer": (6, 7, 8), "autumn": (9, 10, 11)},
    {"wet": (11, 12, 1, 2, 3), "dry": (4, 5, 6, 7, 8, 9, 10)},
    {"q1": (1, 2, 3), "q2": (4, 5, 6), "q3": (7, 8, 9), "q4": (10, 11, 12)},
]
ZONES = ["UTC", "Pacific/Auckland", "Pacific/Tongatapu", "America/St_Johns", "Asia/Kathmandu", "Europe/Oslo"]


def _expected(instant: dt.datetime, zone: str, seasons: dict[str, tuple[int, ...]]) -> tuple[str, int, int]:
    local = instant.astimezone(ZoneInfo(zone))
    name = next(n for n, months in seasons.items() if local.month in months)
    held = seasons[name]
    # walk forward through the months of this season: reaching January means the season
    # belongs to that January's year
    year, month = local.year, local.month
    while month != 1:
        month, year = (1, year + 1) if month == 12 else (month + 1, year)
        if month not in held:
            year = local.year
            break
    return name, year, local.year


@settings(max_examples=scaled(150), deadline=None)
@given(st.lists(st.datetimes(min_value=dt.datetime(1990, 1, 1), max_value=dt.datetime(2035, 12, 31)),
                min_size=1, max_size=20),
       st.sampled_from(ZONES), st.sampled_from(range(len(SEASON_SETS))))
def test_season_on_the_study_calendar(naive: list[dt.datetime], zone: str, which: int) -> None:
    seasons = SEASON_SETS[which]
    utc = [t.replace(tzinfo=dt.UTC) for t in naive]
    times = pd.Series(pd.to_datetime(naive)).astype("datetime64[us]")
    season, season_year = tag_season(times, seasons, zone)
    expected = [_expected(t, zone, seasons) for t in utc]
    assert list(season) == [e[0] for e in expected]
    assert list(season_year) == [e[1] for e in expected]
    assert list(calendar_year(times, zone)) == [e[2] for e in expected]
    # tz-aware input means the same instants
    assert list(tag_season(times.dt.tz_localize("UTC"), seasons, zone)[1]) == [e[1] for e in expected]
    # the DuckDB twin (effort pings and logbooks) gives the same tags
    name_sql, year_sql = season_sql("t", seasons, zone)
    con = duckdb.connect()
    con.register("x", pd.DataFrame({"t": times, "i": range(len(times))}))
    got = con.sql(f"SELECT {name_sql}, {year_sql} FROM x ORDER BY i").fetchall()
    assert got == [(e[0], e[1]) for e in expected]


def test_unknown_zone_is_a_config_error(study_dir: Path) -> None:
    text = (study_dir / "study.toml").read_text()
    (study_dir / "study.toml").write_text(text.replace('cell_size_km = 25', 'cell_size_km = 25\ntimezone = "Keldmar/Port"'))
    with pytest.raises(ConfigError, match="study.timezone.*'Keldmar/Port' is not an IANA time zone"):
        load_study(study_dir)


HAULS = """HAUL_NO,START,END,LAT_S,LON_S,LAT_E,LON_E,WING_M,DEPTH_FM
NZ1,2020-12-01T08:00+13:00,2020-12-01T08:30+13:00,43.0,-153.0,43.025,-153.0,20,40
W19,2019-12-10T08:00Z,2019-12-10T08:30Z,43.5,-151.5,43.525,-151.5,20,60
"""
CATCH = "HAUL,SPECIES,WT_G,N\nNZ1,keld cod,1000,2\nW19,keld cod,1000,2\n"


@pytest.mark.parametrize("zone", ["UTC", "Pacific/Auckland"])
def test_ingest_tags_on_the_study_calendar(study_dir: Path, zone: str) -> None:
    """Finding 7's haul (08:00 on 1 December in a UTC+13 study) and a December haul whose
    season year (2020) lies outside a 2015-2019 target window."""
    from trawl_profiles import BASIC_PROFILE

    text = (study_dir / "study.toml").read_text()
    (study_dir / "study.toml").write_text(text.replace('cell_size_km = 25', f'cell_size_km = 25\ntimezone = "{zone}"'))
    (study_dir / "profiles" / "trawl_basic.toml").write_text(BASIC_PROFILE)
    (study_dir / "h.csv").write_text(HAULS)
    (study_dir / "c.csv").write_text(CATCH)
    study = load_study(study_dir)
    run(study, "trawl_basic", {"events": study_dir / "h.csv", "records": study_dir / "c.csv"})
    obs = read_long(study)
    ev = obs.drop_duplicates("event_id").set_index("event_id")
    # stored times stay UTC
    assert pd.Timestamp(ev.loc["NZ1", "event_start"]).tz_localize(None) == pd.Timestamp("2020-11-30T19:00")
    expected = {"UTC": ("autumn", 2020, 2020), "Pacific/Auckland": ("winter", 2021, 2020)}[zone]
    assert (ev.loc["NZ1", "season"], ev.loc["NZ1", "season_year"], ev.loc["NZ1", "year"]) == expected
    # W19: season year 2020 (December winter), so the 2015-2019 target Calverion rubrum gets no zero
    assert ev.loc["W19", "season_year"] == 2020
    w19 = obs[obs["event_id"] == "W19"]
    assert "Calverion rubrum" not in set(w19["variable"])
    assert "Lumbrena pallida" in set(w19.loc[w19["zero_filled"], "variable"])
