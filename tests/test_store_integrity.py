"""The store knows when it is damaged: checksums, a full read of every live file, a lost database.

Every parquet file the manifest commits carries the sha256 and size of its bytes; ``status
--check`` (``Store.check``) recomputes them, reads every page, and names the damaged file and
the ingest it belongs to. The expected digests here are computed with hashlib directly on the
files' bytes, not with the code under test.
"""

from __future__ import annotations

import hashlib
import os
import shutil
import subprocess
import sys
from pathlib import Path

import duckdb
import pytest

from harmonize import Store, load_study
from harmonize.ingest import run
from harmonize.store import STORE_VERSION

BIN = Path(sys.executable).parent / "harmonize"
FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"


def _ingest(study_dir: Path) -> Store:
    study = load_study(study_dir)
    run(study, "trawl_agency", {"events": study_dir / "hauls_messy.csv", "records": study_dir / "catch_messy.csv"})
    return Store(study.store_dir)


def _manifest(store: Store) -> list[tuple[str, str, int, str, int]]:
    with store.connect(view=False) as con:
        return con.execute(
            "SELECT ingest_id, path, n_rows, sha256, size_bytes FROM observation_files ORDER BY path").fetchall()


def _cli(study_dir: Path, *args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([str(BIN), "--study", str(study_dir), *args], capture_output=True, text=True,
                          timeout=300, env={**os.environ, "COLUMNS": "250"})


@pytest.fixture(scope="module")
def built_store(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """One ingested copy of the Keldmar trawl fixture; tests copy it before changing anything."""
    target = tmp_path_factory.mktemp("built") / "study"
    shutil.copytree(FIXTURES / "keldmar", target)
    for f in (FIXTURES / "trawl").glob("*.csv"):
        shutil.copy(f, target / f.name)
    _ingest(target)
    return target


@pytest.fixture
def ingested(built_store: Path, tmp_path: Path) -> Path:
    target = tmp_path / "study"
    shutil.copytree(built_store, target)
    return target


def test_the_manifest_records_each_files_sha256_and_size(ingested: Path) -> None:
    store = Store(ingested / "store")
    rows = _manifest(store)
    assert rows
    for _, rel, _, sha, size in rows:
        data = (store.directory / rel).read_bytes()
        assert sha == hashlib.sha256(data).hexdigest()
        assert size == len(data)
    assert store.store_version() == STORE_VERSION >= 3  # checksums since version 3
    assert store.check() == []


@pytest.mark.slow  # a sweep over every live file (the fast lane has the single-damage tests)
def test_a_bit_flip_sweep_is_caught_every_time(ingested: Path) -> None:
    # One flipped bit anywhere in a live file (header magic, data pages, footer) must be
    # reported by the check, naming the file and its ingest. Positions: every byte of the
    # first and last 16 bytes, and evenly spread positions between them, a different bit each.
    store = Store(ingested / "store")
    caught = tried = 0
    for ingest_id, rel, _, _, _ in _manifest(store):
        path = store.directory / rel
        original = path.read_bytes()
        n = len(original)
        positions = sorted(set(range(16)) | set(range(n - 16, n)) | set(range(16, n - 16, max(1, (n - 32) // 60))))
        for k, pos in enumerate(positions):
            damaged = bytearray(original)
            damaged[pos] ^= 1 << (k % 8)
            path.write_bytes(bytes(damaged))
            problems = store.check()
            tried += 1
            if any(ingest_id in p and rel in p for p in problems):
                caught += 1
            path.write_bytes(original)
    assert tried >= 90
    assert caught == tried
    print(f"bit flips caught by the check: {caught} of {tried}")
    assert store.check() == []


@pytest.mark.subprocess
def test_a_truncated_or_missing_file_is_named_with_its_ingest(ingested: Path) -> None:
    store = Store(ingested / "store")
    ingest_id, rel, _, _, size = _manifest(store)[0]
    path = store.directory / rel
    with open(path, "r+b") as fh:
        fh.truncate(size // 2)
    result = _cli(ingested, "status", "--check")
    assert result.returncode == 1
    assert f"integrity problem: ingest {ingest_id}: file {rel} has {size // 2:,} bytes" in result.stdout
    assert "harmonize repair" in result.stdout
    path.unlink()
    assert store.check() == [f"ingest {ingest_id}: file {rel} is missing"]


def test_a_same_size_rewrite_with_other_values_is_caught(ingested: Path) -> None:
    # A file rewritten with other values (here: every weight doubled) and the same row count
    # passed the old row-count check; its checksum differs.
    store = Store(ingested / "store")
    ingest_id, rel, n_rows, _, _ = _manifest(store)[0]
    path = store.directory / rel
    con = duckdb.connect()
    con.execute(f"COPY (SELECT * REPLACE (value * 2 AS value) FROM read_parquet('{path}')) TO '{path}.tmp' "
                "(FORMAT parquet, COMPRESSION zstd)")
    con.close()
    os.replace(f"{path}.tmp", path)
    problems = store.check()
    assert problems and problems[0].startswith(f"ingest {ingest_id}: file {rel} ")


@pytest.mark.subprocess
def test_a_lost_database_is_not_an_empty_study(ingested: Path, tmp_path: Path) -> None:
    store = Store(ingested / "store")
    n_files = len(_manifest(store))
    store.db_path.unlink()
    problems = store.check()
    assert len(problems) == 1 and "database" in problems[0] and "is missing" in problems[0]
    result = _cli(ingested, "status", "--check")
    assert result.returncode == 1
    assert f"{n_files:,} parquet file(s) remain" in result.stdout
    # the next ingest refuses to write instead of deleting the files no manifest lists now
    before = sorted(p.relative_to(store.directory) for p in store.directory.rglob("*.parquet"))
    ingest = _cli(ingested, "ingest", "trawl_agency", "--events", str(ingested / "hauls_messy.csv"),
                  "--records", str(ingested / "catch_messy.csv"))
    assert ingest.returncode == 2
    assert "harmonize repair" in ingest.stderr and len(ingest.stderr.strip().splitlines()) == 1
    assert sorted(p.relative_to(store.directory) for p in store.directory.rglob("*.parquet")) == before
    assert not store.db_path.exists()
    # an empty study is fine
    empty = tmp_path / "empty"
    shutil.copytree(FIXTURES / "keldmar", empty)
    result = _cli(empty, "status", "--check")
    assert result.returncode == 0 and "nothing ingested yet" in result.stdout


def test_a_version_2_store_migrates_on_open(ingested: Path) -> None:
    # A store written before the checksums: no sha256 / size_bytes / damage_reason columns,
    # store_version 2. Opening it to write (or checking it) adds them and records the digests.
    store = Store(ingested / "store")
    with store.connect(read_only=False, view=False) as con:
        con.execute("ALTER TABLE observation_files DROP COLUMN sha256")
        con.execute("ALTER TABLE observation_files DROP COLUMN size_bytes")
        con.execute("ALTER TABLE ingests DROP COLUMN damage_reason")
        con.execute("UPDATE store_meta SET value = '2' WHERE key = 'store_version'")
    con = duckdb.connect(str(store.db_path), read_only=True)
    assert con.execute("SELECT value FROM store_meta WHERE key = 'store_version'").fetchall() == [("2",)]
    con.close()
    assert store.check() == []
    assert store.store_version() == STORE_VERSION
    for _, rel, _, sha, size in _manifest(store):
        data = (store.directory / rel).read_bytes()
        assert (sha, size) == (hashlib.sha256(data).hexdigest(), len(data))
    with store.connect(view=False) as con:
        assert con.execute("SELECT count(damage_reason) FROM ingests").fetchall() == [(0,)]


def _data_rows(path: Path) -> int:
    # counted here with the csv module, independently of the readers under test
    import csv

    with path.open(newline="", encoding="utf-8") as f:
        return sum(1 for row in csv.reader(f) if row) - 1


def test_rows_missing_from_the_accounting_are_named_by_what_the_ingest_recorded(ingested: Path) -> None:
    study = load_study(ingested)
    shutil.copy(FIXTURES / "effort" / "pings_hand.csv", ingested / "pings_hand.csv")
    run(study, "effort_pings", {"rows": ingested / "pings_hand.csv"})
    store = Store(study.store_dir)
    with store.connect(read_only=False, view=False) as con:
        # the pipeline records what the adapter says: trawl rows are traced one by one, pings in bulk
        assert dict(con.execute("SELECT source_kind, row_traced FROM ingests").fetchall()) == {
            "trawl": True, "effort": False}
    assert store.check() == []
    with store.connect(read_only=False, view=False) as con:
        # a quarantined catch row vanishes: the row accounting of the catch file no longer closes
        ingest_id, name = con.execute("SELECT ingest_id, source_file FROM quarantine WHERE source_file = "
                                      "'catch_messy.csv' ORDER BY source_row LIMIT 1").fetchall()[0]
        con.execute("DELETE FROM quarantine WHERE ingest_id = ? AND source_file = ? AND source_row = "
                    "(SELECT min(source_row) FROM quarantine WHERE source_file = ?)", [ingest_id, name, name])
    n = _data_rows(ingested / "catch_messy.csv")
    missing = f"ingest {ingest_id}: catch_messy.csv has {n} data rows but only {n - 1} are accepted or quarantined"
    assert missing in store.check()
    # an ingest committed before store version 6 recorded nothing: traced when the caller names its kind
    with store.connect(read_only=False, view=False) as con:
        con.execute("UPDATE ingests SET row_traced = NULL")
    assert missing not in store.check()
    assert missing in store.check(legacy_row_traced_kinds=("trawl",))
    assert missing not in store.check(legacy_row_traced_kinds=("effort",))
    # ... and a recorded "not traced" is not overridden by the caller's kinds
    with store.connect(read_only=False, view=False) as con:
        con.execute("UPDATE ingests SET row_traced = false")
    assert missing not in store.check(legacy_row_traced_kinds=("trawl",))
