"""A real full disk and a real read-only folder, not a simulation.

Each test starts a private mount namespace (``unshare -m``, as root: CI runs as root on Linux)
and mounts a small tmpfs there, so the mounts vanish with the namespace and the machine's
disks are never filled. Inside, harmonize runs as a user would run it; the results (exit code,
stderr) and a copy of the study are written to the test's own folder, outside the tmpfs, and
checked here: one line, the documented exit code, the store before the failure intact and
passing ``status --check``, earlier output files untouched.

Exit codes (docs/cli.md): a full disk is 3, a folder that cannot be written 2.
"""

from __future__ import annotations

import os
import shlex
import shutil
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

from harmonize import Store, load_study
from harmonize.ingest import run

BIN = Path(sys.executable).parent / "harmonize"
FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"

pytestmark = [
    pytest.mark.subprocess,
    pytest.mark.skipif(sys.platform != "linux" or os.geteuid() != 0 or shutil.which("unshare") is None,
                       reason="needs root and unshare(1) on Linux to mount a small tmpfs in a private namespace"),
]


@pytest.fixture(scope="module")
def ingested(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A study with one trawl source ingested, and a second profile of the same files to ingest next."""
    target = tmp_path_factory.mktemp("disk") / "study"
    shutil.copytree(FIXTURES / "keldmar", target)
    for f in (FIXTURES / "trawl").glob("*.csv"):
        shutil.copy(f, target / f.name)
    prof = (target / "profiles" / "trawl_agency.toml").read_text()
    (target / "profiles" / "trawl_b.toml").write_text(prof.replace('id = "keldmar_trawl"', 'id = "keldmar_trawl_b"'))
    result = run(load_study(target), "trawl_agency", {"events": target / "hauls_messy.csv",
                                                      "records": target / "catch_messy.csv"})
    assert result.status == "complete"
    return target


def _in_namespace(tmp_path: Path, script: str) -> Path:
    """Run a bash ``script`` in a new mount namespace; ``$MNT`` is a fresh mount point, ``$OUT``
    a folder of the test where ``run NAME CMD...`` leaves NAME.rc and NAME.err."""
    mnt, out = tmp_path / "mnt", tmp_path / "out"
    mnt.mkdir()
    out.mkdir()
    prologue = textwrap.dedent(f"""\
        set -eu
        MNT={shlex.quote(str(mnt))}
        OUT={shlex.quote(str(out))}
        H={shlex.quote(str(BIN))}
        export COLUMNS=250
        run() {{ local name=$1; shift; set +e; "$@" > "$OUT/$name.out" 2> "$OUT/$name.err"; echo $? > "$OUT/$name.rc"; set -e; }}
        """)
    done = subprocess.run(["unshare", "-m", "--propagation", "private", "bash", "-c", prologue + script],
                          capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, done.stderr
    return out


def _result(out: Path, name: str) -> tuple[int, str, str]:
    return (int((out / f"{name}.rc").read_text()), (out / f"{name}.out").read_text(),
            (out / f"{name}.err").read_text())


def _ingests(study_dir: Path) -> list[tuple[object, ...]]:
    store = Store(study_dir / "store")
    with store.connect(view=False) as con:
        return con.execute("SELECT ingest_id, status, records_written FROM ingests ORDER BY 1").fetchall()


def test_a_full_disk_is_one_line_and_leaves_the_store_and_earlier_files(ingested: Path, tmp_path: Path) -> None:
    before = _ingests(ingested)
    earlier = {"long.csv": "earlier export\n", "rejected.csv": "earlier listing\n", "audit.json": "{}\n"}
    write_earlier = " ; ".join(f'printf %s {shlex.quote(t)} > "$MNT/exports/{n}"' for n, t in earlier.items())
    out = _in_namespace(tmp_path, textwrap.dedent(f"""\
        mount -t tmpfs -o size=24m tmpfs "$MNT"
        cp -a {shlex.quote(str(ingested))} "$MNT/study"
        S="$MNT/study"
        mkdir "$MNT/exports"
        {write_earlier}
        # fill the disk to the last block
        dd if=/dev/zero of="$MNT/filler" bs=64k 2>/dev/null || true
        run ingest "$H" --study "$S" ingest trawl_b --events "$S/hauls_messy.csv" --records "$S/catch_messy.csv"
        run export "$H" --study "$S" export long "$MNT/exports/long.csv"
        run quarantine "$H" --study "$S" quarantine --csv "$MNT/exports/rejected.csv"
        run audit "$H" --study "$S" audit --json "$MNT/exports/audit.json"
        ls -A "$MNT/exports" > "$OUT/exports.list"
        rm "$MNT/filler"
        run check "$H" --study "$S" status --check
        cp -a "$S" "$OUT/study"
        cp -a "$MNT/exports" "$OUT/exports"
        """))
    code, _, err = _result(out, "ingest")
    assert code == 3 and len(err.splitlines()) == 1, err
    assert err.startswith(f"no space left on device at {tmp_path / 'mnt' / 'study' / 'store'}/")
    assert err.rstrip().endswith("; the store is unchanged")
    for name, target in (("export", "long.csv"), ("quarantine", "rejected.csv"), ("audit", "audit.json")):
        code, _, err = _result(out, name)
        assert (code, err) == (3, f"no space left on device at {tmp_path / 'mnt' / 'exports' / target}; "
                                  "the store is unchanged\n"), name
    # earlier files untouched, no partial file left beside them
    assert sorted((out / "exports.list").read_text().split()) == sorted(earlier)
    assert {n: (out / "exports" / n).read_text() for n in earlier} == earlier
    code, stdout, err = _result(out, "check")
    assert code == 0 and "integrity check passed" in stdout, err
    assert _ingests(out / "study") == before
    assert Store(out / "study" / "store").check() == []
    staging = out / "study" / "store" / "staging"
    assert not staging.exists() or [p for p in staging.iterdir() if p.is_dir()] == []


def test_a_read_only_folder_is_one_line_and_leaves_the_store(ingested: Path, tmp_path: Path) -> None:
    before = _ingests(ingested)
    out = _in_namespace(tmp_path, textwrap.dedent(f"""\
        mount -t tmpfs -o size=24m tmpfs "$MNT"
        cp -a {shlex.quote(str(ingested))} "$MNT/study"
        S="$MNT/study"
        mkdir "$MNT/exports"
        printf %s 'earlier export' > "$MNT/exports/long.csv"
        mount -o remount,ro "$MNT"
        run ingest "$H" --study "$S" ingest trawl_b --events "$S/hauls_messy.csv" --records "$S/catch_messy.csv"
        run export "$H" --study "$S" export long "$MNT/exports/long.csv"
        run quarantine "$H" --study "$S" quarantine --csv "$MNT/exports/rejected.csv"
        run check "$H" --study "$S" status --check
        cp -a "$S" "$OUT/study"
        cp -a "$MNT/exports" "$OUT/exports"
        """))
    code, _, err = _result(out, "ingest")
    assert code == 2 and len(err.splitlines()) == 1, err
    assert err.startswith(f"cannot write at {tmp_path / 'mnt' / 'study' / 'store'}/")
    assert err.rstrip().endswith("(read-only file system); the store is unchanged")
    for name in ("export", "quarantine"):
        code, _, err = _result(out, name)
        assert code == 2 and len(err.splitlines()) == 1, (name, err)
        assert err.startswith(f"cannot write at {tmp_path / 'mnt' / 'exports'}/"), (name, err)
        assert err.rstrip().endswith("(read-only file system); the store is unchanged"), (name, err)
    assert sorted(p.name for p in (out / "exports").iterdir()) == ["long.csv"]
    assert (out / "exports" / "long.csv").read_text() == "earlier export"
    # a read-only store still reads: the check runs and passes
    code, stdout, err = _result(out, "check")
    assert code == 0 and "integrity check passed" in stdout, err
    assert _ingests(out / "study") == before
    assert Store(out / "study" / "store").check() == []
