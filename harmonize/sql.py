"""SQL quoting: string literals and identifiers for DuckDB statements built as text.

Values are bound as parameters where DuckDB allows it; these are for the places it does not
(identifiers, options of table functions, literals inside generated expressions).
"""

from __future__ import annotations


def sql_text(value: object) -> str:
    """A SQL string literal (single quotes doubled)."""
    return "'" + str(value).replace("'", "''") + "'"


def sql_ident(name: object) -> str:
    """A quoted SQL identifier (double quotes doubled)."""
    return '"' + str(name).replace('"', '""') + '"'


__all__ = ["sql_ident", "sql_text"]
