"""Interrupts, full disks and read-only folders end in one line, never an internal error;
the store stays whole."""

from __future__ import annotations

import errno
import os
import random
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path
from unittest import mock

import duckdb
import pytest
from harmonize.cli.app import main

from harmonize import Store, load_study

BIN = Path(sys.executable).parent / "harmonize"


def cli(capsys: pytest.CaptureFixture[str], *args: str) -> tuple[int, str, str]:
    with mock.patch.object(sys, "argv", ["harmonize", *args]):
        try:
            main()
            code = 0
        except SystemExit as exc:
            code = exc.code if isinstance(exc.code, int) else (0 if exc.code is None else 1)
    out = capsys.readouterr()
    return code, out.out, out.err


def _ingest_args(study_dir: Path) -> list[str]:
    return ["--study", str(study_dir), "ingest", "trawl_agency", "--events", str(study_dir / "hauls_messy.csv"),
            "--records", str(study_dir / "catch_messy.csv")]


def _handles(pid: int, signum: int) -> bool:
    """Whether process ``pid`` catches ``signum`` now (its SigCgt mask, proc(5))."""
    try:
        status = Path(f"/proc/{pid}/status").read_text()
    except OSError:
        return False
    mask = next(int(line.split()[1], 16) for line in status.splitlines() if line.startswith("SigCgt:"))
    return bool(mask >> (signum - 1) & 1)


def _started(proc: subprocess.Popen[str], signum: int) -> bool:
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline and proc.poll() is None:
        if _handles(proc.pid, signum):
            return True
        time.sleep(0.01)
    return False


@pytest.mark.subprocess
@pytest.mark.parametrize("signum", [signal.SIGTERM, signal.SIGINT])
def test_an_interrupted_ingest_says_so_in_one_line_and_leaves_the_store_whole(study_dir: Path, signum: int) -> None:
    rng = random.Random(signum)
    outcomes = []
    for _ in range(3):
        proc = subprocess.Popen([str(BIN), *_ingest_args(study_dir)], stdout=subprocess.PIPE,
                                stderr=subprocess.PIPE, text=True)
        if not _started(proc, signal.SIGTERM):  # the handlers are installed once the command runs
            proc.communicate(timeout=120)
            outcomes.append("finished before")
            continue
        time.sleep(rng.uniform(0, 1.5))
        proc.send_signal(signum)
        _, err = proc.communicate(timeout=120)
        store = Store(study_dir / "store")
        complete = len(store.ingests(include_superseded=False)) if store.exists() else 0
        if proc.returncode == 0:
            outcomes.append("finished")
            assert complete == 1
        else:
            assert proc.returncode == 128 + signum, err
            lines = err.strip().splitlines()
            assert len(lines) == 1, err
            if lines[0] == "interrupted; the store is unchanged":
                assert complete == 0
            else:
                assert lines[0].startswith("interrupted after the store was updated"), err
                assert complete == 1
            outcomes.append(lines[0])
        assert "internal error" not in err and "Traceback" not in err and "Aborted" not in err
        assert store.check() == []
        if complete:  # start again from an empty store
            import shutil
            shutil.rmtree(study_dir / "store")
            (study_dir / ".store.ingested").unlink()  # the marker: a store removed on purpose
    assert any(o.startswith("interrupted") for o in outcomes), outcomes


@pytest.mark.subprocess
def test_an_interrupt_stops_a_running_duckdb_query(study_dir: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # A query that would run for minutes stops within seconds: the handler interrupts every
    # open store connection (DuckDB raises "Query interrupted"), and the signal is remembered.
    code, _, err = cli(capsys, *_ingest_args(study_dir))
    assert code == 0, err
    script = textwrap.dedent(f"""
        import time
        from harmonize import interrupts
        from harmonize.store import Store
        with interrupts.installed():
            with Store({str(study_dir / 'store')!r}).connect() as con:
                print("ready", flush=True)
                start = time.monotonic()
                try:
                    con.execute("SELECT count(*) FROM range(1000000000000) t WHERE t.range % 7 = 3").fetchall()
                    print("finished")
                except BaseException as exc:
                    print(type(exc).__name__, interrupts.received(), round(time.monotonic() - start, 1), flush=True)
    """)
    proc = subprocess.Popen([sys.executable, "-c", script], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    assert proc.stdout is not None and proc.stdout.readline().strip() == "ready"
    time.sleep(1.0)
    proc.send_signal(signal.SIGTERM)
    out, err = proc.communicate(timeout=60)
    kind, received, seconds = out.split()
    assert kind in ("RuntimeError", "Interrupted"), (out, err)
    assert int(received) == signal.SIGTERM and float(seconds) < 30


def test_a_full_disk_during_ingest_is_one_line(study_dir: Path, capsys: pytest.CaptureFixture[str]) -> None:
    where = str(study_dir / "store" / "staging" / "x.parquet")

    def full(*args: object, **kwargs: object) -> None:
        raise OSError(errno.ENOSPC, "No space left on device", where)

    with mock.patch("harmonize.store_layout.write_partitions", full):
        code, _, err = cli(capsys, *_ingest_args(study_dir))
    assert code == 3
    assert err.strip() == f"no space left on device at {where}; the store is unchanged"
    # DuckDB says it in its own words
    def duck_full(*args: object, **kwargs: object) -> None:
        raise duckdb.IOException(f'Could not write file "{where}": No space left on device')

    with mock.patch("harmonize.store_layout.write_partitions", duck_full):
        code, _, err = cli(capsys, *_ingest_args(study_dir))
    assert (code, err.strip()) == (3, f"no space left on device at {where}; the store is unchanged")
    store = Store(load_study(study_dir).store_dir)
    assert store.check() == []
    assert not store.exists() or len(store.ingests()) == 0
    staging = study_dir / "store" / "staging"
    assert not staging.exists() or [p for p in staging.iterdir() if p.is_dir()] == []


def test_a_failing_commit_reports_its_own_cause(study_dir: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # When COMMIT itself fails, the rollback finds no transaction: the message is the cause
    # (here a full disk), not "cannot rollback - no transaction is active".
    real_execute = duckdb.DuckDBPyConnection.execute

    def execute(self: duckdb.DuckDBPyConnection, query: str, *args: object) -> object:
        if query == "COMMIT":
            real_execute(self, "ROLLBACK")
            raise duckdb.IOException(f'Could not write file "{study_dir}/store/harmonized.duckdb.wal": '
                                     "No space left on device")
        return real_execute(self, query, *args)

    with mock.patch.object(duckdb.DuckDBPyConnection, "execute", execute):
        code, _, err = cli(capsys, *_ingest_args(study_dir))
    assert code == 3, err
    assert err.strip() == (f"no space left on device at {study_dir}/store/harmonized.duckdb.wal; "
                           "the store is unchanged")
    store = Store(study_dir / "store")
    assert store.check() == [] and len(store.ingests()) == 0


def test_a_read_only_folder_is_one_line(study_dir: Path, capsys: pytest.CaptureFixture[str]) -> None:
    where = str(study_dir / "store")

    def read_only(*args: object, **kwargs: object) -> None:
        raise OSError(errno.EROFS, "Read-only file system", where)

    with mock.patch("harmonize.store.Store.staging_dir", read_only):
        code, _, err = cli(capsys, *_ingest_args(study_dir))
    assert code == 2
    assert err.strip() == f"cannot write at {where} (read-only file system); the store is unchanged"
    if os.geteuid() != 0:  # a real read-only folder (root writes anyway)
        os.chmod(study_dir, 0o555)
        try:
            code, _, err = cli(capsys, *_ingest_args(study_dir))
        finally:
            os.chmod(study_dir, 0o755)
        assert code == 2 and "permission denied" in err and len(err.strip().splitlines()) == 1


def test_an_interrupt_while_libraries_load_is_raised_after_they_have_loaded() -> None:
    # A signal whose handler raised inside DuckDB's module initialisation aborted the process
    # (SIGABRT: "Critical nanobind error"), found by the test above in a fresh clone; the
    # command line now loads the compiled libraries in a shielded section.
    import os

    from harmonize import interrupts

    with interrupts.installed():
        loaded = False
        with pytest.raises(interrupts.Interrupted) as caught:
            with interrupts.shielded():
                os.kill(os.getpid(), signal.SIGINT)  # the handler runs here, inside the section
                loaded = True
        assert loaded and caught.value.signum == signal.SIGINT and not caught.value.committed
    with interrupts.installed(), interrupts.shielded():  # no signal: nothing raised
        pass


def test_the_command_line_loads_the_compiled_libraries_in_a_shielded_section() -> None:
    from unittest import mock

    import cli.app as app
    from harmonize import interrupts

    depth = []
    with mock.patch.object(app, "_load_compiled_libraries", lambda: depth.append(interrupts._deferring)):
        from typer.testing import CliRunner

        CliRunner().invoke(app.app, ["status", "--study", "/nonexistent-study"])
    assert depth == [1]
