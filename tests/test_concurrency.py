"""Concurrent use of one store: writers queue, readers wait, nothing is corrupted or lost.

DuckDB allows one read-write process or many read-only ones (DuckDB docs, "Concurrency");
harmonize waits for the lock (HARMONIZE_LOCK_TIMEOUT, 60 s by default) and then says the
store is busy. These tests start real harmonize processes at the same moment.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import pytest

from harmonize.store import Store

pytestmark = [pytest.mark.subprocess, pytest.mark.slow]

BIN = Path(sys.executable).parent / "harmonize"


def _popen(*args: str, env: dict[str, str] | None = None) -> subprocess.Popen[str]:
    return subprocess.Popen([str(BIN), *args], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            env={**os.environ, "COLUMNS": "200", **(env or {})})


def _trawl_files(study_dir: Path) -> list[str]:
    return ["--events", str(study_dir / "hauls_messy.csv"), "--records", str(study_dir / "catch_messy.csv")]


def _second_profile(study_dir: Path, name: str, source_id: str) -> None:
    prof = (study_dir / "profiles" / "trawl_agency.toml").read_text()
    (study_dir / "profiles" / f"{name}.toml").write_text(prof.replace('id = "keldmar_trawl"', f'id = "{source_id}"'))


def test_two_ingests_and_an_audit_at_once(study_dir: Path) -> None:
    s = str(study_dir)
    first = subprocess.run([str(BIN), "--study", s, "ingest", "trawl_agency", *_trawl_files(study_dir)],
                           capture_output=True, text=True, timeout=300)
    assert first.returncode == 0, first.stderr
    _second_profile(study_dir, "trawl_b", "keldmar_trawl_b")
    _second_profile(study_dir, "trawl_c", "keldmar_trawl_c")
    report = study_dir / "audit.json"
    procs = {
        "b": _popen("--study", s, "ingest", "trawl_b", *_trawl_files(study_dir)),
        "c": _popen("--study", s, "ingest", "trawl_c", *_trawl_files(study_dir)),
        "audit": _popen("--study", s, "audit", "--json", str(report)),
    }
    for name, proc in procs.items():
        out, err = proc.communicate(timeout=300)
        assert proc.returncode == 0, (name, out, err)
    store = Store(study_dir / "store")
    assert store.check() == []
    ingests = store.ingests()
    assert sorted(ingests["source_id"]) == ["keldmar_trawl", "keldmar_trawl_b", "keldmar_trawl_c"]
    with store.connect() as con:
        per_source = dict(con.execute("SELECT source_id, count(*) FROM observations GROUP BY 1").fetchall())
        one_source = con.execute(
            """SELECT sum(n) FROM (SELECT count(DISTINCT event_id) AS n FROM observations
               WHERE source_id = 'keldmar_trawl' GROUP BY source_kind, season, depth_layer)""").fetchall()[0][0]
    # 29 each: haul H011 (2019-12-15) is in season year 2020, outside a 2015-2019 target window
    assert per_source == {"keldmar_trawl": 29, "keldmar_trawl_b": 29, "keldmar_trawl_c": 29}
    # the audit saw a consistent store: the first source in full, each other all or nothing
    audit = json.loads(report.read_text())
    events = sum(row["events"] for row in audit["extent"])
    assert one_source > 0 and events in {n * one_source for n in (1, 2, 3)}, (events, one_source)


def test_the_same_file_ingested_twice_at_once_lands_once(study_dir: Path) -> None:
    s = str(study_dir)
    procs = [_popen("--study", s, "ingest", "trawl_agency", *_trawl_files(study_dir)) for _ in range(2)]
    results = [(p.returncode, *p.communicate(timeout=300)) for p in procs]
    results = [(p.returncode, out, err) for p, (_, out, err) in zip(procs, results, strict=True)]
    codes = sorted(code for code, _, _ in results)
    # one writes; the other finds it done ("nothing to do") or is told clearly that another
    # process ingested the file meanwhile
    assert codes in ([0, 0], [0, 2]), results
    for code, out, err in results:
        if code == 2:
            assert "was ingested by another process meanwhile" in err and len(err.strip().splitlines()) == 1, err
        else:
            assert "ingested" in out or "nothing to do" in out, out
    store = Store(study_dir / "store")
    assert store.check() == []
    assert len(store.ingests()) == 1


def test_writer_waits_for_a_reader_then_commits(study_dir: Path) -> None:
    # An analyst holds the store open read-only (as R or Python would) for 3 s; the ingest
    # waits for the lock instead of failing, and commits once the reader leaves.
    s = str(study_dir)
    first = subprocess.run([str(BIN), "--study", s, "ingest", "trawl_agency", *_trawl_files(study_dir)],
                           capture_output=True, text=True, timeout=300)
    assert first.returncode == 0, first.stderr
    reader = subprocess.Popen([sys.executable, "-c", textwrap.dedent(f"""
        import duckdb, time
        con = duckdb.connect({str(study_dir / 'store' / 'harmonized.duckdb')!r}, read_only=True)
        con.execute("SELECT count(*) FROM ingests").fetchall()
        print("reading", flush=True)
        time.sleep(3)
        con.close()
    """)], stdout=subprocess.PIPE, text=True)
    try:
        assert reader.stdout is not None and reader.stdout.readline().strip() == "reading"
        _second_profile(study_dir, "trawl_b", "keldmar_trawl_b")
        start = time.monotonic()
        out = subprocess.run([str(BIN), "--study", s, "ingest", "trawl_b", *_trawl_files(study_dir)],
                             capture_output=True, text=True, timeout=300)
        waited = time.monotonic() - start
    finally:
        reader.wait(timeout=60)
    assert out.returncode == 0, out.stderr
    assert waited >= 1.0  # it did wait for the reader
    store = Store(study_dir / "store")
    assert store.check() == []
    assert len(store.ingests()) == 2


def test_writer_blocked_by_a_long_reader_gets_a_clear_message(study_dir: Path) -> None:
    s = str(study_dir)
    subprocess.run([str(BIN), "--study", s, "ingest", "trawl_agency", *_trawl_files(study_dir)],
                   capture_output=True, text=True, timeout=300, check=True)
    reader = subprocess.Popen([sys.executable, "-c", textwrap.dedent(f"""
        import duckdb, time
        con = duckdb.connect({str(study_dir / 'store' / 'harmonized.duckdb')!r}, read_only=True)
        print("reading", flush=True)
        time.sleep(60)
    """)], stdout=subprocess.PIPE, text=True)
    try:
        assert reader.stdout is not None and reader.stdout.readline().strip() == "reading"
        _second_profile(study_dir, "trawl_b", "keldmar_trawl_b")
        out = subprocess.run([str(BIN), "--study", s, "ingest", "trawl_b", *_trawl_files(study_dir)],
                             capture_output=True, text=True, timeout=300,
                             env={**os.environ, "HARMONIZE_LOCK_TIMEOUT": "1", "COLUMNS": "200"})
    finally:
        reader.kill()
        reader.wait()
    assert out.returncode == 2, out.stderr
    line = out.stderr.strip()
    assert len(line.splitlines()) == 1 and "the store is busy" in line and "Try again" in line, line
    store = Store(study_dir / "store")
    assert store.check() == []
    assert list(store.ingests()["source_id"]) == ["keldmar_trawl"]
