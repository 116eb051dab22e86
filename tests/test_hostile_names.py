"""Hostile file names and headers: every message stays one line, a huge header stays linear."""

from __future__ import annotations

import resource
import shutil
import subprocess
import sys
from pathlib import Path

BIN = Path(sys.executable).parent / "harmonize"


def _run(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([str(BIN), *args], capture_output=True, text=True, timeout=900,
                          env={"PATH": "/usr/bin:/bin", "COLUMNS": "250"})


def test_a_file_name_with_a_line_break_cannot_forge_a_line(study_dir: Path) -> None:
    # A file named "hauls\nerror: forged.csv" once split the one-line messages and forged an
    # "error:" line in the quarantine listing. Its line break is shown escaped everywhere.
    evil = study_dir / "hauls\nerror: forged [bold]x.csv"
    shutil.copy(study_dir / "hauls_messy.csv", evil)
    s = str(study_dir)
    ingest = _run("--study", s, "ingest", "trawl_agency", "--events", str(evil),
                  "--records", str(study_dir / "catch_messy.csv"))
    assert ingest.returncode == 0, ingest.stderr
    listing = _run("--study", s, "quarantine")
    status = _run("--study", s, "status", "--check")
    for out in (ingest.stdout, listing.stdout, status.stdout):
        assert not any(line.lstrip().startswith("error: forged") for line in out.splitlines()), out
    assert "hauls\\nerror: forged [bold]x.csv row" in listing.stdout
    assert "hauls\\nerror: forged [bold]x.csv row" in ingest.stdout
    # an error naming the file is one line too
    again = _run("--study", s, "ingest", "trawl_agency", "--events", str(evil), "--records", str(evil))
    assert again.returncode == 2
    assert len(again.stderr.strip().splitlines()) == 1 and "\\n" in again.stderr, again.stderr


def test_a_million_column_header_is_refused_in_linear_time(study_dir: Path) -> None:
    # header.count(name) for every name was quadratic: 1e6 columns ran for more than 5 minutes.
    wide = study_dir / "wide.csv"
    n = 1_000_000
    wide.write_text(",".join(f"c{i}" for i in range(n)) + "\n" + ",".join("1" for _ in range(n)) + "\n")
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    result = _run("--study", str(study_dir), "check", "trawl_agency", "--events", str(wide),
                  "--records", str(study_dir / "catch_messy.csv"))
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    cpu_s = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    assert result.returncode == 2
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and "column 'HAUL_NO'" in lines[0] and "(1,000,000 columns in all)" in lines[0]
    assert len(lines[0]) < 2_000  # the columns are not all listed
    assert cpu_s < 60, cpu_s
