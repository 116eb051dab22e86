"""Crash safety under random kills: SIGKILL at random moments, then check, then re-run.

tests/test_store.py kills an ingest at each named point of the commit. Here a real
``harmonize ingest --replace`` is killed with SIGKILL at a random moment of its run, over
and over on one store that keeps its history. After each kill: ``harmonize status --check``
passes (manifest, parquet files and row accounting agree), the source is served by exactly
one complete ingest, either the old content's or the new content's and all of it (never a
mix), and the re-run completes. The number of kills follows the hypothesis profile: a sixth
of its max_examples (6 in "ci", 66 with HYPOTHESIS_PROFILE=dev).
"""

from __future__ import annotations

import os
import random
import subprocess
import sys
import time
from pathlib import Path

import pandas as pd
import pytest
from cli_runner import cli
from hypothesis import settings

from harmonize.store import Store

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
N_KILLS = max(4, settings().max_examples // 6)

# Imports are paid before "go", so that the random moment falls inside the ingest itself.
_WRAPPER = """
import sys
from harmonize.cli.app import main
from harmonize.adapters.registry import list_adapters
list_adapters()
print("ready", flush=True)
sys.stdin.readline()
main(sys.argv[1:])
"""


def _write_survey(folder: Path, version: int) -> tuple[Path, Path]:
    """The messy trawl fixture repeated over 20 years (20 partitions); ``version`` adds one catch row."""
    hauls = pd.read_csv(FIXTURES / "trawl" / "hauls_messy.csv", dtype=str, keep_default_na=False)
    catch = pd.read_csv(FIXTURES / "trawl" / "catch_messy.csv", dtype=str, keep_default_na=False)
    h_parts, c_parts = [], []
    for year in range(2001, 2021):
        for copy in range(3):
            tag = f"_{year}_{copy}"
            h = hauls.assign(HAUL_NO=hauls["HAUL_NO"] + tag)
            for col in ("START", "END"):
                h[col] = h[col].str.replace("2020-", f"{year}-", regex=False).str.replace("2019-", f"{year - 1}-", regex=False)
            h_parts.append(h)
            c_parts.append(catch.assign(HAUL=catch["HAUL"] + tag))
    extra = pd.DataFrame([{"HAUL": "H001_2020_0", "SPECIES": "pale lumb", "WT_G": str(100 + version), "N": "1", "STAGE": ""}])
    events, records = folder / "hauls_many.csv", folder / "catch_many.csv"
    pd.concat(h_parts).to_csv(events, index=False)
    pd.concat([*c_parts, extra]).to_csv(records, index=False)
    return events, records


def _start(study_dir: Path, events: Path, records: Path) -> subprocess.Popen[str]:
    proc = subprocess.Popen(
        [sys.executable, "-c", _WRAPPER, "--study", str(study_dir), "ingest", "--replace", "trawl_agency",
         "--events", str(events), "--records", str(records)],
        stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
    )
    assert proc.stdout is not None and proc.stdout.readline().strip() == "ready"
    return proc


def _serving(store: Store) -> tuple[pd.DataFrame, int]:
    """Complete ingests of the source, and its rows visible in the observations view."""
    with store.connect() as con:
        complete = con.execute(
            "SELECT ingest_id, inputs_sha256, records_written FROM ingests WHERE status = 'complete'").df()
        n_rows = con.execute("SELECT count(*) FROM observations").fetchall()[0][0]
        mixed = con.execute("SELECT count(DISTINCT ingest_id) FROM observations").fetchall()[0][0]
    assert mixed <= 1, "rows of two ingests of one file are visible at once"
    return complete, int(n_rows)


@pytest.mark.subprocess
@pytest.mark.slow
def test_random_sigkills_never_lose_or_mix_an_ingest(study_dir: Path, capsys: pytest.CaptureFixture[str]) -> None:
    rng = random.Random(int(os.environ.get("HARMONIZE_KILL_SEED", "11")))
    store = Store(study_dir / "store")

    # version 0, run to the end: the store's starting state and the length of one ingest
    events, records = _write_survey(study_dir, 0)
    proc = _start(study_dir, events, records)
    began = time.monotonic()
    _, err = proc.communicate("go\n", timeout=300)
    duration = time.monotonic() - began
    assert proc.returncode == 0, err
    complete, n_rows = _serving(store)
    assert len(complete) == 1 and n_rows == complete["records_written"].iloc[0] > 1000

    kills = finished = killed_after_commit = 0
    for version in range(1, N_KILLS + 1):
        old_sha = complete["inputs_sha256"].iloc[0]
        events, records = _write_survey(study_dir, version)
        proc = _start(study_dir, events, records)
        delay = rng.uniform(0.0, duration)
        assert proc.stdin is not None
        proc.stdin.write("go\n")
        proc.stdin.flush()
        time.sleep(delay)
        proc.kill()
        proc.communicate(timeout=60)
        if proc.returncode == -9:
            kills += 1
        else:
            assert proc.returncode == 0
            finished += 1

        # the store opens and passes its integrity check
        code, out, err = cli(capsys, "--study", str(study_dir), "status", "--check")
        assert code == 0 and "integrity check passed" in out, (version, delay, out, err)
        # all or nothing: one complete ingest serves the file, with every one of its rows
        complete, n_rows = _serving(store)
        assert len(complete) == 1, (version, delay, complete)
        assert n_rows == complete["records_written"].iloc[0]
        committed = complete["inputs_sha256"].iloc[0] != old_sha
        killed_after_commit += committed and proc.returncode == -9

        # the re-run completes (or finds the killed run's commit and has nothing to do)
        code, out, err = cli(capsys, "--study", str(study_dir), "ingest", "--replace", "trawl_agency",
                             "--events", str(events), "--records", str(records))
        assert code == 0, (version, delay, err)
        assert ("nothing to do" in out) == committed, (version, delay, out)
        assert store.check() == []
        complete, n_rows = _serving(store)
        assert len(complete) == 1 and n_rows == complete["records_written"].iloc[0]

    # a last commit sweeps what killed runs left behind: no stray parquet, no staging folder
    events, records = _write_survey(study_dir, N_KILLS + 1)
    code, _, err = cli(capsys, "--study", str(study_dir), "ingest", "--replace", "trawl_agency",
                       "--events", str(events), "--records", str(records))
    assert code == 0, err
    with store.connect() as con:
        live = {r[0] for r in con.execute("SELECT path FROM observation_files").fetchall()}
    on_disk = {p.relative_to(store.directory).as_posix() for p in (store.directory / "observations").rglob("*.parquet")}
    assert on_disk == live
    staging = store.directory / "staging"
    assert not staging.is_dir() or not any(staging.iterdir())
    assert kills >= N_KILLS // 2, f"only {kills} of {N_KILLS} runs were killed before they finished"
    print(f"random SIGKILLs survived: {kills}, {killed_after_commit} of them after the commit "
          f"(runs that finished first: {finished})")
