"""Time arithmetic (issue 17, findings 8 and 9): exact durations, years 1-9999, clock changes.

The expected values come from Python's datetime and zoneinfo (the IANA tz database, with
PEP 495's ``fold``: fold=0 is the first of two instants of a repeated wall-clock time, and a
skipped wall-clock time does not survive a round trip through UTC), not from pandas.
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path
from zoneinfo import ZoneInfo

import duckdb
import numpy as np
import pandas as pd
import pytest
from examples import scaled
from hypothesis import given, settings
from hypothesis import strategies as st

from harmonize import load_study, run
from harmonize.clock import add_hours, localize, sql_local_problem
from harmonize.errors import ConfigError
from harmonize.export.dwca import export_dwca, read_archive_table
from harmonize.export.long import read_long

ZONES = ["Europe/Oslo", "America/New_York", "Australia/Lord_Howe", "Pacific/Auckland", "America/St_Johns"]


@settings(max_examples=scaled(100), deadline=None)
@given(st.datetimes(min_value=dt.datetime(1, 1, 1), max_value=dt.datetime(9990, 12, 31)),
       st.integers(0, 60 * 24 * 30))
def test_durations_are_exact_microseconds(start: dt.datetime, minutes: int) -> None:
    got = add_hours(pd.Series([start]).astype("datetime64[us]"), np.array([minutes / 60]))
    assert got.iloc[0].to_pydatetime() == start + dt.timedelta(minutes=minutes)


def _zoneinfo_rule(wall: dt.datetime, zone: str) -> tuple[str | None, dt.datetime, dt.datetime]:
    tz = ZoneInfo(zone)
    first, second = wall.replace(tzinfo=tz, fold=0), wall.replace(tzinfo=tz, fold=1)
    back = first.astimezone(dt.UTC).astimezone(tz).replace(tzinfo=None)
    to_utc = lambda t: t.astimezone(dt.UTC).replace(tzinfo=None)  # noqa: E731
    if back != wall:
        return "nonexistent", to_utc(first), to_utc(second)
    if first.utcoffset() != second.utcoffset():
        return "ambiguous", to_utc(first), to_utc(second)
    return None, to_utc(first), to_utc(first)


@settings(max_examples=scaled(120), deadline=None)
@given(st.sampled_from(ZONES), st.integers(2015, 2024), st.integers(1, 12), st.integers(1, 28),
       st.integers(0, 23), st.sampled_from([0, 15, 30, 45]))
def test_local_times_at_clock_changes(zone: str, year: int, month: int, day: int, hour: int, minute: int) -> None:
    # the days of each year's clock changes, and the hours around them, are drawn often
    tz = ZoneInfo(zone)
    changes = [d for d in (dt.datetime(year, 1, 1) + dt.timedelta(days=i) for i in range(366))
               if d.year == year and (d + dt.timedelta(days=1)).replace(tzinfo=tz).utcoffset() != d.replace(tzinfo=tz).utcoffset()]
    base = changes[(month + day) % len(changes)] + dt.timedelta(days=1) if changes and day % 2 else dt.datetime(year, month, day)
    wall = base.replace(hour=hour, minute=minute)
    kind, earlier, later = _zoneinfo_rule(wall, zone)
    series = pd.Series([wall]).astype("datetime64[us]")
    for choice in (None, "earlier", "later"):
        utc, amb, non = localize(series, zone, choice)
        assert bool(non[0]) == (kind == "nonexistent")
        assert bool(amb[0]) == (kind == "ambiguous" and choice is None)
        if kind is None:
            assert utc.iloc[0].to_pydatetime() == earlier
        elif kind == "ambiguous" and choice:
            assert utc.iloc[0].to_pydatetime() == (earlier if choice == "earlier" else later)
        else:
            assert pd.isna(utc.iloc[0])
    # the ping reader's SQL says the same
    con = duckdb.connect()
    got = con.sql(f"SELECT {sql_local_problem('TIMESTAMP ' + repr(wall.isoformat(sep=' ')), zone)}").fetchall()[0][0]
    assert got == kind


def _opportunistic(study_dir: Path, rows: str, extra: str = "") -> tuple:
    profile = f"""
[source]
id = "clock_watch"
kind = "opportunistic"
provider_type = "volunteer"
protocol = "keldmar_volunteer_checklist"
timezone = "Europe/Oslo"
{extra}
[columns]
record_id = "sighting_id"
checklist_id = "list_id"
time = "obs_time"
lat = "latitude"
lon = "longitude"
observer = "observer_name"
taxon = "species"
count = "how_many"
complete = "all_reported"
duration_min = "minutes_watched"
"""
    (study_dir / "profiles" / "clock_watch.toml").write_text(profile)
    (study_dir / "v.csv").write_text(
        "sighting_id,list_id,obs_time,latitude,longitude,observer_name,species,how_many,all_reported,minutes_watched\n"
        + rows)
    study = load_study(study_dir)
    return study, run(study, "clock_watch", {"rows": study_dir / "v.csv"})


def test_twenty_minute_checklist_ends_on_the_minute(study_dir: Path, tmp_path: Path) -> None:
    """Finding 9: a 20-minute checklist from 18:30 ends at 18:50:00, also in Darwin Core."""
    study, _ = _opportunistic(study_dir, "S1,L1,2021-06-14T18:30+00:00,44.5,-152.0,Ann,keld fulmar,3,true,20\n")
    obs = read_long(study)
    end = pd.Timestamp(obs["event_end"].iloc[0]).tz_localize(None)
    assert end == pd.Timestamp("2021-06-14T18:50:00")
    event = read_archive_table(export_dwca(study, tmp_path / "a.zip").path, "event.txt")
    assert event["eventDate"].iloc[0] == "2021-06-14T18:30:00Z/2021-06-14T18:50:00Z"


def test_clock_changes_are_quarantined_with_the_change_named(study_dir: Path) -> None:
    """Finding 8: 02:30 on 2021-10-31 in Oslo happens twice; 02:30 on 2021-03-28 never."""
    rows = ("S1,L1,2021-10-31T02:30,44.5,-152.0,Ann,keld fulmar,3,true,20\n"
            "S2,L2,2021-03-28T02:30,44.5,-152.0,Ann,keld fulmar,3,true,20\n"
            "S3,L3,2021-03-28T03:30,44.5,-152.0,Ann,keld fulmar,3,true,20\n")
    _, result = _opportunistic(study_dir, rows)
    q = result.quarantine.set_index("source_row")
    assert q.loc[1, "reason_code"] == "ambiguous_local_time"
    assert "happens twice in Europe/Oslo: the clocks went back from UTC+02:00 to UTC+01:00 on 2021-10-31" \
        in q.loc[1, "message"]
    assert q.loc[2, "reason_code"] == "nonexistent_local_time"
    assert "does not exist in Europe/Oslo: the clocks went forward from UTC+01:00 to UTC+02:00 on 2021-03-28" \
        in q.loc[2, "message"]
    assert 3 not in q.index


@pytest.mark.parametrize(("choice", "utc"), [("earlier", "2021-10-31T00:30"), ("later", "2021-10-31T01:30")])
def test_profile_resolves_ambiguous_times(study_dir: Path, choice: str, utc: str) -> None:
    study, result = _opportunistic(study_dir, "S1,L1,2021-10-31T02:30,44.5,-152.0,Ann,keld fulmar,3,true,20\n",
                                   f'ambiguous_times = "{choice}"')
    assert result.quarantine.empty
    start = pd.Timestamp(read_long(study)["event_start"].iloc[0]).tz_localize(None)
    assert start == pd.Timestamp(utc)


def test_unknown_ambiguous_choice_is_a_config_error(study_dir: Path) -> None:
    with pytest.raises(ConfigError, match="source.ambiguous_times.*expected \"earlier\" or \"later\""):
        _opportunistic(study_dir, "S1,L1,2021-06-14T18:30,44.5,-152.0,Ann,keld fulmar,3,true,20\n",
                       'ambiguous_times = "first"')


def test_dates_beyond_nanoseconds_are_quarantined_not_a_crash(study_dir: Path) -> None:
    """Finding 9: year 2300 and year 1 go to quarantine with a reason (they used to crash)."""
    from trawl_profiles import BASIC_PROFILE

    (study_dir / "profiles" / "trawl_basic.toml").write_text(BASIC_PROFILE)
    (study_dir / "h.csv").write_text(
        "HAUL_NO,START,END,LAT_S,LON_S,LAT_E,LON_E,WING_M,DEPTH_FM\n"
        "A1,2300-07-01T06:00,2300-07-01T06:30,43.0,-153.0,43.025,-153.0,20,40\n"
        "A2,0001-07-02T06:00,0001-07-02T06:30,43.5,-151.5,43.525,-151.5,20,60\n"
        "A3,2021-07-02T06:00,,43.5,-151.5,43.525,-151.5,20,60\n")
    (study_dir / "c.csv").write_text("HAUL,SPECIES,WT_G,N\nA3,keld cod,1000,2\n")
    result = run(load_study(study_dir), "trawl_basic", {"events": study_dir / "h.csv", "records": study_dir / "c.csv"})
    q = result.quarantine[result.quarantine["source_file"] == "h.csv"].set_index("source_row")
    assert q.loc[1, "reason_code"] == "bad_time" and "lies in the future" in q.loc[1, "message"]
    assert q.loc[2, "reason_code"] == "bad_time" and "not a date-time after 1800" in q.loc[2, "message"]


PINGS = """vessel,time_local,lat,lon,sog,gear
ALPHA-1,2021-03-28T01:30:00,42.9,-152.20,3.0,OTB
ALPHA-1,2021-03-28T02:30:00,42.9,-152.19,3.2,OTB
ALPHA-1,2021-03-28T03:30:00,42.9,-152.18,3.1,OTB
ALPHA-1,2021-10-31T02:30:00,42.9,-152.17,3.1,OTB
"""


@pytest.mark.parametrize("choice", [None, "later"])
def test_ping_reader_follows_the_same_rule(study_dir: Path, choice: str | None) -> None:
    """Finding 8: the nonexistent 02:30 goes to quarantine; the valid 03:30 is kept."""
    text = (study_dir / "profiles" / "effort_pings.toml").read_text()
    text = text.replace('timezone = "UTC"', 'timezone = "Europe/Oslo"' + (f'\nambiguous_times = "{choice}"' if choice else ""))
    (study_dir / "profiles" / "effort_pings.toml").write_text(text.replace('time = "time_utc"', 'time = "time_local"'))
    (study_dir / "p.csv").write_text(PINGS)
    result = run(load_study(study_dir), "effort_pings", {"rows": study_dir / "p.csv"}, write=False)
    q = result.quarantine.set_index("source_row")
    assert q.loc[2, "reason_code"] == "nonexistent_local_time"
    assert "the clocks went forward from UTC+01:00 to UTC+02:00 on 2021-03-28" in q.loc[2, "message"]
    assert 3 not in q.index and 1 not in q.index
    if choice is None:
        assert q.loc[4, "reason_code"] == "ambiguous_local_time"
        assert "went back from UTC+02:00 to UTC+01:00 on 2021-10-31" in q.loc[4, "message"]
    else:
        assert 4 not in q.index
