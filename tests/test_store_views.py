"""The persisted observations views and the digests that let a connection reuse them.

A reading connection uses the views the last writer persisted when the SELECT each would define
now is the one recorded; otherwise it defines temporary ones. Whatever the path, what the
``observations`` view returns must be the rows of the live parquet files: the rule is written
here from the manifest and pyarrow, not from the store's SQL.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import pyarrow.parquet as pq
import pytest

from harmonize import Store, load_study
from harmonize.ingest import run


def _ingest(study_dir: Path, profile: str = "trawl_agency") -> None:
    result = run(load_study(study_dir), profile, {"events": study_dir / "hauls_messy.csv",
                                                  "records": study_dir / "catch_messy.csv"})
    assert result.status == "complete"


@pytest.fixture
def study(study_dir: Path) -> Path:
    """The small study with one trawl source ingested, and a second trawl source's profile."""
    target = study_dir
    prof = (target / "profiles" / "trawl_agency.toml").read_text()
    (target / "profiles" / "trawl_b.toml").write_text(prof.replace('id = "keldmar_trawl"', 'id = "keldmar_trawl_b"'))
    _ingest(target)
    return target


def _live_rows(store: Store) -> int:
    """Rows of the live part files, counted by pyarrow from the manifest (trawl rows span no files)."""
    with store.connect(view=False) as con:
        paths = store.live_paths(con)
    return sum(pq.ParquetFile(store.directory / p).metadata.num_rows for p in paths)


def _temporary_views(con) -> set[str]:
    return {r[0] for r in con.execute("SELECT view_name FROM duckdb_views() WHERE temporary AND NOT internal").fetchall()}


def test_a_reader_of_a_current_store_uses_the_persisted_views(study: Path) -> None:
    store = Store(study / "store")
    with store.connect() as con:
        assert _temporary_views(con) == set()
        assert con.execute("SELECT count(*) FROM observations").fetchone()[0] == _live_rows(store)


def test_a_second_ingest_is_seen_by_the_next_reader(study: Path) -> None:
    store = Store(study / "store")
    before = _live_rows(store)
    _ingest(study, "trawl_b")
    after = _live_rows(store)
    assert after > before
    with store.connect() as con:
        assert _temporary_views(con) == set()
        assert con.execute("SELECT count(*) FROM observations").fetchone()[0] == after
        assert con.execute("SELECT count(*) FROM current").fetchone()[0] == after
        sources = {r[0] for r in con.execute("SELECT DISTINCT source_id FROM observations").fetchall()}
    assert sources == {"keldmar_trawl", "keldmar_trawl_b"}


def test_a_stale_digest_makes_the_reader_define_its_own_views(study: Path) -> None:
    """A persisted view whose recorded SELECT is not the one of now (e.g. a store last written
    by another version of harmonize) is not trusted: the reader defines temporary views."""
    store = Store(study / "store")
    with store.connect(read_only=False, view=False) as con:
        con.execute("UPDATE store_meta SET value = 'not-this' WHERE key = 'view_sql:observations_base'")
        # and the persisted view itself made wrong: were it used, the count would be 0
        con.execute("CREATE OR REPLACE VIEW observations_base AS SELECT * FROM observation_parts LIMIT 0")
    with store.connect() as con:
        assert _temporary_views(con) == {"observation_parts", "observations_base", "observations", "current"}
        assert con.execute("SELECT count(*) FROM observations").fetchone()[0] == _live_rows(store)
    # the next writer puts the persisted views right and records their digests again
    with store.connect(read_only=False):
        pass
    with store.connect() as con:
        assert _temporary_views(con) == set()
        assert con.execute("SELECT count(*) FROM observations").fetchone()[0] == _live_rows(store)


def test_a_dropped_persisted_view_is_not_trusted(study: Path) -> None:
    store = Store(study / "store")
    with store.connect(read_only=False, view=False) as con:
        con.execute("DROP VIEW current")
    with store.connect() as con:
        assert "current" in _temporary_views(con)
        assert con.execute("SELECT count(*) FROM current").fetchone()[0] == _live_rows(store)


def test_a_moved_study_folder_still_reads(study: Path, tmp_path: Path) -> None:
    moved = tmp_path / "elsewhere" / "study"
    moved.parent.mkdir()
    shutil.move(study, moved)
    store = Store(moved / "store")
    with store.connect() as con:
        assert con.execute("SELECT count(*) FROM observations").fetchone()[0] == _live_rows(store)


def test_a_database_without_tables_is_an_empty_store_the_check_completes(study_dir: Path) -> None:
    """A first ingest stopped (e.g. by Ctrl-C) after DuckDB created the database file but
    before the store's tables: the check upgrades it to an empty store, and an ingest lands."""
    import duckdb

    store = Store(study_dir / "store")
    store.directory.mkdir()
    duckdb.connect(str(store.db_path)).close()
    assert store.store_version() == 0
    assert store.check() == []
    with store.connect() as con:
        assert con.execute("SELECT count(*) FROM observations").fetchone()[0] == 0
    _ingest(study_dir)
    assert _live_rows(store) > 0
    with store.connect() as con:
        assert con.execute("SELECT count(*) FROM observations").fetchone()[0] == _live_rows(store)
