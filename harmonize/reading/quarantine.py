"""The quarantine of an ingest: rejected rows, each with its first reason code and message."""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from typing import Any

import numpy as np
import pandas as pd

from harmonize.errors import ReasonCode
from harmonize.reading.text import RawTable


class Rejections:
    """Collects rejected rows; the first reason given for a row is the one stored."""

    def __init__(self) -> None:
        self._parts: list[pd.DataFrame] = []
        #: (file name, latitudes, longitudes) of every position read, rejected rows included
        self.positions: list[tuple[str, np.ndarray, np.ndarray]] = []

    def add(
        self,
        role: str,
        positions: Iterable[int] | np.ndarray,
        reason: ReasonCode,
        messages: str | Sequence[str] | pd.Series,
    ) -> None:
        pos = np.asarray(list(positions) if not isinstance(positions, np.ndarray) else positions, dtype=np.int64)
        if pos.size == 0:
            return
        if isinstance(messages, str):
            msgs: Any = [messages] * pos.size
        else:
            msgs = list(messages)
        self._parts.append(
            pd.DataFrame({"role": role, "pos": pos, "reason_code": str(reason), "message": msgs})
        )

    def extend(self, other: Rejections, offset: int = 0) -> None:
        """Take the rejections of ``other``, whose row positions count from ``offset`` (a block
        of a table read block by block: its positions become the table's)."""
        for part in other._parts:
            self._parts.append(part.assign(pos=part["pos"].to_numpy() + offset) if offset else part)

    def _all(self) -> pd.DataFrame:
        if not self._parts:
            return pd.DataFrame({"role": [], "pos": np.array([], dtype=np.int64), "reason_code": [], "message": []})
        return pd.concat(self._parts, ignore_index=True)

    def mask(self, role: str, n: int) -> np.ndarray:
        """Boolean mask over the ``n`` rows of a table: True where rejected."""
        out = np.zeros(n, dtype=bool)
        for part in self._parts:
            sel = part["pos"].to_numpy()[part["role"].to_numpy() == role]
            out[sel] = True
        return out

    def count(self, role: str) -> int:
        allr = self._all()
        return int(allr.loc[allr["role"] == role, "pos"].nunique())

    def first_reasons(self, role: str) -> pd.DataFrame:
        """pos, reason_code, message of each rejected row of a table (first reason)."""
        allr = self._all()
        return allr[allr["role"] == role].drop_duplicates("pos")[["pos", "reason_code", "message"]]

    def to_frame(self, tables: Sequence[RawTable]) -> pd.DataFrame:
        """The quarantine rows: source_file, source_row, reason_code, message, raw."""
        allr = self._all()
        out = []
        for table in tables:
            part = allr[allr["role"] == table.role]
            if part.empty:
                continue
            grouped = part.groupby("pos", sort=True)
            first = grouped.first()
            n_more = grouped.size() - 1
            extra = grouped["message"].agg(lambda m: "; also: " + "; ".join(list(dict.fromkeys(m))[1:3]) if len(set(m)) > 1 else "")
            pos = first.index.to_numpy()
            out.append(
                pd.DataFrame(
                    {
                        "source_file": table.path.name,
                        "source_row": pos + 1,
                        "reason_code": first["reason_code"].to_numpy(),
                        "message": (first["message"] + extra).to_numpy(),
                        "raw": table.raw_json(pos),
                        "n_problems": (n_more + 1).to_numpy(),
                    }
                )
            )
        if not out:
            return pd.DataFrame(
                {"source_file": [], "source_row": np.array([], dtype=np.int64), "reason_code": [],
                 "message": [], "raw": [], "n_problems": np.array([], dtype=np.int64)}
            )
        return pd.concat(out, ignore_index=True)


def repeated_id_messages(word: str, ids: Iterable[object]) -> list[str]:
    """The duplicate_record message of each row whose id appeared on an earlier row.

    ``word`` names what the id identifies ("haul", "tow", "record"). The first row of an
    id is the one that counts, whether or not it is accepted.
    """
    return [f"{word} '{i}' appears earlier in the file; only its first row counts (when that row is "
            "quarantined too, correct it and drop this one)" for i in ids]


def reject_repeated_ids(rejections: Rejections, role: str, ids: pd.Series, word: str,
                        within: np.ndarray | None = None) -> np.ndarray:
    """Quarantine (duplicate_record) every row of ``role`` whose id appeared on an earlier row.

    Rows without an id are left alone (their missing value is reported where the id is
    required); with ``within`` (a mask), only those rows are rejected here (rows rejected
    before then keep their message without this one). Returns the mask of the rows rejected here.
    """
    repeated = ids.duplicated(keep="first").to_numpy() & ids.notna().to_numpy()
    if within is not None:
        repeated &= within
    rejections.add(role, np.flatnonzero(repeated), ReasonCode.DUPLICATE_RECORD,
                   repeated_id_messages(word, ids[repeated]))
    return repeated
