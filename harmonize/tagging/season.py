"""Season and season_year from timestamps and the study's month lists."""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np
import pandas as pd


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


def tag_season(
    times: pd.Series, seasons: Mapping[str, tuple[int, ...]]
) -> tuple[pd.Series, pd.Series]:
    """Season name and season_year for each timestamp.

    Parameters
    ----------
    times
        Timestamps (UTC); NaT gives null season and season_year.
    seasons
        Season name -> months, every month 1..12 exactly once.

    Returns
    -------
    season, season_year
        A string series and an Int32 series aligned with ``times``.
    """
    names = np.empty(13, dtype=object)
    for name, months in seasons.items():
        names[list(months)] = name
    offsets = season_year_offsets(seasons)
    valid = times.notna().to_numpy()
    month = np.where(valid, times.dt.month.fillna(1).to_numpy(dtype=np.int64), 1)
    year = np.where(valid, times.dt.year.fillna(0).to_numpy(dtype=np.int64), 0)
    season = pd.Series(np.where(valid, names[month], None), index=times.index, dtype="string")
    season_year = pd.Series(year + offsets[month], index=times.index, dtype="Int32").where(valid)
    return season, season_year
