"""CSV writing that guards text cells against spreadsheet formula injection.

OWASP ASVS 5.0 requirement V1.2.10: a text cell that starts with = + - @ tab, carriage
return (or NUL) is read as a formula by spreadsheet programs; prefix it with a single quote.
Only text columns are touched, never numbers. Two implementations that agree: one for pandas
frames, one as DuckDB SQL for exports too large for memory.
"""

from __future__ import annotations

from pathlib import Path

import duckdb
import pandas as pd

from harmonize.sql import sql_ident, sql_text

# OWASP ASVS 5.0 V1.2.10: a text cell starting with = + - @ tab or CR (or NUL) is read as a
# formula by spreadsheets; prefix it with a single quote. Numbers are left alone.
_TRIGGERS = ("=", "+", "-", "@", "\t", "\r", "\0")


def neutralise_text(values: pd.Series) -> pd.Series:
    """Prefix text cells that a spreadsheet would read as a formula with a single quote."""
    text = values.astype("string")
    risky = text.str.startswith(_TRIGGERS).fillna(False)
    return text.where(~risky, "'" + text)


def neutralise_sql(expr: str) -> str:
    """SQL (DuckDB) expression doing :func:`neutralise_text` on the text expression ``expr``."""
    triggers = ", ".join(f"chr({ord(c)})" for c in _TRIGGERS)
    return f"CASE WHEN left({expr}, 1) IN ({triggers}) THEN chr(39) || {expr} ELSE {expr} END"


def write_safe_csv(frame: pd.DataFrame, path: str | Path) -> None:
    """Write ``frame`` as UTF-8 CSV with formula-like text cells neutralised."""
    out = frame.copy()
    for col in out.columns:
        if out[col].dtype == object or pd.api.types.is_string_dtype(out[col]):
            out[col] = neutralise_text(out[col])
    out.to_csv(path, index=False)


def copy_safe_csv(con: duckdb.DuckDBPyConnection, query: str, path: str | Path,
                  list_separator: str = "|", header: bool = True) -> tuple[list[tuple[str, str]], int]:
    """Stream the result of ``query`` to a UTF-8 CSV file with DuckDB, text cells neutralised.

    List columns are joined with ``list_separator`` first (CSV has no lists); timestamps are
    written in ISO 8601 UTC, ``YYYY-MM-DDTHH:MM:SSZ`` (see :func:`iso_utc_sql`). Returns the (column, type) pairs
    of the file, for its metadata, and the number of rows written. Without ``header`` the
    file holds the rows only (a continuation of another file written with the same query).
    """
    described = con.execute(f"DESCRIBE ({query})").fetchall()
    select: list[str] = []
    columns: list[tuple[str, str]] = []
    sep = sql_text(list_separator)
    for name, sql_type, *_ in described:
        ident = sql_ident(name)
        # the header is text too: a column named after a taxon or variable is guarded as well
        alias = sql_ident(_neutral_name(name))
        t = str(sql_type).upper()
        if t.endswith("[]"):
            select.append(f"{neutralise_sql(f'array_to_string({ident}, {sep})')} AS {alias}")
            columns.append((name, t))  # a list: its sidecar says the separator
        elif t.startswith("TIMESTAMP"):
            select.append(f"{iso_utc_sql(ident, zoned=t != 'TIMESTAMP')} AS {alias}")
            columns.append((name, t))
        elif t == "VARCHAR":
            select.append(f"{neutralise_sql(ident)} AS {alias}")
            columns.append((name, t))
        else:
            select.append(f"{ident} AS {alias}")
            columns.append((name, t))
    target = sql_text(str(path))
    written = con.execute(
        f"COPY (SELECT {', '.join(select)} FROM ({query})) TO {target} (FORMAT csv, HEADER {str(header).lower()})").fetchall()
    return columns, int(written[0][0])


def iso_utc_sql(expr: str, zoned: bool = True) -> str:
    """DuckDB expression: a timestamp as ISO 8601 text in UTC, ``YYYY-MM-DDTHH:MM:SSZ``
    (``.ffffffZ`` only when it has a fraction of a second); a naive timestamp is taken as UTC.

    ISO 8601-1:2019, Date and time, section 5.4 (extended format, ``Z`` for UTC).
    """
    utc = f"timezone('UTC', {expr})" if zoned else expr
    return (f"CASE WHEN microsecond({utc}) % 1000000 = 0 THEN strftime({utc}, '%Y-%m-%dT%H:%M:%SZ') "
            f"ELSE strftime({utc}, '%Y-%m-%dT%H:%M:%S.%fZ') END")


def header_text(name: str) -> str:
    """The header cell :func:`copy_safe_csv` writes for column ``name``."""
    return _neutral_name(name)


def _neutral_name(name: str) -> str:
    return "'" + name if name.startswith(_TRIGGERS) else name
