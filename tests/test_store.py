"""Store safety: a killed ingest leaves all or nothing; a second writer waits or is told."""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import pytest

from harmonize import Store, load_study

BIN = Path(sys.executable).parent / "harmonize"


# harmonize's command line in a child process that first installs a kill at one fault point
_KILLED_AT = """
import sys
from harmonize import faults
from harmonize.cli.app import main
if sys.argv[1]:
    faults.install(sys.argv[1], faults.kill)
main(sys.argv[2:])
"""


def _ingest(study_dir: Path, crash_at: str = "", profile: str = "trawl_agency") -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-c", _KILLED_AT, crash_at, "--study", str(study_dir), "ingest", profile,
         "--events", str(study_dir / "hauls_messy.csv"), "--records", str(study_dir / "catch_messy.csv")],
        capture_output=True, text=True, timeout=120,
    )


@pytest.mark.subprocess
@pytest.mark.parametrize("point", ["moving", "before_transaction", "before_commit", "after_commit"])
def test_killed_ingest_leaves_all_or_nothing(study_dir: Path, point: str) -> None:
    killed = _ingest(study_dir, point)
    assert killed.returncode == -9  # SIGKILL
    store = Store(load_study(study_dir).store_dir)
    assert store.check() == []
    complete = store.ingests(include_superseded=False) if store.exists() else None
    n_complete = 0 if complete is None else len(complete)
    assert n_complete == (1 if point == "after_commit" else 0)
    if n_complete == 0 and store.exists():
        with store.connect() as con:
            assert con.execute("SELECT count(*) FROM observations").fetchall()[0][0] == 0
    # the re-run completes (or finds the committed ingest) and the store is sound
    rerun = _ingest(study_dir)
    assert rerun.returncode == 0, rerun.stderr
    assert ("nothing to do" in rerun.stdout) == (point == "after_commit")
    assert store.check() == []
    with store.connect() as con:
        assert con.execute("SELECT count(*) FROM observations").fetchall()[0][0] == 29  # H011 (2019-12-15) is in season year 2020: no Calverion rubrum zeros (2015-2019)
    # leftovers of the killed run are removed by the next writer (after_commit: the re-run
    # found nothing to write, so its staging folder waits for the next one)
    if point != "after_commit":
        staging = store.directory / "staging"
        assert not staging.is_dir() or list(staging.iterdir()) == []


@pytest.mark.subprocess
@pytest.mark.parametrize("point", ["moving", "before_transaction", "events_without_values", "before_commit",
                                   "after_commit"])
def test_killed_ingest_with_an_empty_haul_leaves_all_or_nothing(study_dir: Path, point: str) -> None:
    # Without a protocol, haul H010 (no catch row) yields no observation row: it is written to
    # events_without_values in the ingest's transaction, so a kill leaves it with the ingest or not at all.
    text = (study_dir / "profiles" / "trawl_agency.toml").read_text()
    (study_dir / "profiles" / "trawl_bare.toml").write_text(text.replace('protocol = "keldmar_bottom_trawl"\n', ""))
    killed = _ingest(study_dir, point, profile="trawl_bare")
    assert killed.returncode == -9  # SIGKILL
    store = Store(load_study(study_dir).store_dir)
    committed = point == "after_commit"
    if store.exists():
        assert store.check() == []
        assert len(store.ingests(include_superseded=False)) == int(committed)
        assert list(store.events_without_values()["event_id"]) == (["H010"] if committed else [])
        with store.connect() as con:  # not even rows of an ingest that never committed
            n = con.execute("SELECT count(*) FROM events_without_values").fetchall()[0][0]
        assert n == int(committed)
    else:
        assert not committed
    rerun = _ingest(study_dir, profile="trawl_bare")
    assert rerun.returncode == 0, rerun.stderr
    assert ("nothing to do" in rerun.stdout) == committed
    assert ("accepted events without any observation row: 1" in rerun.stdout) == (not committed)
    assert store.check() == []
    assert list(store.events_without_values()["event_id"]) == ["H010"]
    with store.connect() as con:
        assert con.execute("SELECT count(*) FROM observations").fetchall()[0][0] == 15


@pytest.mark.subprocess
def test_second_writer_is_told_the_store_is_busy(study_dir: Path) -> None:
    _ingest(study_dir)
    holder = subprocess.Popen(
        [sys.executable, "-c", textwrap.dedent(f"""
            import duckdb, time, sys
            con = duckdb.connect({str(study_dir / 'store' / 'harmonized.duckdb')!r})
            print('locked', flush=True)
            time.sleep(30)
        """)],
        stdout=subprocess.PIPE, text=True,
    )
    try:
        assert holder.stdout is not None and holder.stdout.readline().strip() == "locked"
        (study_dir / "catch_messy.csv").write_text((study_dir / "catch_messy.csv").read_text() + "H010,pale lumb,10,1,\n")
        start = time.monotonic()
        out = subprocess.run(
            [str(BIN), "--study", str(study_dir), "ingest", "--replace", "trawl_agency",
             "--events", str(study_dir / "hauls_messy.csv"), "--records", str(study_dir / "catch_messy.csv")],
            capture_output=True, text=True, timeout=120, env={**os.environ, "HARMONIZE_LOCK_TIMEOUT": "2"},
        )
        assert time.monotonic() - start >= 2  # it waited before giving up
        assert out.returncode == 2
        assert f"the store is busy (another harmonize process, PID {holder.pid})" in out.stderr
    finally:
        holder.kill()
        holder.wait()
    store = Store(study_dir / "store")
    assert store.check() == []
    assert len(store.ingests(include_superseded=False)) == 1


@pytest.mark.subprocess
def test_two_concurrent_ingests_of_different_sources_both_land(study_dir: Path) -> None:
    # A copy of the profile under another source id: two writers at once, both must commit.
    prof = study_dir / "profiles" / "trawl_agency.toml"
    (study_dir / "profiles" / "trawl_second.toml").write_text(prof.read_text().replace('id = "keldmar_trawl"', 'id = "keldmar_trawl_b"'))
    cmd = [str(BIN), "--study", str(study_dir), "ingest"]
    files = ["--events", str(study_dir / "hauls_messy.csv"), "--records", str(study_dir / "catch_messy.csv")]
    procs = [subprocess.Popen([*cmd, p, *files], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
             for p in ("trawl_agency", "trawl_second")]
    for p in procs:
        _, err = p.communicate(timeout=120)
        assert p.returncode == 0, err
    store = Store(study_dir / "store")
    assert store.check() == []
    assert sorted(store.ingests()["source_id"]) == ["keldmar_trawl", "keldmar_trawl_b"]


@pytest.mark.subprocess
def test_store_written_before_a_new_column_still_reads(study_dir: Path) -> None:
    # Files written by an older harmonize lack columns that later joined the contract: the
    # observations view reads them as null instead of failing.
    import duckdb

    _ingest(study_dir)
    store = Store(study_dir / "store")
    with store.connect() as con:
        files = [r[0] for r in con.execute("SELECT path FROM observation_files").fetchall()]
    for rel in files:
        path = store.directory / rel
        con = duckdb.connect()
        con.execute(f"COPY (SELECT * EXCLUDE (behavior, gear) FROM read_parquet('{path}')) TO '{path}.tmp' (FORMAT parquet)")
        con.close()
        os.replace(f"{path}.tmp", path)
    with store.connect(read_only=False, view=False) as con:
        # such files come from a store written before the checksums (store version 2)
        con.execute("UPDATE observation_files SET sha256 = NULL, size_bytes = NULL")
        con.execute("UPDATE store_meta SET value = '2' WHERE key = 'store_version'")
    with store.connect(read_only=False) as con:  # a writer redefines the view
        pass
    with store.connect() as con:
        rows = con.execute("SELECT count(*), count(behavior), count(gear) FROM observations").fetchall()[0]
    # 29: haul H011 (2019-12-15) is in season year 2020, outside Calverion rubrum's 2015-2019
    # target window, so it gets no zeros for it (target windows are season years, issue 17)
    assert rows == (29, 0, 0)
    assert store.check() == []
