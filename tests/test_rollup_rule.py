"""The roll-up rule as a property: SQL result against the rule written out independently in Python.

Runs on an in-memory DuckDB selection (no store), so many random cases are cheap.
"""

from __future__ import annotations

from pathlib import Path

import duckdb
import pandas as pd
import pytest
from hypothesis import given
from hypothesis import strategies as st
from rollup_store import TAXA_CSV

from harmonize.export.rollup import apply_rollup
from harmonize.study import Study, load_study

MEMBERS = ("Keldora", "Keldora alba", "Keldora nigra")


@pytest.fixture(scope="module")
def study(tmp_path_factory: pytest.TempPathFactory) -> Study:
    import shutil

    folder = tmp_path_factory.mktemp("rule") / "study"
    shutil.copytree(Path(__file__).resolve().parent.parent / "fixtures" / "keldmar", folder)
    (folder / "taxa.csv").write_text(TAXA_CSV, encoding="utf-8")
    (folder / "targets.csv").write_text("protocol,taxon\n", encoding="utf-8")
    return load_study(folder)


# per event: effort, and for each member either None (not recorded) or a count >= 0
event = st.tuples(st.sampled_from([0.25, 0.5, 2.0]),
                  st.tuples(*[st.none() | st.integers(0, 5) for _ in MEMBERS]))


def _rows(events: list[tuple[float, tuple[int | None, ...]]]) -> pd.DataFrame:
    rows = []
    for i, (effort, counts) in enumerate(events):
        for taxon, n in zip(MEMBERS, counts, strict=True):
            if n is None:
                continue
            rows.append({"source_id": "s", "event_id": f"e{i}", "source_kind": "trawl", "season_year": 2020,
                         "variable": taxon, "variable_kind": "taxon", "quantity": "count", "life_stage": None,
                         "unit": "1", "effort": effort, "effort_unit": "km2", "value": float(n),
                         "density": n / effort, "zero_filled": n == 0, "record_id": f"r{i}-{taxon}",
                         "ingest_id": "i", "source_file": "f.csv", "source_row": i + 1, "flags": []})
    return pd.DataFrame(rows)


def _expected(events: list[tuple[float, tuple[int | None, ...]]]) -> dict[str, float]:
    """The rule in plain words: the genus has a number where it was recorded itself, or where both
    species were; that number is the sum of what was recorded, per unit effort."""
    out = {}
    for i, (effort, (genus, alba, nigra)) in enumerate(events):
        covered = genus is not None or (alba is not None and nigra is not None)
        if covered:
            out[f"e{i}"] = sum(n for n in (genus, alba, nigra) if n is not None) / effort
    return out


@given(st.lists(event, min_size=1, max_size=12))
def test_genus_density_follows_the_rule(study: Study, events: list) -> None:
    frame = _rows(events)
    if frame.empty:
        return
    con = duckdb.connect()
    con.register("_frame", frame)
    con.execute("CREATE TEMP TABLE obs AS SELECT * REPLACE (CAST(flags AS VARCHAR[]) AS flags, "
                "CAST(life_stage AS VARCHAR) AS life_stage) FROM _frame")
    con.execute("CREATE TEMP VIEW export_base AS SELECT * FROM obs")
    apply_rollup(con, study, "genus", False)
    got = con.execute("SELECT event_id, density, value, zero_filled FROM export_base").df()
    assert set(got["event_id"]) == set(_expected(events))
    assert dict(zip(got["event_id"], got["density"], strict=True)) == pytest.approx(_expected(events))
    # a zero only where every recorded member is a zero
    for r in got.itertuples(index=False):
        counts = [n for n in events[int(r.event_id[1:])][1] if n is not None]
        assert (r.value == 0) == all(n == 0 for n in counts)
    con.close()

