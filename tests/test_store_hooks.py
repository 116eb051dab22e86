"""The store's commit hooks and fault-injection points.

The store calls what other layers register (the volunteer twins are one such hook) inside the
commit's transaction, and passes named fault points where a test can make it fail.
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import duckdb
import pytest

from harmonize import Store, faults, load_study, run, twins
from harmonize.store import IngestRecord, commit_hooks, register_commit_hook, unregister_commit_hook


def _ingest(study_dir: Path):  # type: ignore[no-untyped-def]
    return run(load_study(study_dir), "trawl_agency",
               {"events": study_dir / "hauls_messy.csv", "records": study_dir / "catch_messy.csv"})


@pytest.fixture
def probe() -> Iterator[list[IngestRecord | None]]:
    seen: list[IngestRecord | None] = []
    yield seen
    unregister_commit_hook("probe")


def test_the_pipeline_installs_the_twins_hook() -> None:
    assert twins.on_commit in commit_hooks()


def test_a_hook_runs_inside_the_commit_and_its_flags_reach_the_view(study_dir: Path, probe: list) -> None:
    def flag_first_row(con: duckdb.DuckDBPyConnection, record: IngestRecord | None) -> None:
        probe.append(record)
        # inside the transaction: the new rows are visible to the hook, the ingest not yet committed
        assert con.execute("SELECT count(*) FROM observations_base WHERE ingest_id = ?",
                           [record.ingest_id]).fetchall()[0][0] == 29
        con.execute("""INSERT INTO store_flags SELECT record_id, ingest_id, 'looked_at' FROM observations_base
                       WHERE ingest_id = ? ORDER BY record_id LIMIT 1""", [record.ingest_id])

    register_commit_hook("probe", flag_first_row)
    result = _ingest(study_dir)
    assert [r.ingest_id for r in probe] == [result.ingest_id]
    store = Store(load_study(study_dir).store_dir)
    with store.connect() as con:
        flagged = con.execute("SELECT source_kind, record_id FROM observations "
                              "WHERE list_contains(flags, 'looked_at')").fetchall()
        first = con.execute("SELECT min(record_id) FROM observations").fetchall()[0][0]
        n = con.execute("SELECT count(*) FROM observations").fetchall()[0][0]
    # a trawl row: the view adds store flags to any kind that has them, not only volunteers
    assert flagged == [("trawl", first)] and n == 29


def test_a_failing_hook_rolls_the_whole_commit_back(study_dir: Path, probe: list) -> None:
    def fail(con: duckdb.DuckDBPyConnection, record: IngestRecord | None) -> None:
        probe.append(record)
        raise RuntimeError("hook failed")

    register_commit_hook("probe", fail)
    with pytest.raises(RuntimeError, match="hook failed"):
        _ingest(study_dir)
    assert len(probe) == 1
    store = Store(load_study(study_dir).store_dir)
    assert store.check() == []
    assert len(store.ingests(include_superseded=False)) == 0
    with store.connect() as con:
        assert con.execute("SELECT count(*) FROM observations").fetchall()[0][0] == 0
    unregister_commit_hook("probe")
    assert _ingest(study_dir).status == "complete"
    assert store.check() == []


def test_unknown_fault_point_is_refused() -> None:
    with pytest.raises(ValueError, match="no fault-injection point 'midway'; the points are moving, "
                                         "before_transaction, events_without_values, before_commit, after_commit"):
        faults.install("midway", faults.kill)


@pytest.mark.parametrize("point", ["moving", "before_transaction", "before_commit"])
def test_a_fault_before_the_commit_leaves_nothing(study_dir: Path, point: str) -> None:
    class Fault(Exception):
        pass

    def fail() -> None:
        raise Fault(point)

    with faults.injected(point, fail), pytest.raises(Fault):
        _ingest(study_dir)
    store = Store(load_study(study_dir).store_dir)
    assert store.check() == []
    assert len(store.ingests(include_superseded=False)) == 0
    faults.point(point)   # removed again: passing the point does nothing
    assert _ingest(study_dir).status == "complete"


def test_a_fault_after_the_commit_keeps_the_ingest(study_dir: Path) -> None:
    passed: list[str] = []
    with faults.injected("after_commit", lambda: passed.append("after_commit")):
        _ingest(study_dir)
    assert passed == ["after_commit"]
    assert len(Store(load_study(study_dir).store_dir).ingests(include_superseded=False)) == 1


def test_the_old_crash_variable_does_nothing(study_dir: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("HARMONIZE_CRASH_AT", "before_commit")   # read by no library code any more
    assert _ingest(study_dir).status == "complete"
