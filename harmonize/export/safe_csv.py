"""CSV writing that guards text cells against spreadsheet formula injection."""

from __future__ import annotations

from pathlib import Path

import pandas as pd

# OWASP ASVS 5.0 V1.2.10: a text cell starting with = + - @ tab or CR (or NUL) is read as a
# formula by spreadsheets; prefix it with a single quote. Numbers are left alone.
_TRIGGERS = ("=", "+", "-", "@", "\t", "\r", "\0")


def neutralise_text(values: pd.Series) -> pd.Series:
    """Prefix text cells that a spreadsheet would read as a formula with a single quote."""
    text = values.astype("string")
    risky = text.str.startswith(_TRIGGERS).fillna(False)
    return text.where(~risky, "'" + text)


def write_safe_csv(frame: pd.DataFrame, path: str | Path) -> None:
    """Write ``frame`` as UTF-8 CSV with formula-like text cells neutralised."""
    out = frame.copy()
    for col in out.columns:
        if out[col].dtype == object or pd.api.types.is_string_dtype(out[col]):
            out[col] = neutralise_text(out[col])
    out.to_csv(path, index=False)
