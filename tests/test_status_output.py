"""`harmonize status` never cuts a number or an id; piped output is not hard-wrapped."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

BIN = Path(sys.executable).parent / "harmonize"


def _status(study_dir: Path, columns: str | None) -> str:
    """``status`` piped (columns None), or on a terminal of that width (a pseudo-terminal)."""
    env = {k: v for k, v in os.environ.items() if k != "COLUMNS"}
    env["NO_COLOR"] = "1"
    args = [str(BIN), "--study", str(study_dir), "status"]
    if columns is None:
        out = subprocess.run(args, capture_output=True, text=True, timeout=120, env=env)
        assert out.returncode == 0, out.stderr
        return out.stdout
    import pty

    env["COLUMNS"] = columns  # rich takes a terminal's width from COLUMNS
    master, slave = pty.openpty()
    proc = subprocess.Popen(args, stdout=slave, stderr=subprocess.PIPE, env=env)
    os.close(slave)
    chunks = []
    while True:
        try:
            data = os.read(master, 65536)
        except OSError:  # the terminal closed: the process has ended
            break
        if not data:
            break
        chunks.append(data)
    os.close(master)
    assert proc.wait(timeout=120) == 0, proc.stderr.read() if proc.stderr else ""
    return b"".join(chunks).decode("utf-8", "replace").replace("\r\n", "\n")


def test_status_keeps_numbers_and_ids_whole(study_dir: Path) -> None:
    ingest = subprocess.run([str(BIN), "--study", str(study_dir), "ingest", "trawl_agency", "--events",
                             str(study_dir / "hauls_messy.csv"), "--records", str(study_dir / "catch_messy.csv")],
                            capture_output=True, text=True, timeout=120)
    assert ingest.returncode == 0, ingest.stderr
    import duckdb

    con = duckdb.connect(str(study_dir / "store" / "harmonized.duckdb"), read_only=True)
    ingest_id, read, accepted, written = con.execute(
        "SELECT ingest_id, rows_read, rows_accepted, records_written FROM ingests").fetchall()[0]
    con.close()
    # piped, no COLUMNS: the whole id on one line, nothing cut, no line wrapped
    piped = _status(study_dir, None)
    assert "…" not in piped
    assert any(ingest_id in line for line in piped.splitlines())
    # a narrow terminal: the id shortened by the documented rule, the numbers whole
    narrow = _status(study_dir, "72")
    assert "…" not in narrow
    assert ingest_id.rsplit("-", 1)[-1] in narrow and "shortened to the part after their last '-'" in narrow
    for n in (read, accepted, written):
        assert f" {n:,} " in narrow
