"""Observer names and vessel ids never leave the tool unhashed.

The demo study (invented people and vessels) is built and run end to end (every source kind,
audit, report, all five exports), then the quarantine is exported and the CLI's own
listings are captured. Every file the tool wrote is searched for every name that the input
files hold in a column mapped to ``observer`` or ``vessel_id`` (or Darwin Core recordedBy):
the raw bytes, and the decoded content of the binary formats (DuckDB tables and views,
parquet, zip members, the GeoPackage's SQLite tables), case-insensitively.
"""

from __future__ import annotations

import io
import re
import sqlite3
import tomllib
import zipfile
from pathlib import Path

import duckdb
import pandas as pd
import pytest
from cli_runner import cli

from harmonize.adapters.darwin_core import is_archive, read_archive
from harmonize.demo.build import DemoRun, build_demo
from harmonize.privacy import SALT_FILE

pytestmark = pytest.mark.slow

PERSON_FIELDS = ("observer", "vessel_id")


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> DemoRun:
    return build_demo(tmp_path_factory.mktemp("privacy") / "demo")


def _names_in_inputs(run: DemoRun) -> set[str]:
    """Distinct observer names and vessel ids in the demo's input files."""
    names: set[str] = set()
    for item, _ in run.ingests:
        profile = tomllib.loads((run.folder / item.profile).read_text(encoding="utf-8"))
        columns = profile.get("columns", {})
        mapped = [columns.get(f) for f in PERSON_FIELDS]
        mapped += [sub.get(f) for sub in columns.values() if isinstance(sub, dict) for f in PERSON_FIELDS]
        for path in (run.folder / rel for rel in item.inputs.values()):
            if is_archive(path):
                frame = read_archive(path).table.frame
                cols = [c for c in ("recordedBy", *mapped) if c and c in frame]
            elif path.suffix == ".csv":
                frame = pd.read_csv(path, dtype=str, keep_default_na=False)
                cols = [c for c in mapped if c and c in frame]
            else:
                continue
            for col in cols:
                names |= {v.strip() for v in frame[col] if v.strip()}
    return names


def _sql_leaks(con: duckdb.DuckDBPyConnection, source: str, pattern: str) -> set[str]:
    """Names matched in any text or list column of a DuckDB table expression."""
    cols = [r[0] for r in con.execute(f"DESCRIBE SELECT * FROM {source}").fetchall()
            if "VARCHAR" in r[1] or "JSON" in r[1]]
    if not cols:
        return set()
    text = "lower(concat_ws(' | ', " + ", ".join(f'CAST("{c}" AS VARCHAR)' for c in cols) + "))"
    rows = con.execute(f"SELECT DISTINCT unnest(regexp_extract_all({text}, ?)) FROM {source}", [pattern]).fetchall()
    return {r[0] for r in rows}


def _decoded_leaks(path: Path, pattern: re.Pattern[str]) -> set[str]:
    """Names found in the decoded content of a file the tool wrote, beyond its raw bytes."""
    data = path.read_bytes()
    found: set[str] = set()
    if path.suffix == ".parquet":
        with duckdb.connect() as con:
            found |= _sql_leaks(con, "read_parquet('" + str(path).replace("'", "''") + "')", pattern.pattern)
    elif path.suffix == ".duckdb":
        with duckdb.connect(str(path), read_only=True) as con:
            for (name,) in con.execute("SELECT table_name FROM information_schema.tables "
                                       "WHERE table_type = 'BASE TABLE'").fetchall():
                found |= _sql_leaks(con, f'"{name}"', pattern.pattern)
    elif zipfile.is_zipfile(path):
        with zipfile.ZipFile(path) as zf:
            for n in zf.namelist():
                found |= _leaks(zf.read(n).decode("utf-8", "replace"), pattern)
    elif data[:16] == b"SQLite format 3\x00":
        with sqlite3.connect(f"file:{path}?mode=ro", uri=True) as con:
            for (name,) in con.execute("SELECT name FROM sqlite_master WHERE type = 'table'").fetchall():
                rows = con.execute(f'SELECT * FROM "{name}"').fetchall()
                found |= _leaks("\n".join(" ".join(str(v) for v in r) for r in rows), pattern)
    return found


def _leaks(text: str, pattern: re.Pattern[str]) -> set[str]:
    return {m.group(0) for m in pattern.finditer(text.casefold())}


def test_no_name_or_vessel_id_in_any_file_the_tool_writes(demo: DemoRun, tmp_path: Path,
                                                          capsys: pytest.CaptureFixture[str]) -> None:
    names = _names_in_inputs(demo)
    # the demo has named observers on transects, checklists and the portal archive, and a fleet
    assert len(names) >= 10, names
    # lower-case names, matched against lower-cased text (pseudonyms fold case the same way)
    pattern = re.compile("|".join(re.escape(n.casefold()) for n in sorted(names, key=len, reverse=True)))
    listing = []
    for args in (["status"], ["quarantine", "--limit", "100000"],
                 ["quarantine", "--csv", str(demo.folder / "outputs" / "quarantine.csv")]):
        code, out, err = cli(capsys, "--study", str(demo.folder), *args)
        assert code == 0, err
        listing.append(out)

    written = [p for p in demo.folder.rglob("*") if p.is_file()
               and p.relative_to(demo.folder).parts[0] in ("store", "outputs")]
    assert any(p.suffix == ".duckdb" for p in written) and any(p.suffix == ".zip" for p in written)
    assert len(written) >= 10
    leaks: dict[str, set[str]] = {}
    for path in written:
        found = _leaks(path.read_bytes().decode("utf-8", "replace"), pattern) | _decoded_leaks(path, pattern)
        if found:
            leaks[str(path.relative_to(demo.folder))] = found
    for i, text in enumerate(listing):
        if found := _leaks(text, pattern):
            leaks[f"CLI output {i}"] = found
    assert leaks == {}


def test_pseudonyms_are_salted_and_the_salt_stays_out_of_the_store(demo: DemoRun) -> None:
    # The salt lives in the study folder, never in the store or the exports: a store
    # shared alone cannot be searched for a known name by hashing it.
    salt = (demo.folder / SALT_FILE).read_text().strip()
    assert re.fullmatch(r"[0-9a-f]{32}", salt)
    for path in demo.folder.rglob("*"):
        if path.is_file() and path.relative_to(demo.folder).parts[0] in ("store", "outputs"):
            assert salt.encode() not in path.read_bytes(), path
    with duckdb.connect(str(demo.folder / "store" / "harmonized.duckdb"), read_only=True) as con:
        ids = con.execute("SELECT DISTINCT observer_id FROM read_parquet(?, hive_partitioning = true) "
                          "WHERE observer_id IS NOT NULL",
                          [str(demo.folder / "store" / "observations" / "**" / "*.parquet")]).fetchall()
    assert len(ids) >= 3
    assert all(re.fullmatch(r"[a-z]+-[0-9a-f]{16}", i) for (i,) in ids), ids[:5]


def test_raw_rows_in_quarantine_hold_pseudonyms_not_names(demo: DemoRun) -> None:
    names = _names_in_inputs(demo)
    with duckdb.connect(str(demo.folder / "store" / "harmonized.duckdb"), read_only=True) as con:
        raws = [r for (r,) in con.execute("SELECT raw FROM quarantine WHERE raw IS NOT NULL").fetchall()]
    assert raws, "the demo quarantines rows of every kind"
    text = io.StringIO("\n".join(raws)).getvalue().casefold()
    assert not [n for n in names if n.casefold() in text]
