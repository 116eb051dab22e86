"""An ingest is identified by source, path relative to the study and content: another file that
shares a base name is a new ingest, and --replace names what it supersedes (--dry-run too)."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

from harmonize import Store

BIN = Path(sys.executable).parent / "harmonize"


def _year_folder(study_dir: Path, year: int) -> Path:
    folder = study_dir / str(year)
    folder.mkdir()
    hauls = (study_dir / "hauls_messy.csv").read_text()
    (folder / "hauls.csv").write_text(hauls.replace("2020-", f"{year}-"))
    (folder / "catch.csv").write_text((study_dir / "catch_messy.csv").read_text())
    return folder


def _ingest(study_dir: Path, folder: Path, *flags: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([str(BIN), "--study", str(study_dir), "ingest", "trawl_agency", *flags,
                           "--events", str(folder / "hauls.csv"), "--records", str(folder / "catch.csv")],
                          capture_output=True, text=True, timeout=300, env={**os.environ, "COLUMNS": "250"})


def _rows_by_path(store: Store) -> dict[str, int]:
    with store.connect() as con:
        return dict(con.execute("""SELECT i.file_path, count(*) FROM observations o JOIN ingests i USING (ingest_id)
                                   GROUP BY 1 ORDER BY 1""").fetchall())


def test_a_file_sharing_a_base_name_is_a_new_ingest_and_replace_names_its_target(study_dir: Path) -> None:
    y2020, y2019 = _year_folder(study_dir, 2020), _year_folder(study_dir, 2019)
    assert _ingest(study_dir, y2020).returncode == 0
    second = _ingest(study_dir, y2019)  # 2019/hauls.csv after 2020/hauls.csv: new data, not a replacement
    assert second.returncode == 0, second.stderr
    store = Store(study_dir / "store")
    ingests = store.ingests().set_index("file_path")
    assert sorted(ingests.index) == ["2019/hauls.csv", "2020/hauls.csv"]
    assert set(ingests["status"]) == {"complete"}
    rows = _rows_by_path(store)
    assert rows["2020/hauls.csv"] == 31 and rows["2019/hauls.csv"] > 0  # both in the outputs

    # the 2020 file changes: without --replace it is refused, naming the file and the ingest
    hauls = y2020 / "hauls.csv"
    hauls.write_text(hauls.read_text().replace(",20,50,", ",21,50,"))
    old_2020 = ingests.loc["2020/hauls.csv", "ingest_id"]
    refused = _ingest(study_dir, y2020)
    assert refused.returncode == 2
    assert "2020/hauls.csv (or a file with the same content) was already ingested" in refused.stderr
    assert f"ingest {old_2020} of 2020/hauls.csv" in refused.stderr and "--dry-run" in refused.stderr

    # --dry-run says what --replace would supersede, and writes nothing
    dry = _ingest(study_dir, y2020, "--replace", "--dry-run")
    assert dry.returncode == 0, dry.stderr
    assert f"would replace ingest {old_2020} of 2020/hauls.csv" in dry.stdout
    assert len(store.ingests()) == 2

    # --replace names it before it acts, and supersedes the 2020 ingest only
    done = _ingest(study_dir, y2020, "--replace")
    assert done.returncode == 0, done.stderr
    assert f"replacing ingest {old_2020} of 2020/hauls.csv" in done.stdout
    after = store.ingests()
    assert dict(zip(after["ingest_id"], after["status"], strict=True))[old_2020] == "superseded"
    assert sorted(after.loc[after["status"] == "complete", "file_path"]) == ["2019/hauls.csv", "2020/hauls.csv"]
    assert _rows_by_path(store) == rows  # 2019 stays; 2020 is served by its new ingest
    assert store.check() == []


def test_the_same_content_under_another_path_is_not_ingested_twice(study_dir: Path) -> None:
    y2020 = _year_folder(study_dir, 2020)
    assert _ingest(study_dir, y2020).returncode == 0
    copy = study_dir / "copy"
    copy.mkdir()
    for name in ("hauls.csv", "catch.csv"):
        (copy / name).write_bytes((y2020 / name).read_bytes())
    again = _ingest(study_dir, copy)
    assert again.returncode == 0 and "nothing to do" in again.stdout
    assert len(Store(study_dir / "store").ingests()) == 1
