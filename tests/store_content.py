"""Content digests of a store: what its rows say, independent of how they were written.

A digest covers the values of every row of the ``observations`` view (``ingest_id`` left
out: it names the moment of the ingest), of the ``quarantine`` table and of the ingests'
row accounting. Rows are taken in a stable order (sorted by every column, ``record_id``
first), so the digest does not depend on file layout, row order or where part files
begin and end. One digest per column is kept, so a mismatch names the columns that changed.

Floating-point numbers are compared at 8 significant digits: the summation order of an
aggregate (parallel hash aggregation, how values fall into part files, a per-pixel sum
before a per-cell sum) changes the last bits of a double, and nothing downstream means
anything at 1e-8 relative. With about 1e5 aggregated doubles and perturbations of a few
units in the last place (~1e-15 relative), the chance that one of them crosses a rounding
boundary at 8 digits is about 1e5 x 1e-15 / 1e-8 = 1e-2 (from memory: the probability of a
perturbation crossing a rounding boundary is its size over the grid spacing).
"""

from __future__ import annotations

import datetime as dt
import hashlib
import math
from pathlib import Path
from typing import Any

from harmonize import Store, load_study

#: Significant digits at which doubles enter a digest (see the module docstring).
FLOAT_DIGITS = 8


def _text(value: Any) -> str:
    if value is None:
        return "\\N"
    if isinstance(value, bool):
        return "t" if value else "f"
    if isinstance(value, float):
        if math.isnan(value):
            return "nan"
        return f"{value + 0.0:.{FLOAT_DIGITS - 1}e}"  # + 0.0: -0.0 and 0.0 are one value
    if isinstance(value, (dt.datetime, dt.date)):
        return value.isoformat()
    if isinstance(value, (list, tuple)):
        return "[" + ",".join(_text(v) for v in value) + "]"
    return str(value)


def table_digests(con: Any, relation: str, exclude: tuple[str, ...] = ("ingest_id",)) -> dict[str, str]:
    """Digest per column (first 16 hex digits of a sha256) of ``relation``'s rows in a stable order.

    Also ``"rows"``: the row count, and ``"*"``: one digest of all the columns together.
    """
    cols = [r[0] for r in con.sql(f"DESCRIBE {relation}").fetchall() if r[0] not in exclude]
    quoted = ", ".join(f'"{c}"' for c in cols)
    table = con.sql(f"SELECT {quoted} FROM {relation} ORDER BY ALL").arrow()
    if hasattr(table, "read_all"):  # a record batch reader in some DuckDB versions
        table = table.read_all()
    out: dict[str, str] = {"rows": str(table.num_rows)}
    whole = hashlib.sha256()
    for name in cols:
        h = hashlib.sha256()
        for value in table.column(name).to_pylist():
            h.update(_text(value).encode())
            h.update(b"\x1f")
        out[name] = h.hexdigest()[:16]
        whole.update(f"{name}={out[name]};".encode())
    out["*"] = whole.hexdigest()[:16]
    return out


def store_digests(study_dir: Path) -> dict[str, dict[str, str]]:
    """Digests of the observations, the quarantine, the ingests' accounting and the events without
    values of a study's store."""
    with Store(load_study(study_dir).store_dir).connect() as con:
        return {
            "observations": table_digests(con, "observations"),
            "quarantine": table_digests(con, "quarantine"),
            "ingests": table_digests(con, "(SELECT source_id, source_kind, file_name, status, rows_read, "
                                          "rows_accepted, rows_quarantined, records_written, records_zero_filled "
                                          "FROM ingests)"),
            "events_without_values": table_digests(con, "(SELECT * EXCLUDE (ingest_id) FROM events_without_values)"),
        }


def differences(found: dict[str, dict[str, str]], recorded: dict[str, dict[str, str]]) -> list[str]:
    """The table.column entries whose digests differ (or exist on one side only)."""
    diff = []
    for table in sorted(set(found) | set(recorded)):
        a, b = found.get(table, {}), recorded.get(table, {})
        diff += [f"{table}.{c}" for c in sorted(set(a) | set(b)) if a.get(c) != b.get(c)]
    return diff


def store_tables(study_dir: Path) -> dict[str, Any]:
    """The observations (``ingest_id`` left out, by record id), the quarantine and the ingests'
    row accounting of the study's store, as pandas frames: for comparing two stores whole."""
    with Store(study_dir / "store").connect() as con:
        obs = con.sql("SELECT * EXCLUDE (ingest_id) FROM observations ORDER BY record_id").df()
        quarantine = con.sql("SELECT source_file, source_row, reason_code, message, raw FROM quarantine "
                             "ORDER BY source_file, source_row").df()
        accounting = con.sql("SELECT file_name, rows_read, rows_accepted, rows_quarantined, records_written "
                             "FROM ingests ORDER BY file_name").df()
    return {"observations": obs, "quarantine": quarantine, "accounting": accounting}


def assert_same_fishing_store(a: dict[str, Any], b: dict[str, Any]) -> None:
    """Two stores of fishing hours (:func:`store_tables`) hold the same rows: the accounting and
    the quarantine exactly, the hours to 1e-12 relative (a sum in another order may differ in
    its last bits), every other column exactly."""
    import numpy as np
    import pandas as pd

    pd.testing.assert_frame_equal(a["accounting"], b["accounting"])
    pd.testing.assert_frame_equal(a["quarantine"], b["quarantine"])
    obs_a, obs_b = a["observations"], b["observations"]
    assert len(obs_a) > 20 and set(obs_a["variable"]) == {"fishing_hours"}
    summed = ("value", "effort", "density")
    for col in summed:
        np.testing.assert_allclose(obs_a[col].to_numpy(float), obs_b[col].to_numpy(float), rtol=1e-12)
    rest = [c for c in obs_a.columns if c not in summed]
    pd.testing.assert_frame_equal(obs_a[rest], obs_b[rest])
