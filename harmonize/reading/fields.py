"""Field coercion: text columns -> typed, unit-converted adapter fields, bad cells quarantined.

A profile maps provider columns onto an adapter's fields (:func:`resolve_columns`); each
field is typed from its Table Schema (numbers, booleans, date-times, text), converted from
the profile's ``[units]`` to the canonical unit (:mod:`harmonize.units`), read in the
profile's ``[formats]`` (degrees and minutes, fractions) and checked against the schema's
constraints with pandera; every failure becomes a quarantine entry.
"""

from __future__ import annotations

import difflib
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
import pandas as pd
import pandera.errors

from harmonize import units
from harmonize.clock import EARLIEST_TIME, clock_change_message, parse_times
from harmonize.config_spec import COORDINATE_FORMATS, FRACTION_FORMATS, is_coordinate, is_fraction
from harmonize.contract import FieldSpec, pandera_schema
from harmonize.errors import ConfigError, InputFileError, ReasonCode, one_line, short_text
from harmonize.profile import Profile
from harmonize.reading.formats import parse_angles, parse_fractions
from harmonize.reading.quarantine import Rejections
from harmonize.reading.text import RawTable

NA_TOKENS = frozenset({"", "na", "n/a", "nan", "null", "none", "-"})
_TRUE = frozenset({"true", "t", "yes", "y", "1"})
_FALSE = frozenset({"false", "f", "no", "n", "0"})

#: Column names an error message lists at most.
MAX_LISTED_COLUMNS = 40


def resolve_columns(
    table: RawTable, specs: Sequence[FieldSpec], profile: Profile
) -> dict[str, Any]:
    """Adapter field -> file column for the fields this file provides.

    A date-time field the profile maps to two columns ([date, time]) gives a tuple of both.

    A field the profile maps must exist in the file; an unmapped field is looked for under
    its own name (case-insensitive). A required field with neither column nor constant is
    an error naming the profile section to fill in.
    """
    mapping = dict(profile.column_map(table.role))
    columns = list(table.frame.columns)
    by_fold = {c.casefold(): c for c in columns}
    section = "[columns]" if table.role == "rows" else f"[columns.{table.role}]"
    found: dict[str, str] = {}
    for spec in specs:
        if spec.name in mapping:
            wanted = mapping[spec.name]
            if isinstance(wanted, tuple) and spec.type != "datetime":
                raise ConfigError(profile.path, f"{section[1:-1]}.{spec.name}",
                                  "two columns (date, time) can be joined for a date-time field only")
            actual_cols = []
            for col in (wanted if isinstance(wanted, tuple) else (wanted,)):
                actual = col if col in columns else by_fold.get(col.casefold())
                if actual is None:
                    # closest names among a bounded number of columns (a hostile header has millions)
                    close = difflib.get_close_matches(col, columns[:MAX_LISTED_COLUMNS * 500], n=3)
                    hint = f" (closest: {', '.join(close)})" if close else ""
                    listed = ", ".join(columns[:MAX_LISTED_COLUMNS])
                    if len(columns) > MAX_LISTED_COLUMNS:
                        listed += f", ... ({len(columns):,} columns in all)"
                    raise InputFileError(
                        table.path,
                        f"column '{col}', which {profile.path.name} {section} maps to field "
                        f"'{spec.name}', is not in the file{hint}; columns are: {one_line(listed)}",
                    )
                actual_cols.append(actual)
            found[spec.name] = actual_cols[0] if len(actual_cols) == 1 else tuple(actual_cols)
        elif spec.name.casefold() in by_fold:
            found[spec.name] = by_fold[spec.name.casefold()]
        elif spec.required and spec.name not in profile.constants:
            raise InputFileError(
                table.path,
                f"required field '{spec.name}' ({spec.description.rstrip('.')}) has no column; "
                f"map it in {section} of {profile.path.name} or add a column named '{spec.name}'. "
                f"Columns are: {', '.join(columns)}",
            )
    return found


def coerce_fields(
    table: RawTable,
    specs: Sequence[FieldSpec],
    profile: Profile,
    rejections: Rejections,
    schema_name: str,
    malformed: Sequence[tuple[int, str, int]] = (),
) -> pd.DataFrame:
    """Typed, unit-converted field frame of a table, with bad cells sent to ``rejections``.

    Columns are the adapter's field names (absent optional fields are all-null columns);
    the index is the 0-based position of the row in the file.
    """
    found = resolve_columns(table, specs, profile)
    n = table.n_rows
    if malformed:
        pos = np.array([r - 1 for r, *_ in malformed])
        rejections.add(
            table.role, pos, ReasonCode.BAD_TYPE,
            [f"row has a different number of fields than the header ({n_fields} instead of "
             f"{len(table.frame.columns)}); check delimiters and quotes" for _, _, n_fields in malformed],
        )
    out: dict[str, pd.Series] = {}
    for spec in specs:
        if spec.name in found and isinstance(found[spec.name], tuple):
            # date and time in two columns: "2021-06-14" + "08:30" -> "2021-06-14 08:30"
            date_col, time_col = found[spec.name]
            day = table.frame[date_col].astype("string").str.strip()
            clock = table.frame[time_col].astype("string").str.strip()
            day, clock = day.mask(_na_tokens(day)), clock.mask(_na_tokens(clock))
            text = (day + " " + clock.fillna("")).str.strip()
            null = day.isna()
            text = text.mask(null)
            label = f"{spec.name} (columns '{date_col}' + '{time_col}')"
        elif spec.name in found:
            col = found[spec.name]
            text = table.frame[col].astype("string").str.strip()
            null = _na_tokens(text)
            text = text.mask(null)
            label = f"{spec.name} (column '{col}')" if col != spec.name else f"column '{col}'"
        elif spec.name in profile.constants:
            text = pd.Series([str(profile.constants[spec.name])] * n, dtype="string")
            null = pd.Series(np.zeros(n, dtype=bool))
            label = f"{spec.name} (constant in {profile.path.name})"
        else:
            out[spec.name] = _empty(spec, n)
            continue
        out[spec.name] = _typed(text, null, spec, label, table, profile, rejections)
    frame = pd.DataFrame(out, index=pd.RangeIndex(n))
    _check_constraints(frame, specs, found, table, rejections, schema_name, profile)
    for spec in specs:  # lat/lon, start_lat/start_lon, end_lat/end_lon
        if spec.name.endswith("lat") and spec.name[:-3] + "lon" in frame and spec.name in found:
            rejections.positions.append((table.path.name, frame[spec.name].to_numpy(dtype=float, na_value=np.nan),
                                         frame[spec.name[:-3] + "lon"].to_numpy(dtype=float, na_value=np.nan)))
    return frame


_TOKEN_CHARS = max(len(t) for t in NA_TOKENS)
#: Plain decimal numbers, which Arrow's parser and pandas' read the same way.
_PLAIN_NUMBER = r"^[+-]?(?:[0-9]+\.?[0-9]*|\.[0-9]+)(?:[eE][+-]?[0-9]+)?$"


def _na_tokens(text: pd.Series) -> pd.Series:
    """True where the (stripped) text is missing or one of the NA_TOKENS, in any case.

    Case folding never shortens a string, so only strings as short as the longest token
    are folded (in Python); the length test runs in Arrow.
    """
    short = (text.str.len() <= _TOKEN_CHARS).fillna(False)
    null = text.isna().to_numpy().copy()
    if short.any():
        null[short.to_numpy()] = text[short].str.casefold().isin(NA_TOKENS).to_numpy()
    return pd.Series(null, index=text.index)


def to_float(text: pd.Series) -> pd.Series:
    """``pd.to_numeric(text, errors="coerce")`` as float64, with plain numbers parsed by Arrow.

    Cells that are plain decimal numbers (the bulk of any file) are cast in Arrow, several
    times faster; every other cell (``1e999``, ``inf``, words) goes through pandas, so the
    result and the cells that fail are those of ``pd.to_numeric``.
    """
    import pyarrow as pa
    import pyarrow.compute as pc

    try:
        arr = pa.array(text, type=pa.string(), from_pandas=True)
        plain = pc.fill_null(pc.match_substring_regex(arr, _PLAIN_NUMBER), False)
        out = np.array(pc.cast(pc.if_else(plain, arr, pa.scalar(None, pa.string())), pa.float64())
                       .to_numpy(zero_copy_only=False), dtype="float64", copy=True)
        rest = ~plain.to_numpy(zero_copy_only=False) & text.notna().to_numpy()
    except (pa.ArrowInvalid, pa.ArrowTypeError, TypeError, ValueError):
        return pd.to_numeric(text, errors="coerce").astype("float64")
    if rest.any():
        out[rest] = pd.to_numeric(text[rest], errors="coerce").astype("float64").to_numpy()
    return pd.Series(out, index=text.index)


def _empty(spec: FieldSpec, n: int) -> pd.Series:
    if spec.type == "number":
        return pd.Series(np.full(n, np.nan))
    if spec.type == "datetime":
        return pd.Series(pd.NaT, index=range(n), dtype="datetime64[us]")
    if spec.type == "boolean":
        return pd.Series([pd.NA] * n, dtype="boolean")
    if spec.type == "integer":
        return pd.Series([pd.NA] * n, dtype="Int64")
    return pd.Series([pd.NA] * n, dtype="string")


def _typed(
    text: pd.Series,
    null: pd.Series,
    spec: FieldSpec,
    label: str,
    table: RawTable,
    profile: Profile,
    rejections: Rejections,
) -> pd.Series:
    role = table.role
    if spec.type in ("number", "integer"):
        fmt = profile.formats.get(spec.name, "decimal")
        _check_format(spec, fmt, profile)
        if fmt in ("degrees_minutes", "degrees_minutes_seconds"):
            values, bad, messages = parse_angles(text, fmt, "lat" if spec.unit == "degree_north" else "lon")
            if bad.any():
                rejections.add(role, np.flatnonzero(bad), ReasonCode.BAD_TYPE, [f"{label}: {m}" for m in messages])
            return values
        values = to_float(text)
        if _is_fraction(spec):
            values = parse_fractions(text, values, fmt)
        bad = (~null & values.isna()).to_numpy()
        if bad.any():
            what = "a number, a fraction such as 1/4 or a percentage such as 25%" if _is_fraction(spec) else "a number"
            rejections.add(
                role, np.flatnonzero(bad), ReasonCode.BAD_TYPE,
                [f"{label} holds '{short_text(v)}', which is not {what}" for v in text[bad]],
            )
        infinite = np.isinf(values.to_numpy())
        if infinite.any():
            rejections.add(role, np.flatnonzero(infinite), ReasonCode.OUT_OF_RANGE, f"{label} is not a finite number")
            values = values.mask(infinite)
        if spec.dimension and spec.name in profile.units:
            unit = profile.units[spec.name]
            try:
                converted = units.to_canonical(values.to_numpy(), spec.dimension, unit)
            except units.UnitError as exc:
                raise ConfigError(profile.path, f"[units] {spec.name}", str(exc)) from None
            values = pd.Series(converted, index=values.index)
        if spec.type == "integer":
            frac = (values % 1 != 0) & values.notna()
            if frac.any():
                rejections.add(role, np.flatnonzero(frac.to_numpy()), ReasonCode.BAD_TYPE, f"{label} must be a whole number")
        return values
    if spec.type == "boolean":
        folded = text.str.casefold()
        values = pd.Series(pd.NA, index=text.index, dtype="boolean")
        values[folded.isin(_TRUE).fillna(False).to_numpy()] = True
        values[folded.isin(_FALSE).fillna(False).to_numpy()] = False
        bad = (~null & values.isna()).to_numpy()
        if bad.any():
            rejections.add(
                role, np.flatnonzero(bad), ReasonCode.BAD_TYPE,
                [f"{label} holds '{short_text(v)}'; expected true or false" for v in text[bad]],
            )
        return values
    if spec.type == "datetime":
        values, bad, future, twice, never = parse_times(text, profile)
        for mask, reason, kind in ((twice, ReasonCode.AMBIGUOUS_LOCAL_TIME, "ambiguous"),
                                   (never, ReasonCode.NONEXISTENT_LOCAL_TIME, "nonexistent")):
            if mask.any():
                local = pd.to_datetime(text[mask], format=profile.time_format or "mixed", dayfirst=profile.dayfirst)
                rejections.add(role, np.flatnonzero(mask), reason,
                               [clock_change_message(label, short_text(v), t, profile.timezone, kind)
                                for v, t in zip(text[mask], local, strict=True)])
        if bad.any():
            rejections.add(
                role, np.flatnonzero(bad), ReasonCode.BAD_TIME,
                [f"{label} holds '{short_text(v)}', which is not a date-time after {EARLIEST_TIME[:4]} (expected e.g. 2021-06-14T08:30)" for v in text[bad]],
            )
        if future.any():
            rejections.add(role, np.flatnonzero(future), ReasonCode.BAD_TIME, f"{label} lies in the future")
        return values
    return text.astype("string")


def _is_fraction(spec: FieldSpec) -> bool:
    return is_fraction(spec.type, spec.unit, spec.maximum)


def _check_format(spec: FieldSpec, fmt: str, profile: Profile) -> None:
    """The profile's [formats] entry must suit the field (ConfigError naming the key)."""
    if fmt == "decimal":
        return
    if is_coordinate(spec.unit):
        allowed = COORDINATE_FORMATS
    elif _is_fraction(spec):
        allowed = FRACTION_FORMATS
    else:
        allowed = ("decimal",)
    if fmt not in allowed:
        raise ConfigError(profile.path, f"formats.{spec.name}",
                          f"'{fmt}' does not apply to {spec.name}; expected one of {', '.join(allowed)}")



def _check_constraints(
    frame: pd.DataFrame,
    specs: Sequence[FieldSpec],
    found: Mapping[str, str],
    table: RawTable,
    rejections: Rejections,
    schema_name: str,
    profile: Profile,
) -> None:
    """Required fields and ranges, validated lazily by pandera from the Table Schema."""
    already = rejections.mask(table.role, table.n_rows)
    try:
        pandera_schema(schema_name).validate(frame[~already], lazy=True)
    except pandera.errors.SchemaErrors as err:
        cases = err.failure_cases
        cases = cases[cases["index"].notna()]
        by_name = {s.name: s for s in specs}
        for (column, check), part in cases.groupby(["column", "check"], sort=False):
            spec = by_name.get(str(column))
            if spec is None:
                continue
            pos = part["index"].astype(np.int64).to_numpy()
            col = found.get(spec.name)
            label = f"{spec.name} (column '{col}')" if col and col != spec.name else f"column '{col or spec.name}'"
            if str(check) == "not_nullable":
                rejections.add(table.role, pos, ReasonCode.MISSING_VALUE, f"{label} is empty; {spec.description[:1].lower()}{spec.description[1:].rstrip('.')} is required")
            else:
                raw_col = table.frame[col] if col in table.frame else None
                shown = [str(raw_col.iloc[p]).strip() if raw_col is not None else _fmt(v)
                         for p, v in zip(pos, part["failure_case"], strict=True)]
                given = profile.units.get(spec.name) or (spec.unit if spec.unit not in (None, "1", "degree_north", "degree_east") else "")
                unit = f" {given}" if given else ""
                canon = f" {spec.unit}" if spec.unit not in (None, "1", "degree_north", "degree_east") else ""
                # whether latitude and longitude look swapped is told once per file, with a count,
                # where the swapped position falls inside the domain (ingest.store_output)
                rejections.add(
                    table.role, pos, ReasonCode.OUT_OF_RANGE,
                    [f"{label} = {v}{unit} is outside the allowed range ({spec.range_text()}{canon})" for v in shown],
                )


def _fmt(value: Any) -> str:
    try:
        return f"{float(value):g}"
    except (TypeError, ValueError):
        return str(value)
