"""The study calendar: season, season_year and calendar year of UTC timestamps, in the study's
time zone (``[study] timezone``, IANA, default UTC), for pandas and for DuckDB SQL.

Stored times stay UTC; only the calendar (which day, month and year an instant falls on) is
read in the study's zone, so a haul at 08:00 on 1 December local time in a UTC+13 study is in
December's season even though it is 30 November in UTC. Every season, season year and
targets.csv year window of the package comes from here.
"""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np
import pandas as pd

from harmonize.sql import sql_text

UTC = "UTC"


def season_year_offsets(seasons: Mapping[str, tuple[int, ...]]) -> np.ndarray:
    """Years to add to the calendar year of each month (index 1..12) to get its season_year.

    A season that holds December and January belongs to the year of its January, so the
    months of that season that fall before the turn of the year (December, and any
    contiguous run of months before it in the same season) get +1.
    """
    offsets = np.zeros(13, dtype=np.int32)
    for months in seasons.values():
        held = set(months)
        if 12 in held and 1 in held:
            m = 12
            while m in held and m > 1:
                offsets[m] = 1
                m -= 1
    return offsets


def local_times(times: pd.Series, timezone: str = UTC) -> pd.Series:
    """Wall-clock times (naive) in ``timezone`` of UTC instants (naive UTC or tz-aware)."""
    times = pd.Series(times)
    if not isinstance(times.dtype, pd.DatetimeTZDtype) and not pd.api.types.is_datetime64_dtype(times.dtype):
        times = pd.to_datetime(times, utc=True)
    if isinstance(times.dtype, pd.DatetimeTZDtype):
        return times.dt.tz_convert(timezone).dt.tz_localize(None)
    if timezone == UTC:
        return times
    return times.dt.tz_localize(UTC).dt.tz_convert(timezone).dt.tz_localize(None)


def calendar_year(times: pd.Series, timezone: str = UTC) -> pd.Series:
    """Calendar year (Int32) of each UTC instant on the study calendar; NaT gives null."""
    return local_times(times, timezone).dt.year.astype("Int32")


def tag_season(
    times: pd.Series, seasons: Mapping[str, tuple[int, ...]], timezone: str = UTC
) -> tuple[pd.Series, pd.Series]:
    """Season name and season_year for each timestamp.

    Parameters
    ----------
    times
        Timestamps (UTC: naive or tz-aware); NaT gives null season and season_year.
    seasons
        Season name -> months, every month 1..12 exactly once.
    timezone
        IANA zone of the study calendar, in which the month and year are read.

    Returns
    -------
    season, season_year
        A string series and an Int32 series aligned with ``times``.
    """
    local = local_times(times, timezone)
    local.index = pd.Series(times).index
    names = np.empty(13, dtype=object)
    for name, months in seasons.items():
        names[list(months)] = name
    offsets = season_year_offsets(seasons)
    valid = local.notna().to_numpy()
    month = np.where(valid, local.dt.month.fillna(1).to_numpy(dtype=np.int64), 1)
    year = np.where(valid, local.dt.year.fillna(0).to_numpy(dtype=np.int64), 0)
    season = pd.Series(np.where(valid, names[month], None), index=local.index, dtype="string")
    season_year = pd.Series(year + offsets[month], index=local.index, dtype="Int32").where(valid)
    return season, season_year


def local_sql(column: str, timezone: str = UTC) -> str:
    """DuckDB expression: the wall-clock TIMESTAMP in ``timezone`` of a UTC TIMESTAMP column."""
    if timezone == UTC:
        return column
    zone = sql_text(timezone)
    # timezone('UTC', naive) reads the wall clock as UTC -> TIMESTAMPTZ; timezone(zone, tz) gives
    # the wall clock there (DuckDB ICU functions)
    return f"timezone({zone}, timezone('UTC', CAST({column} AS TIMESTAMP)))"


def season_sql(column: str, seasons: Mapping[str, tuple[int, ...]], timezone: str = UTC) -> tuple[str, str]:
    """DuckDB expressions (season name, season_year) of a UTC TIMESTAMP column: the same
    rule as :func:`tag_season`."""
    names = np.empty(13, dtype=object)
    for name, months in seasons.items():
        names[list(months)] = name
    offsets = season_year_offsets(seasons)[1:].tolist()
    names_sql = "[" + ", ".join(sql_text(str(n)) for n in names[1:]) + "]"
    local = local_sql(column, timezone)
    return (f"({names_sql})[month({local})]",
            f"CAST(year({local}) + ({offsets})[month({local})] AS INTEGER)")


def season_bounds(
    season: pd.Series, season_year: pd.Series, seasons: Mapping[str, tuple[int, ...]], timezone: str = UTC
) -> tuple[pd.Series, pd.Series]:
    """First instant of each (season, season_year) and the first instant after it (exclusive
    end), as naive UTC ``datetime64[us]``: local midnights of the study calendar.

    A season's months run from its first month in season-year order (the months that
    :func:`season_year_offsets` shifts come first) to its last.
    """
    offsets = season_year_offsets(seasons)
    names = list(seasons)
    spans = [sorted((-int(offsets[m]), m) for m in seasons[n]) for n in names]  # (year shift, month)
    codes = pd.Categorical(season, categories=names).codes
    first = np.array([span[0] for span in spans], dtype=np.int64)[codes]
    last = np.array([span[-1] for span in spans], dtype=np.int64)[codes]
    return _month_span(season_year, first, last, timezone)


def season_year_bounds(
    season_year: pd.Series, seasons: Mapping[str, tuple[int, ...]], timezone: str = UTC
) -> tuple[pd.Series, pd.Series]:
    """First instant of each season year and the first instant after it (all its seasons), as
    naive UTC ``datetime64[us]``: local midnights of the study calendar."""
    offsets = season_year_offsets(seasons)
    months = sorted((-int(offsets[m]), m) for m in range(1, 13))
    n = len(season_year)
    return _month_span(season_year, np.tile(months[0], (n, 1)), np.tile(months[-1], (n, 1)), timezone)


def _month_span(season_year: pd.Series, first: np.ndarray, last: np.ndarray,
                timezone: str) -> tuple[pd.Series, pd.Series]:
    """From the first day of month ``first`` to the end of month ``last`` ((year shift, month)
    rows) of each season year, local midnights of ``timezone`` as naive UTC."""
    sy = pd.Series(season_year).astype("int64").to_numpy()
    first, last = np.asarray(first, np.int64).reshape(-1, 2), np.asarray(last, np.int64).reshape(-1, 2)
    start = pd.to_datetime(pd.DataFrame({"year": sy + first[:, 0], "month": first[:, 1], "day": 1}))
    end = (pd.to_datetime(pd.DataFrame({"year": sy + last[:, 0], "month": last[:, 1], "day": 1}))
           + pd.DateOffset(months=1))
    if timezone != UTC:  # local midnights of the study calendar, as UTC instants
        start, end = (t.dt.tz_localize(timezone, ambiguous=np.ones(len(t), bool), nonexistent="shift_forward")
                      .dt.tz_convert(UTC).dt.tz_localize(None) for t in (start, end))
    return start.astype("datetime64[us]"), end.astype("datetime64[us]")
