"""Writers hold OS file locks (flock): released by the kernel when the holder dies, valid across
PID namespaces; a staging folder is cleaned only when its lock is free."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

from harmonize.store import Store

BIN = Path(sys.executable).parent / "harmonize"


def _ingest_cmd(study_dir: Path, profile: str = "trawl_agency") -> list[str]:
    return [str(BIN), "--study", str(study_dir), "ingest", profile,
            "--events", str(study_dir / "hauls_messy.csv"), "--records", str(study_dir / "catch_messy.csv")]


def _run(cmd: list[str], timeout_s: str = "60") -> subprocess.CompletedProcess[str]:
    return subprocess.run(cmd, capture_output=True, text=True, timeout=300,
                          env={**os.environ, "HARMONIZE_LOCK_TIMEOUT": timeout_s, "COLUMNS": "200"})


def _profile(study_dir: Path, name: str, source_id: str) -> None:
    prof = (study_dir / "profiles" / "trawl_agency.toml").read_text()
    (study_dir / "profiles" / f"{name}.toml").write_text(prof.replace('id = "keldmar_trawl"', f'id = "{source_id}"'))


def _holder(script: str) -> subprocess.Popen[str]:
    proc = subprocess.Popen([sys.executable, "-c", textwrap.dedent(script)], stdin=subprocess.PIPE,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    assert proc.stdout is not None
    line = proc.stdout.readline().strip()
    assert line == "ready", (line, proc.stderr.read() if proc.poll() is not None else "")
    return proc


def test_a_writer_killed_while_holding_the_lock_frees_it(study_dir: Path) -> None:
    holder = _holder(f"""
        import time
        from harmonize.store import Store
        with Store({str(study_dir / 'store')!r}).connect(read_only=False):
            print("ready", flush=True)
            time.sleep(120)
    """)
    try:
        busy = _run(_ingest_cmd(study_dir), timeout_s="1")
        assert busy.returncode == 2
        assert f"the store is busy (another harmonize process, PID {holder.pid}" in busy.stderr
        assert len(busy.stderr.strip().splitlines()) == 1
    finally:
        holder.kill()
        holder.wait()
    # the kernel released the lock with the process: the next writer does not wait for it
    done = _run(_ingest_cmd(study_dir), timeout_s="5")
    assert done.returncode == 0, done.stderr
    assert Store(study_dir / "store").check() == []


def test_staging_is_cleaned_only_when_its_lock_is_free(study_dir: Path) -> None:
    store_dir = study_dir / "store"
    holder = _holder(f"""
        import sys
        from harmonize.store import Store
        store = Store({str(store_dir)!r})
        folder = store.staging_dir("held-by-a-live-process")
        (folder / "work.parquet").write_bytes(b"in progress")
        print("ready", flush=True)
        sys.stdin.readline()
    """)
    held = store_dir / "staging" / "held-by-a-live-process"
    try:
        first = _run(_ingest_cmd(study_dir))
        assert first.returncode == 0, first.stderr
        assert (held / "work.parquet").read_bytes() == b"in progress"  # a live holder's folder stays
    finally:
        holder.kill()
        holder.wait()
    _profile(study_dir, "trawl_b", "keldmar_trawl_b")
    second = _run(_ingest_cmd(study_dir, "trawl_b"))
    assert second.returncode == 0, second.stderr
    assert not held.exists()  # its holder died: the next writer removed it
    assert sorted(p.name for p in (store_dir / "staging").iterdir()) == []


# A real ingest, paused after its files are staged and before it commits, until a line arrives
# on stdin: the other writer runs in between.
_PAUSED_INGEST = """
    import sys
    from pathlib import Path
    from harmonize import load_study
    from harmonize.ingest import run
    from harmonize.store import Store
    study_dir = Path(sys.argv[1])
    original = Store.commit
    def paused(self, *args, **kwargs):
        print("ready", flush=True)
        sys.stdin.readline()
        return original(self, *args, **kwargs)
    Store.commit = paused
    result = run(load_study(study_dir), "trawl_b", {"events": study_dir / "hauls_messy.csv",
                                                     "records": study_dir / "catch_messy.csv"})
    print(result.status, result.records_written, flush=True)
"""


@pytest.mark.skipif(os.geteuid() != 0 or shutil.which("unshare") is None,
                    reason="needs root and unshare(1) to start writers in separate PID namespaces")
def test_two_writers_in_separate_pid_namespaces(study_dir: Path, tmp_path: Path) -> None:
    # Two containers sharing a study folder see each other's process ids as absent; a PID file
    # made one writer delete the other's staged files. The flock holds across namespaces.
    _profile(study_dir, "trawl_b", "keldmar_trawl_b")
    script = tmp_path / "paused_ingest.py"
    script.write_text(textwrap.dedent(_PAUSED_INGEST))
    # writer A: not PID 1 of its namespace (a parent runs it), so its id means nothing in B's
    launcher = f"import subprocess, sys; sys.exit(subprocess.run([{sys.executable!r}, {str(script)!r}, {str(study_dir)!r}]).returncode)"
    a = subprocess.Popen(["unshare", "--pid", "--fork", sys.executable, "-c", launcher],
                         stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    assert a.stdout is not None and a.stdin is not None
    try:
        line = a.stdout.readline().strip()
        assert line == "ready", (line, a.stderr.read() if a.poll() is not None else "")
        staged = [p for p in (study_dir / "store" / "staging").iterdir() if p.is_dir()]
        assert len(staged) == 1
        files_before = sorted(p.relative_to(staged[0]) for p in staged[0].rglob("*.parquet"))
        assert files_before
        # writer B, in a namespace of its own, ingests and commits meanwhile
        b = _run(["unshare", "--pid", "--fork", *_ingest_cmd(study_dir)])
        assert b.returncode == 0, b.stderr
        assert sorted(p.relative_to(staged[0]) for p in staged[0].rglob("*.parquet")) == files_before
        a.stdin.write("go\n")
        a.stdin.flush()
        out, err = a.communicate(timeout=300)
    finally:
        if a.poll() is None:
            a.kill()
            a.wait()
    assert a.returncode == 0, err
    assert out.split()[-2:] == ["complete", "31"]
    store = Store(study_dir / "store")
    assert store.check() == []
    with store.connect() as con:
        rows = dict(con.execute("SELECT source_id, count(*) FROM observations GROUP BY 1").fetchall())
    assert rows == {"keldmar_trawl": 31, "keldmar_trawl_b": 31}
