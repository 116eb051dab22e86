"""The confidentiality rule for fishing-effort data.

Fishing data are commonly published only where at least three distinct vessels contribute
to a cell (the "rule of three", common practice in fisheries agencies). The threshold is
the study's ``[confidentiality] min_vessels``. Suppression blanks the values of a cell; it
never deletes the row, so the cell's existence and the suppression itself stay visible.
"""

from __future__ import annotations

import pandas as pd

SUPPRESSED_FLAG = "suppressed_confidential"


def confidential_mask(n_vessels: pd.Series, min_vessels: int) -> pd.Series:
    """True where a value rests on fewer than ``min_vessels`` distinct vessels.

    Rows with no vessel count (not effort data) are never confidential.
    """
    n = pd.to_numeric(n_vessels, errors="coerce")
    return (n.notna() & (n < min_vessels)).fillna(False).astype(bool)


def suppress(frame: pd.DataFrame, min_vessels: int,
             value_columns: tuple[str, ...] = ("value", "density", "effort")) -> tuple[pd.DataFrame, int]:
    """Blank the value columns of rows with fewer than ``min_vessels`` vessels.

    Returns the new frame (with SUPPRESSED_FLAG appended to ``flags`` where that column
    exists) and the number of suppressed rows.
    """
    if "n_vessels" not in frame:
        return frame, 0
    mask = confidential_mask(frame["n_vessels"], min_vessels)
    if not mask.any():
        return frame, 0
    out = frame.copy()
    for col in value_columns:
        if col in out:
            out[col] = out[col].astype("float64").mask(mask)
    if "flags" in out:
        out["flags"] = [list(f) + [SUPPRESSED_FLAG] if m else f for f, m in zip(out["flags"], mask, strict=True)]
    return out, int(mask.sum())


def suppression_sql(min_vessels: int, column: str = "value", n_vessels: str = "n_vessels") -> str:
    """SQL expression that blanks ``column`` where fewer than ``min_vessels`` vessels contribute."""
    return (f"CASE WHEN {n_vessels} IS NOT NULL AND {n_vessels} < {int(min_vessels)} "
            f"THEN NULL ELSE {column} END")


def suppression_note(n_suppressed: int, min_vessels: int, n_total: int | None = None) -> str:
    """The sentence exports and reports print about suppressed effort values.

    Parameters
    ----------
    n_suppressed
        Rows blanked by :func:`suppress` (or counted with :func:`confidential_mask`).
    min_vessels
        The study's ``[confidentiality] min_vessels``.
    n_total
        Effort rows in the output, when known.
    """
    of = f" of {n_total:,}" if n_total is not None else ""
    rows = "value" if n_suppressed == 1 else "values"
    return (f"{n_suppressed:,}{of} fishing-effort {rows} rest on fewer than {min_vessels} vessels and "
            f"are withheld (confidentiality threshold [confidentiality] min_vessels = {min_vessels}); "
            "the store keeps the true values. Local confidentiality rules prevail.")
