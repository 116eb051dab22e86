"""Incomplete periods: season years whose data end before the season year does.

A source's files usually stop somewhere: the last ingest holds December of a winter whose
January and February are not in yet. Counting that winter as a whole season makes every
trend fall to the end and fires drop findings that are only the calendar. The rule, per
source, at its data end (its last season with data):

- the last season is *cut* when its last sample falls in an earlier month of the season
  than the source's usual last month there (the median over its earlier years with that
  season): the satellite whose winters ran to February holds only December;
- the seasons after it in the same season year that the source sampled in earlier years
  are *not reached*.

A source kind's season (season year x season) is incomplete when one of its sources is cut
or not reached there; its season year is incomplete when any of its seasons is. Incomplete
seasons are drawn apart in the report and left out of trend lines, ``coverage_drop``,
``thin_samples`` and ``no_samples``.
"""

from __future__ import annotations

from collections.abc import Mapping

import duckdb
import numpy as np
import pandas as pd

from harmonize.audit.metrics import _KEPT, _year_filter
from harmonize.store import has_table
from harmonize.tagging import season_year_offsets

COLUMNS = ["source_kind", "source_id", "season_year", "season", "status"]


def last_samples(con: duckdb.DuckDBPyConnection, max_year: int | None = None) -> pd.DataFrame:
    """The last sample time per source x season year x season.

    Read from the audit's event table when it holds the times (DuckDB engine); otherwise
    one aggregate over the observations.
    """
    if has_table(con, "audit_cells") and con.execute(
            "SELECT count(last_start) FROM audit_cells").fetchall()[0][0]:
        return con.execute(
            """SELECT source_kind, source_id, CAST(season_year AS INTEGER) AS season_year, season,
                      max(last_start) AS last_start
               FROM audit_cells WHERE season_year IS NOT NULL AND season IS NOT NULL
               GROUP BY ALL ORDER BY ALL"""
        ).df()
    return con.execute(
        f"""SELECT source_kind, source_id, CAST(season_year AS INTEGER) AS season_year, season,
                   max(event_start) AS last_start
            FROM observations
            WHERE {_KEPT} AND season_year IS NOT NULL AND season IS NOT NULL{_year_filter(max_year)}
            GROUP BY ALL ORDER BY ALL"""
    ).df()


def incomplete_periods(last: pd.DataFrame, seasons: Mapping[str, tuple[int, ...]]) -> pd.DataFrame:
    """Source seasons that are cut or not reached at each source's data end (see module doc).

    Parameters
    ----------
    last
        :func:`last_samples`.
    seasons
        The study's season name -> months.

    Returns
    -------
    DataFrame
        source_kind, source_id, season_year, season, status ("cut" or "not reached").
    """
    if last.empty:
        return pd.DataFrame(columns=COLUMNS)
    offsets = season_year_offsets(seasons)
    # chronological position of a month inside its season year (December of a DJF winter first)
    month_pos = {m: m - 12 * int(offsets[m]) for m in range(1, 13)}
    season_pos = {name: min(month_pos[m] for m in months) for name, months in seasons.items()}
    t = pd.to_datetime(last["last_start"], utc=True)
    frame = last.assign(month_pos=t.dt.month.map(month_pos), season_pos=last["season"].map(season_pos))
    out = []
    for (kind, source), g in frame.groupby(["source_kind", "source_id"], sort=True):
        end_year = int(g["season_year"].max())
        this_year = g[g["season_year"] == end_year]
        end = this_year.loc[this_year["season_pos"].idxmax()]
        earlier = g[(g["season_year"] < end_year) & (g["season"] == end["season"])]
        if len(earlier) and end["month_pos"] < np.median(earlier["month_pos"]):
            out.append((kind, source, end_year, end["season"], "cut"))
        later = {s for s in g.loc[g["season_year"] < end_year, "season"] if season_pos[s] > end["season_pos"]}
        out += [(kind, source, end_year, s, "not reached") for s in sorted(later, key=season_pos.get)]
    return pd.DataFrame(out, columns=COLUMNS)


def incomplete_keys(periods: pd.DataFrame) -> set[tuple[str, int, str]]:
    """(source_kind, season_year, season) of every incomplete season."""
    return {(str(k), int(y), str(s)) for k, y, s in
            zip(periods["source_kind"], periods["season_year"], periods["season"], strict=True)}


def incomplete_years(periods: pd.DataFrame) -> set[tuple[str, int]]:
    """(source_kind, season_year) of every incomplete season year."""
    return {(str(k), int(y)) for k, y in zip(periods["source_kind"], periods["season_year"], strict=True)}
