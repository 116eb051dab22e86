"""Numbers as providers write them: coordinates in degrees and minutes, fractions as 1/4 or 25 %.

Vectorised over a column of text (pandas string methods and numpy); a cell that does not
match gets a message naming what was expected. The profile's ``[formats]`` section chooses
the format per field (``config_spec.COORDINATE_FORMATS``, ``FRACTION_FORMATS``).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

# Degree, minute and second marks seen in provider files: the proper signs, the look-alikes
# keyboards produce, and plain separators (common practice in logbooks and ship systems).
_DEG = r"(?:\s*[°º˚]\s*|\s*deg\s*|\s*d\s*|\s*:\s*|\s+)"
_MIN = r"(?:\s*['′’]\s*|\s*m\s*|\s*:\s*|\s+)"
_SEC = r"(?:\s*(?:\"|″|''|”|s)\s*)?"
_HEMI = r"([NSEWnsew])?"
_NUM = r"(\d{1,2}(?:[.,]\d+)?)"
_PATTERNS = {
    "degrees_minutes": rf"^\s*{_HEMI}\s*([+-])?\s*(\d{{1,3}}){_DEG}{_NUM}\s*(?:['′’]|m)?\s*{_HEMI}\s*$",
    "degrees_minutes_seconds": rf"^\s*{_HEMI}\s*([+-])?\s*(\d{{1,3}}){_DEG}(\d{{1,2}}){_MIN}{_NUM}{_SEC}\s*{_HEMI}\s*$",
}
_EXAMPLE = {"degrees_minutes": {"lat": "41°50.159'N", "lon": "153°02.5'W"},
            "degrees_minutes_seconds": {"lat": "41°50'09.5\"N", "lon": "153°02'30\"W"}}


def parse_angles(text: pd.Series, fmt: str, axis: str) -> tuple[pd.Series, np.ndarray, list[str]]:
    """Decimal degrees from degrees-minutes(-seconds) text.

    Parameters
    ----------
    text
        Stripped cells; missing cells are NA and stay NaN without a message.
    fmt
        ``degrees_minutes`` (``41°50.159'N``, ``41 50.159 N``, ``-41 50.159``) or
        ``degrees_minutes_seconds`` (``41°50'09.5"N``, ``41 50 9.5 S``).
    axis
        ``lat`` (hemisphere N or S) or ``lon`` (E or W).

    Returns
    -------
    values, bad, messages
        Degrees (south and west negative), the mask of cells that could not be read, and one
        message per bad cell, in order.
    """
    parts = text.str.extract(_PATTERNS[fmt])
    has_sec = fmt == "degrees_minutes_seconds"
    lead, sign, deg = parts[0], parts[1], parts[2]
    minutes = parts[3]
    seconds = parts[4] if has_sec else None
    trail = parts[5] if has_sec else parts[4]
    present = text.notna().to_numpy()
    matched = deg.notna().to_numpy()

    def number(col: pd.Series) -> np.ndarray:
        return pd.to_numeric(col.str.replace(",", ".", regex=False), errors="coerce").to_numpy(dtype=float, na_value=np.nan)

    d, m = number(deg), number(minutes)
    s = number(seconds) if seconds is not None else np.zeros(len(text))
    hemi = lead.fillna("").str.upper().to_numpy(dtype=object) + trail.fillna("").str.upper().to_numpy(dtype=object)
    hemi = np.asarray(hemi, dtype=str)
    own = ("N", "S") if axis == "lat" else ("E", "W")
    other = ("E", "W") if axis == "lat" else ("N", "S")
    negative_sign = (sign == "-").fillna(False).to_numpy()
    two_letters = np.char.str_len(hemi) > 1
    wrong_axis = np.isin(hemi, other)
    both = (np.char.str_len(hemi) == 1) & sign.notna().to_numpy()
    bad_minutes = matched & ((m >= 60) | (s >= 60))
    value = d + m / 60.0 + s / 3600.0
    value = np.where(negative_sign | np.isin(hemi, (own[1],)), -value, value)

    bad = present & (~matched | two_letters | wrong_axis | both | bad_minutes)
    example = _EXAMPLE[fmt][axis]
    shown = text.to_numpy(dtype=object)
    messages = []
    for i in np.flatnonzero(bad):
        cell = str(shown[i])[:60]
        if not matched[i]:
            messages.append(f"'{cell}' is not a position in {fmt.replace('_', ' ')} (expected e.g. {example})")
        elif wrong_axis[i]:
            messages.append(f"'{cell}' has hemisphere {hemi[i]}, which belongs to a "
                            f"{'longitude' if axis == 'lat' else 'latitude'}; are latitude and longitude swapped?")
        elif both[i] or two_letters[i]:
            messages.append(f"'{cell}' gives the hemisphere twice (a sign and a letter, or two letters); give one")
        else:
            messages.append(f"'{cell}' has minutes or seconds of 60 or more")
    values = pd.Series(np.where(bad | ~present, np.nan, value), index=text.index)
    return values, bad, messages


_RATIO = r"^\s*(\d+(?:\.\d+)?)\s*/\s*(\d+(?:\.\d+)?)\s*$"
_PERCENT = r"^\s*([+-]?\d+(?:\.\d+)?)\s*%\s*$"


def parse_fractions(text: pd.Series, numbers: pd.Series, fmt: str) -> pd.Series:
    """A fraction field: decimals, ``1/4`` and ``25%`` always; bare numbers are percent with ``percent``.

    ``numbers`` is the column already read as plain numbers (NaN where it was not one).
    """
    out = numbers.copy()
    if fmt == "percent":
        out = out / 100.0
    todo = out.isna() & text.notna()
    if todo.any():
        ratio = text[todo].str.extract(_RATIO)
        num = pd.to_numeric(ratio[0], errors="coerce")
        den = pd.to_numeric(ratio[1], errors="coerce")
        with np.errstate(divide="ignore", invalid="ignore"):
            frac = (num / den).where(den > 0)
        pct = pd.to_numeric(text[todo].str.extract(_PERCENT)[0], errors="coerce") / 100.0
        out[todo] = frac.fillna(pct).astype(float).to_numpy()
    return out
