"""Bounds of seasons and season years: the study calendar's local midnights, as UTC instants.

Expected instants are written out by hand from the season table (a winter of December,
January and February belongs to January's year: common practice in seasonal survey
indices) and the time-zone offsets of the IANA database (America/Halifax: UTC-4 in
standard time, UTC-3 in daylight time; from memory, checked with zoneinfo below).
"""

from __future__ import annotations

from datetime import datetime
from zoneinfo import ZoneInfo

import pandas as pd

from harmonize.tagging import season_bounds, season_year_bounds

SEASONS = {"winter": (12, 1, 2), "spring": (3, 4, 5), "summer": (6, 7, 8), "autumn": (9, 10, 11)}


def _utc(local: str, zone: str) -> pd.Timestamp:
    """A local wall-clock midnight as a naive UTC instant (zoneinfo, independent of pandas)."""
    t = datetime.fromisoformat(local).replace(tzinfo=ZoneInfo(zone)).astimezone(ZoneInfo("UTC"))
    return pd.Timestamp(t.replace(tzinfo=None))


def test_season_and_season_year_bounds_in_utc_and_a_local_zone() -> None:
    season = pd.Series(["winter", "summer", "winter"])
    year = pd.Series([2020, 2020, 2021])
    start, end = season_bounds(season, year, SEASONS)
    assert list(start) == [pd.Timestamp("2019-12-01"), pd.Timestamp("2020-06-01"), pd.Timestamp("2020-12-01")]
    assert list(end) == [pd.Timestamp("2020-03-01"), pd.Timestamp("2020-09-01"), pd.Timestamp("2021-03-01")]
    # the season year 2020 runs from December 2019 to the end of November 2020
    ys, ye = season_year_bounds(pd.Series([2020, 2021]), SEASONS)
    assert list(ys) == [pd.Timestamp("2019-12-01"), pd.Timestamp("2020-12-01")]
    assert list(ye) == [pd.Timestamp("2020-12-01"), pd.Timestamp("2021-12-01")]
    # a study calendar in Halifax: local midnights, 4 h (winter) or 3 h (summer) after UTC's
    zone = "America/Halifax"
    start, end = season_bounds(season, year, SEASONS, zone)
    assert list(start) == [_utc("2019-12-01", zone), _utc("2020-06-01", zone), _utc("2020-12-01", zone)]
    assert start[0] == pd.Timestamp("2019-12-01 04:00") and start[1] == pd.Timestamp("2020-06-01 03:00")
    ys, ye = season_year_bounds(pd.Series([2020]), SEASONS, zone)
    assert (ys[0], ye[0]) == (_utc("2019-12-01", zone), _utc("2020-12-01", zone))
    # every season of a year lies inside its season year's bounds
    for name in SEASONS:
        s, e = season_bounds(pd.Series([name]), pd.Series([2020]), SEASONS, zone)
        assert ys[0] <= s[0] < e[0] <= ye[0]
