"""Event time arithmetic: exact durations, and local wall-clock times at clock changes.

Timestamps are microseconds (``datetime64[us]``, years 1 to 9999), never nanoseconds, whose
range ends on 2262-04-11. A duration becomes a whole number of microseconds by rounding, not
truncation: a 20-minute checklist (1/3 h, not exact in binary) from 18:30 ends at 18:50:00.

Date-time text is parsed here too (:func:`parse_times`): with an offset it is converted to UTC,
without one it is read in the provider's time zone.

A local time without an offset is ambiguous when the clocks go back (it happens twice) and
does not exist when they go forward (it is skipped). Neither is guessed: such times are
quarantined with a message that names the clock change, unless the profile's ``[source]
ambiguous_times`` chooses the ``earlier`` or the ``later`` of the two instants (the offset in
force before or after the change). Every reader (table readers and the ping reader's SQL)
applies this rule.
"""

from __future__ import annotations

import datetime as dt
from typing import Protocol
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd

from harmonize.sql import sql_text

MICROSECONDS_PER_HOUR = 3_600_000_000
AMBIGUOUS_CHOICES = ("earlier", "later")
#: Earlier date-times are typing errors (a lone "-1" parses as year -1), not survey data.
EARLIEST_TIME = "1800-01-01"


class TimeReading(Protocol):
    """How a provider writes its date-times (a profile's ``[source]`` keys)."""

    time_format: str | None
    dayfirst: bool
    timezone: str
    ambiguous_times: str | None


def add_hours(start: pd.Series, hours: np.ndarray | pd.Series) -> pd.Series:
    """``start`` plus ``hours``, as whole microseconds rounded to the nearest; NaT where
    either is missing. Works for any year 1-9999 (no nanosecond timestamps)."""
    start = pd.Series(start)
    if not isinstance(start.dtype, pd.DatetimeTZDtype):
        start = start.astype("datetime64[us]")
    micros = np.rint(np.asarray(hours, dtype=float) * MICROSECONDS_PER_HOUR)
    known = np.isfinite(micros)
    delta = pd.Series(pd.to_timedelta(np.where(known, micros, 0).astype(np.int64), unit="us"),
                      index=start.index).astype("timedelta64[us]")
    try:
        end = start + delta
    except (OverflowError, pd.errors.OutOfBoundsDatetime):  # a duration running past year 9999
        end = pd.Series([s + d if pd.notna(s) and s + d <= pd.Timestamp.max.as_unit("us") else pd.NaT
                         for s, d in zip(start, _safe(delta), strict=True)],
                        index=start.index, dtype=start.dtype)
    return end.where(known)


def utc_naive(values: pd.Series | pd.Index | np.ndarray) -> pd.Series:
    """UTC instants as naive ``datetime64[us]``: zone-aware times (the store's TIMESTAMPTZ
    columns) converted to UTC, naive times taken as UTC already."""
    values = pd.to_datetime(pd.Series(values))
    if isinstance(values.dtype, pd.DatetimeTZDtype):
        values = values.dt.tz_convert("UTC").dt.tz_localize(None)
    return values.astype("datetime64[us]")


def _safe(delta: pd.Series) -> list[pd.Timedelta]:
    return [pd.Timedelta(d) for d in delta]


def localize(naive: pd.Series, zone: str, ambiguous: str | None = None
             ) -> tuple[pd.Series, np.ndarray, np.ndarray]:
    """UTC instants (naive, microseconds) of local wall-clock times in ``zone``.

    Returns the instants (NaT where a time is ambiguous and ``ambiguous`` is None, or does
    not exist), the mask of unresolved ambiguous times and the mask of nonexistent times.
    """
    naive = pd.Series(naive).astype("datetime64[us]")
    n = len(naive)
    earlier = naive.dt.tz_localize(zone, ambiguous=np.ones(n, dtype=bool), nonexistent="NaT")
    later = naive.dt.tz_localize(zone, ambiguous=np.zeros(n, dtype=bool), nonexistent="NaT")
    present = naive.notna().to_numpy()
    nonexistent = present & earlier.isna().to_numpy()
    twice = (earlier.notna() & (earlier != later)).to_numpy()
    chosen = later if ambiguous == "later" else earlier
    utc = chosen.dt.tz_convert("UTC").dt.tz_localize(None).astype("datetime64[us]")
    unresolved = twice if ambiguous is None else np.zeros(n, dtype=bool)
    return utc.mask(unresolved | nonexistent), unresolved, nonexistent


def _offset(value: dt.timedelta | None) -> str:
    minutes = int((value or dt.timedelta()).total_seconds() // 60)
    sign = "+" if minutes >= 0 else "-"
    return f"{sign}{abs(minutes) // 60:02d}:{abs(minutes) % 60:02d}"


def clock_change_message(label: str, text: str, local: pd.Timestamp, zone: str, kind: str) -> str:
    """One sentence naming the clock change behind an ambiguous or nonexistent local time.

    ``kind`` is "ambiguous" or "nonexistent". The offsets before and after the change come
    from the IANA database (zoneinfo): ``fold=0`` is the offset before the change, ``fold=1``
    the one after it (PEP 495).
    """
    wall = local.to_pydatetime()
    tz = ZoneInfo(zone)
    before = _offset(wall.replace(tzinfo=tz, fold=0).utcoffset())
    after = _offset(wall.replace(tzinfo=tz, fold=1).utcoffset())
    day = wall.date().isoformat()
    if kind == "ambiguous":
        return (f"{label} holds '{text}', a local time that happens twice in {zone}: the clocks went back from "
                f"UTC{before} to UTC{after} on {day}; give the time with its offset, or set [source] "
                "ambiguous_times = \"earlier\" or \"later\" in the profile")
    return (f"{label} holds '{text}', a local time that does not exist in {zone}: the clocks went forward from "
            f"UTC{before} to UTC{after} on {day} and skipped it; check the time and the profile's [source] timezone")


def sql_local_problem(local: str, zone: str) -> str:
    """DuckDB expression: 'nonexistent', 'ambiguous' or NULL for a naive local TIMESTAMP in ``zone``.

    The same rule as :func:`localize`: a wall-clock time that does not come back unchanged
    through UTC does not exist; one that another instant within two hours also shows
    happens twice (every clock change of the tz database moves the clocks by at most two
    hours: common practice, from memory).
    """
    z = sql_text(zone)
    utc = f"timezone({z}, {local})"
    back = f"timezone({z}, {utc})"
    shifts = ("30 MINUTE", "1 HOUR", "2 HOUR")
    twice = " OR ".join(f"timezone({z}, {utc} {op} INTERVAL {s}) = {local}" for s in shifts for op in ("+", "-"))
    return f"CASE WHEN {local} IS NULL THEN NULL WHEN {back} <> {local} THEN 'nonexistent' WHEN {twice} THEN 'ambiguous' END"


def sql_offset_text(instant: str, zone: str) -> str:
    """DuckDB expression: the UTC offset of ``zone`` at a TIMESTAMPTZ, as text 'UTC+01:00'."""
    z = sql_text(zone)
    minutes = f"CAST(round(epoch(timezone({z}, {instant}) - timezone('UTC', {instant})) / 60) AS INTEGER)"
    return (f"printf('UTC%s%02d:%02d', CASE WHEN {minutes} < 0 THEN '-' ELSE '+' END, "
            f"abs({minutes}) // 60, abs({minutes}) % 60)")


def sql_resolved(local: str, zone: str, choice: str) -> str:
    """DuckDB expression: the earlier or later UTC instant (TIMESTAMPTZ) shown as ``local``."""
    z = sql_text(zone)
    utc = f"timezone({z}, {local})"
    shifts = ("30 MINUTE", "1 HOUR", "2 HOUR")
    candidates = ", ".join([utc] + [f"{utc} {op} INTERVAL {s}" for s in shifts for op in ("+", "-")])
    pick = "list_min" if choice == "earlier" else "list_max"
    return f"{pick}([x FOR x IN [{candidates}] IF timezone({z}, x) = {local}])"


#: A date without a time (see parse_times): it never carries an offset.
_DATE_ALONE = r"\s*\d{1,4}[-/.]\d{1,2}[-/.]\d{1,4}\s*"


def parse_times(text: pd.Series, profile: TimeReading
                ) -> tuple[pd.Series, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Parse date-time strings into naive UTC timestamps (microseconds, years 1800-9999).

    Strings with an offset (Z, +02:00) are converted to UTC; strings without one are read in
    the profile's time zone (:func:`localize`). The rule: a date alone
    (``01-01-2021``, ``2021-01-01``, ``1.1.2021``) has no offset, so the year of a day-first
    date with dashes is never read as an offset "-2021" and that date is local like
    "2021-01-01"; an offset (``Z``, ``+hh:mm``, ``-hhmm``) is recognised at the end of a date
    with a time. Returns (timestamps, unparseable mask, future mask, ambiguous-local-time
    mask, nonexistent-local-time mask); a row is in at most one mask.
    """
    twice = np.zeros(len(text), dtype=bool)
    never = np.zeros(len(text), dtype=bool)
    present = text.notna().to_numpy()
    has_zone = (text.str.contains(r"(?:[zZ]|[+-]\d{2}:?\d{2}|:\d{2}(?:[.,]\d+)?[+-]\d{2})$", regex=True)
                & ~text.str.fullmatch(_DATE_ALONE)).fillna(False).to_numpy()
    out = pd.Series(pd.NaT, index=text.index, dtype="datetime64[us]")
    fmt = profile.time_format or "ISO8601"
    for zoned in (True, False):
        sel = present & (has_zone == zoned)
        if not sel.any():
            continue
        part = text[sel]
        parsed = _to_datetime(part, fmt, zoned, profile.dayfirst)
        retry = parsed.isna()
        if retry.any() and profile.time_format is None:
            again = _to_datetime(part[retry], "mixed", zoned, profile.dayfirst)
            parsed = parsed.copy()
            parsed[retry] = again
        if zoned:
            parsed = parsed.dt.tz_convert("UTC").dt.tz_localize(None)
        elif profile.timezone != "UTC":
            parsed, amb, non = localize(parsed, profile.timezone, profile.ambiguous_times)
            twice[sel], never[sel] = amb, non
        out[sel] = parsed.astype("datetime64[us]").to_numpy()
    # Dates before EARLIEST_TIME are typing errors, not survey data.
    ancient = (out < pd.Timestamp(EARLIEST_TIME)).fillna(False).to_numpy()
    out = out.mask(ancient)
    bad = present & out.isna().to_numpy() & ~twice & ~never
    now = dt.datetime.now(dt.UTC).replace(tzinfo=None) + dt.timedelta(days=1)
    future = (out > pd.Timestamp(now)).fillna(False).to_numpy()
    out = out.mask(future)
    return out, bad, future, twice, never


def _to_datetime(text: pd.Series, fmt: str, zoned: bool, dayfirst: bool) -> pd.Series:
    """``pd.to_datetime`` of present texts: UTC-aware for texts with an offset (``zoned``), else
    naive. A text read as naive in which the parser still finds an offset, in a form the
    offset pattern of :func:`parse_times` does not know (``08:20:25.5+05``, ``UTC-6``), is
    unparseable (NaT) rather than read in the wrong zone."""
    if zoned:
        return pd.to_datetime(text, format=fmt, errors="coerce", utc=True, dayfirst=dayfirst)
    try:
        parsed = pd.to_datetime(text, format=fmt, errors="coerce", dayfirst=dayfirst)
        if not isinstance(parsed.dtype, pd.DatetimeTZDtype):
            return parsed
    except ValueError:  # "Mixed timezones detected": offsets on some of the texts only
        pass
    # rare (such offsets are not a provider's usual form): the texts one by one
    one = [pd.to_datetime(t, format=fmt, errors="coerce", dayfirst=dayfirst) for t in text]
    return pd.Series([pd.NaT if pd.isna(t) or t.tzinfo is not None else t for t in one],
                     index=text.index, dtype="datetime64[us]")
