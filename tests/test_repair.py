"""harmonize repair: damaged ingests leave the live set (marked, never deleted), unknown files
are set aside, a lost database is replaced by an empty one after its files are set aside."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from harmonize import Store, load_study
from harmonize.ingest import run

BIN = Path(sys.executable).parent / "harmonize"
FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"


def _cli(study_dir: Path, *args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([str(BIN), "--study", str(study_dir), *args], capture_output=True, text=True,
                          timeout=300, env={**os.environ, "COLUMNS": "250"})


def _ingest(study_dir: Path, profile: str = "trawl_agency") -> str:
    study = load_study(study_dir)
    result = run(study, profile, {"events": study_dir / "hauls_messy.csv", "records": study_dir / "catch_messy.csv"})
    assert result.status == "complete"
    return str(result.ingest_id)


@pytest.fixture(scope="module")
def two_sources(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, str, str]:
    """A store with two trawl sources (the same files under two source ids)."""
    target = tmp_path_factory.mktemp("built") / "study"
    shutil.copytree(FIXTURES / "keldmar", target)
    for f in (FIXTURES / "trawl").glob("*.csv"):
        shutil.copy(f, target / f.name)
    prof = (target / "profiles" / "trawl_agency.toml").read_text()
    (target / "profiles" / "trawl_b.toml").write_text(prof.replace('id = "keldmar_trawl"', 'id = "keldmar_trawl_b"'))
    first = _ingest(target)
    second = _ingest(target, "trawl_b")
    return target, first, second


@pytest.fixture
def study_copy(two_sources: tuple[Path, str, str], tmp_path: Path) -> tuple[Path, str, str]:
    built, first, second = two_sources
    target = tmp_path / "study"
    shutil.copytree(built, target)
    return target, first, second


def _files(store: Store, ingest_id: str) -> list[str]:
    with store.connect(view=False) as con:
        return [r[0] for r in con.execute("SELECT path FROM observation_files WHERE ingest_id = ? ORDER BY path",
                                          [ingest_id]).fetchall()]


def _rows_by_source(store: Store) -> dict[str, int]:
    with store.connect() as con:
        return dict(con.execute("SELECT source_id, count(*) FROM observations GROUP BY 1").fetchall())


@pytest.mark.subprocess
def test_repair_drops_a_damaged_ingest_and_lists_what_to_ingest_again(study_copy: tuple[Path, str, str]) -> None:
    study_dir, first, second = study_copy
    store = Store(study_dir / "store")
    damaged = _files(store, first)[0]
    path = store.directory / damaged
    path.write_bytes(path.read_bytes()[:700])  # a copy that stopped part-way
    # the verbs that read observations are blocked until repair; so is the quarantine listing,
    # which passes the disclosure gate (it reads the observations to know the sensitive events)
    assert _cli(study_dir, "export", "long", str(study_dir / "x.csv")).returncode == 2
    assert _cli(study_dir, "quarantine").returncode == 2

    dry = _cli(study_dir, "repair")
    assert dry.returncode == 1, dry.stdout + dry.stderr
    assert f"damaged: ingest {first}: file {damaged} has 700 bytes" in dry.stdout
    assert "1 ingest(s) would be marked damaged" in dry.stdout
    assert (f"source keldmar_trawl with profile trawl_agency.toml: events hauls_messy.csv, "
            f"records catch_messy.csv (was ingest {first})") in dry.stdout
    assert "nothing was changed" in dry.stdout
    assert set(store.ingests()["status"]) == {"complete"}  # a dry run changes nothing

    applied = _cli(study_dir, "repair", "--apply")
    assert applied.returncode == 0, applied.stdout + applied.stderr
    ingests = store.ingests().set_index("ingest_id")
    assert ingests.loc[first, "status"] == "damaged"
    assert damaged in ingests.loc[first, "damage_reason"] and "700 bytes" in ingests.loc[first, "damage_reason"]
    assert ingests.loc[second, "status"] == "complete"
    assert path.exists()  # never deleted
    assert store.check() == []
    assert _rows_by_source(store) == {"keldmar_trawl_b": 29}
    assert _cli(study_dir, "export", "long", str(study_dir / "x.csv")).returncode == 0
    assert _cli(study_dir, "repair").returncode == 0  # nothing left to repair

    # the same files ingest again without --replace, and the store is whole
    again = _cli(study_dir, "ingest", "trawl_agency", "--events", str(study_dir / "hauls_messy.csv"),
                 "--records", str(study_dir / "catch_messy.csv"))
    assert again.returncode == 0, again.stderr
    assert store.check() == []
    assert _rows_by_source(store) == {"keldmar_trawl": 29, "keldmar_trawl_b": 29}


@pytest.mark.subprocess
def test_an_ingest_never_deletes_a_parquet_file_it_does_not_know(study_copy: tuple[Path, str, str]) -> None:
    study_dir, first, _ = study_copy
    store = Store(study_dir / "store")
    stranger = store.directory / "observations" / "source_kind=trawl" / "season_year=1999" / "part-mine.parquet"
    stranger.parent.mkdir(parents=True)
    shutil.copy(store.directory / _files(store, first)[0], stranger)
    prof = (study_dir / "profiles" / "trawl_agency.toml").read_text()
    (study_dir / "profiles" / "trawl_c.toml").write_text(prof.replace('id = "keldmar_trawl"', 'id = "keldmar_trawl_c"'))
    _ingest(study_dir, "trawl_c")
    assert stranger.exists()
    assert store.unlisted_files() == ["observations/source_kind=trawl/season_year=1999/part-mine.parquet"]
    dry = _cli(study_dir, "repair")
    assert dry.returncode == 1 and "1 parquet file(s) that no ingest lists would be set aside" in dry.stdout
    assert _cli(study_dir, "repair", "--apply").returncode == 0
    assert not stranger.exists()
    kept = list((store.directory / "set_aside").rglob("part-mine.parquet"))
    assert len(kept) == 1 and kept[0].read_bytes() == (store.directory / _files(store, first)[0]).read_bytes()
    assert store.check() == [] and store.unlisted_files() == []


@pytest.mark.subprocess
def test_repair_of_a_lost_database_sets_the_files_aside_and_starts_anew(study_copy: tuple[Path, str, str]) -> None:
    study_dir, first, second = study_copy
    store = Store(study_dir / "store")
    files = sorted(p.relative_to(store.directory).as_posix() for p in (store.directory / "observations").rglob("*.parquet"))
    store.db_path.unlink()
    dry = _cli(study_dir, "repair")
    assert dry.returncode == 1
    assert f"the store's database is lost; {len(files)} parquet file(s) remain, would be set aside" in dry.stdout
    # the files name the sources and inputs they came from
    assert f"source keldmar_trawl: hauls_messy.csv (was ingest {first})" in dry.stdout
    assert f"source keldmar_trawl_b: hauls_messy.csv (was ingest {second})" in dry.stdout
    assert not store.db_path.exists()

    assert _cli(study_dir, "repair", "--apply").returncode == 0
    aside = next((store.directory / "set_aside").iterdir())
    assert sorted(p.relative_to(aside).as_posix() for p in aside.rglob("*.parquet")) == files
    assert store.check() == []
    with store.connect(view=False) as con:
        assert con.execute("SELECT count(*) FROM ingests").fetchall() == [(0,)]
    _ingest(study_dir)
    assert store.check() == [] and _rows_by_source(store) == {"keldmar_trawl": 29}
