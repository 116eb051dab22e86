"""SQL quoting: string literals and identifiers for DuckDB statements built as text.

Values are bound as parameters where DuckDB allows it; these are for the places it does not
(identifiers, options of table functions, literals inside generated expressions).
"""

from __future__ import annotations

from collections.abc import Iterable


def sql_text(value: object) -> str:
    """A SQL string literal (single quotes doubled)."""
    return "'" + str(value).replace("'", "''") + "'"


def sql_ident(name: object) -> str:
    """A quoted SQL identifier (double quotes doubled)."""
    return '"' + str(name).replace('"', '""') + '"'


def sql_in(column: str, values: Iterable[object], negate: bool = False) -> str:
    """SQL condition: ``column`` is one of ``values`` (``NOT IN`` with ``negate``).

    With no values the condition is always false (always true with ``negate``), so that a
    selection by a trait no source kind has selects nothing instead of failing.
    """
    listed = ", ".join(sql_text(v) for v in values)
    if not listed:
        return "TRUE" if negate else "FALSE"
    return f"{column} {'NOT IN' if negate else 'IN'} ({listed})"


__all__ = ["sql_ident", "sql_in", "sql_text"]
