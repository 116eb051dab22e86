"""The store owns its layout: part files that say where they came from, a manifest rebuilt from
them, and a deleted store told apart from a study never ingested.

Expected values are taken from outside the code under test: the input files' sha256 from
hashlib, row counts from the parquet footers (pyarrow) and from the manifest as the commit
wrote it, the source id from the profile's own text.
"""

from __future__ import annotations

import hashlib
import json
import shutil
import tomllib
from pathlib import Path

import duckdb
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from cli_runner import cli

from harmonize import Store, load_study
from harmonize.ingest import run
from harmonize.repair import REFUSED_DIR, repair
from harmonize.store import STORE_VERSION

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"


def _ingest(study_dir: Path, profile: str = "trawl_agency", replace: bool = False) -> str:
    result = run(load_study(study_dir), profile, {"events": study_dir / "hauls_messy.csv",
                                                  "records": study_dir / "catch_messy.csv"}, replace=replace)
    assert result.status == "complete"
    return str(result.ingest_id)


@pytest.fixture(scope="module")
def built(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, list[str]]:
    """Two trawl sources; the first re-delivered with other content and replaced (a superseded ingest)."""
    target = tmp_path_factory.mktemp("built") / "study"
    shutil.copytree(FIXTURES / "keldmar", target)
    for f in (FIXTURES / "trawl").glob("*.csv"):
        shutil.copy(f, target / f.name)
    prof = (target / "profiles" / "trawl_agency.toml").read_text()
    (target / "profiles" / "trawl_b.toml").write_text(prof.replace('id = "keldmar_trawl"', 'id = "keldmar_trawl_b"'))
    first = _ingest(target)
    second = _ingest(target, "trawl_b")
    catch = target / "catch_messy.csv"
    catch.write_text(catch.read_text() + "\n")  # same rows, other bytes: a re-delivery to replace
    third = _ingest(target, replace=True)
    return target, [first, second, third]


@pytest.fixture
def study_copy(built: tuple[Path, list[str]], tmp_path: Path) -> tuple[Path, list[str]]:
    target = tmp_path / "study"
    shutil.copytree(built[0], target)
    return target, built[1]


def _numbers(store: Store) -> dict[str, object]:
    """What a user sees of the store: ingests and their accounting, files, and the rows by tags."""
    with store.connect() as con:
        return {
            "ingests": con.execute(
                """SELECT ingest_id, source_id, source_kind, provider_type, file_name, file_path, file_sha256,
                          inputs_sha256, config_sha256, started_at, status, superseded_by, rows_read,
                          rows_accepted, rows_quarantined, records_written, records_zero_filled, profile_file
                   FROM ingests ORDER BY ingest_id""").fetchall(),
            "ingest_files": con.execute("SELECT * FROM ingest_files ORDER BY ALL").fetchall(),
            "files": con.execute("SELECT * FROM observation_files ORDER BY path").fetchall(),
            "summary": store.summary().to_dict("records"),
            "values": con.execute(
                """SELECT source_id, record_id, value, effort, density, flags FROM observations
                   ORDER BY source_id, record_id""").fetchall(),
        }


def _parts(store: Store) -> list[Path]:
    return sorted((store.directory / "observations").rglob("*.parquet"))


# ------------------------------------------------------------------ part-file metadata
def test_a_part_file_read_alone_says_where_it_came_from(study_copy: tuple[Path, list[str]]) -> None:
    study_dir, (first, second, third) = study_copy
    store = Store(study_dir / "store")
    with store.connect(view=False) as con:
        listed = {p: (i, n) for i, p, n in con.execute("SELECT ingest_id, path, n_rows FROM observation_files").fetchall()}
    source_of = {first: "keldmar_trawl", second: "keldmar_trawl_b", third: "keldmar_trawl"}
    profile = tomllib.loads((study_dir / "profiles" / "trawl_agency.toml").read_text())
    assert len(_parts(store)) == len(listed) > 0
    for path in _parts(store):
        meta = pq.read_metadata(path)  # pyarrow alone, no harmonize
        doc = json.loads(meta.metadata[b"harmonize"])
        ingest_id, n_rows = listed[path.relative_to(store.directory).as_posix()]
        assert doc["version"].split(".")[0] == "1"
        assert (doc["ingest_id"], doc["rows"]) == (ingest_id, n_rows) == (ingest_id, meta.num_rows)
        assert doc["source_id"] == source_of[ingest_id]
        assert doc["source_kind"] == profile["source"]["kind"] == path.parent.parent.name.split("=")[1]
        assert doc["contract_version"] and doc["store_version"] == STORE_VERSION == 7
        sha = {f["role"]: f["file_sha256"] for f in doc["inputs"]}
        if ingest_id != third:  # the replacing ingest read the re-delivered catch file
            assert sha["records"] == hashlib.sha256(
                (FIXTURES / "trawl" / "catch_messy.csv").read_bytes()).hexdigest()
        assert sha["events"] == hashlib.sha256((study_dir / "hauls_messy.csv").read_bytes()).hexdigest()
        assert doc["ingest"]["rows_read"] == sum(f["rows_read"] for f in doc["inputs"])
        assert doc["ingest"]["file_path"] == "hauls_messy.csv"
        table = pq.read_table(path)
        assert doc["zero_filled"] == sum(table["zero_filled"].to_pylist())


# ------------------------------------------------------------------ manifest rebuild
def test_a_deleted_manifest_is_rebuilt_with_the_same_numbers(study_copy: tuple[Path, list[str]]) -> None:
    study_dir, (first, second, third) = study_copy
    store = Store(study_dir / "store")
    before = _numbers(store)
    statuses = {r[0]: r[10] for r in before["ingests"]}
    assert statuses == {first: "superseded", second: "complete", third: "complete"}
    code, out, _ = cli(None, "--study", str(study_dir), "status")
    store.db_path.unlink()
    # the plain repair offers the rebuild
    code_dry, out_dry, _ = cli(None, "--study", str(study_dir), "repair")
    assert code_dry == 1 and "harmonize repair --rebuild-manifest" in out_dry
    code_dry, out_dry, _ = cli(None, "--study", str(study_dir), "repair", "--rebuild-manifest")
    assert code_dry == 1 and "3 ingest(s) would be rebuilt" in out_dry
    assert not store.db_path.exists()
    code2, out2, err2 = cli(None, "--study", str(study_dir), "repair", "--rebuild-manifest", "--apply")
    assert code2 == 0, err2
    assert "3 ingest(s) rebuilt" in out2
    assert _numbers(store) == before
    assert store.check() == []
    code3, out3, _ = cli(None, "--study", str(study_dir), "status")
    assert (code3, out3) == (code, out)
    code4, out4, _ = cli(None, "--study", str(study_dir), "status", "--check")
    assert code4 == 0 and "integrity check passed" in out4 and "were rebuilt from their part files" in out4
    # the store takes the next ingest as before: the same file and configuration is a no-op
    result = run(load_study(study_dir), "trawl_agency", {"events": study_dir / "hauls_messy.csv",
                                                    "records": study_dir / "catch_messy.csv"})
    assert result.status == "unchanged"


def test_a_damaged_database_is_moved_aside_and_rebuilt(study_copy: tuple[Path, list[str]]) -> None:
    study_dir, _ = study_copy
    store = Store(study_dir / "store")
    before = _numbers(store)
    size = store.db_path.stat().st_size
    store.db_path.write_bytes(b"\x00not a database\x00" * 64)
    plan = repair(store, apply=True, rebuild_manifest=True)
    assert plan.applied and plan.rebuild is not None
    assert plan.rebuild.database_problem and plan.rebuild.database_problem.startswith("cannot be")
    assert (plan.rebuild.refused_to / "harmonized.duckdb").read_bytes().startswith(b"\x00not a database")
    assert size > 0 and _numbers(store) == before


def test_a_sound_database_is_not_rebuilt(study_copy: tuple[Path, list[str]]) -> None:
    study_dir, _ = study_copy
    code, out, _ = cli(None, "--study", str(study_dir), "repair", "--rebuild-manifest", "--apply")
    assert code == 0 and out.strip() == ("nothing to rebuild: the store's database is readable "
                                         "(or there are no part files)")


def _refused(study_dir: Path) -> dict[str, str]:
    store = Store(study_dir / "store")
    store.db_path.unlink()
    code, out, err = cli(None, "--study", str(study_dir), "repair", "--rebuild-manifest", "--apply")
    assert code == 0, err
    lines = [line for line in out.splitlines() if line.startswith("refused: ")]
    refused = {}
    for line in lines:
        rel, _, why = line[len("refused: "):].partition(" ")
        refused[rel] = why
    if not refused:
        assert not (store.directory / REFUSED_DIR).exists()
        return refused
    folder = next((store.directory / REFUSED_DIR).iterdir())
    assert sorted(p.relative_to(folder).as_posix() for p in folder.rglob("*.parquet")) == sorted(refused)
    return refused


def _ingest_of(store: Store, ingest_id: str) -> tuple[str, str | None]:
    with store.connect(view=False) as con:
        return con.execute("SELECT status, damage_reason FROM ingests WHERE ingest_id = ?", [ingest_id]).fetchall()[0]


def test_a_part_without_metadata_is_refused_and_kept(study_copy: tuple[Path, list[str]]) -> None:
    study_dir, _ = study_copy
    store = Store(study_dir / "store")
    stray = store.directory / "observations" / "source_kind=trawl" / "season_year=2020" / "part-stray.parquet"
    pq.write_table(pa.table({"x": [1, 2]}), stray)
    refused = _refused(study_dir)
    rel = stray.relative_to(store.directory).as_posix()
    assert refused == {rel: "has no 'harmonize' key-value metadata (written before store version 5)"}
    assert not stray.exists()
    assert store.check() == []


def _rewrite_metadata(path: Path, change: dict[str, object]) -> None:
    table = pq.read_table(path)
    doc = json.loads(pq.read_metadata(path).metadata[b"harmonize"])
    doc.update(change)
    pq.write_table(table.replace_schema_metadata({b"harmonize": json.dumps(doc).encode()}), path)


def test_parts_with_inconsistent_metadata_are_refused_and_their_ingest_damaged(
        study_copy: tuple[Path, list[str]]) -> None:
    study_dir, (first, second, third) = study_copy
    store = Store(study_dir / "store")
    with store.connect(view=False) as con:
        files = dict(con.execute("SELECT ingest_id, min(path) FROM observation_files GROUP BY 1").fetchall())
    wrong_rows = store.directory / files[second]
    n = pq.read_metadata(wrong_rows).num_rows
    _rewrite_metadata(wrong_rows, {"rows": n + 1})
    refused = _refused(study_dir)
    assert refused == {files[second]: f"holds {n:,} rows, its 'harmonize' metadata says {n + 1:,}"}
    status, reason = _ingest_of(store, second)
    assert status == "damaged" and reason == f"its file {files[second]} is refused"
    # the damaged ingest's rows are out of the view; the other source is whole
    with store.connect() as con:
        assert con.execute("SELECT DISTINCT source_id FROM observations").fetchall() == [("keldmar_trawl",)]
    assert store.check() == []


def test_a_part_in_the_folder_of_another_kind_is_refused(study_copy: tuple[Path, list[str]]) -> None:
    study_dir, (_, second, _) = study_copy
    store = Store(study_dir / "store")
    with store.connect(view=False) as con:
        rel = con.execute("SELECT min(path) FROM observation_files WHERE ingest_id = ?", [second]).fetchall()[0][0]
    doc = json.loads(pq.read_metadata(store.directory / rel).metadata[b"harmonize"])
    _rewrite_metadata(store.directory / rel, {"source_kind": "plankton",
                                              "ingest": {**doc["ingest"], "source_kind": "plankton"}})
    refused = _refused(study_dir)
    assert refused == {rel: "lies in the folder of kind trawl but its metadata says plankton"}
    assert _ingest_of(store, second) == ("damaged", f"its file {rel} is refused")


def test_a_truncated_part_is_refused_and_its_ingest_damaged(study_copy: tuple[Path, list[str]]) -> None:
    study_dir, (_, second, _) = study_copy
    store = Store(study_dir / "store")
    with store.connect(view=False) as con:
        rel = con.execute("SELECT min(path) FROM observation_files WHERE ingest_id = ?", [second]).fetchall()[0][0]
    path = store.directory / rel
    path.write_bytes(path.read_bytes()[:-40])  # the footer is cut: nothing says whose file it was
    refused = _refused(study_dir)
    assert list(refused) == [rel] and refused[rel].startswith("is unreadable (")
    # the seal of the ingest lists the file: the rest of the ingest does not pass for complete
    assert _ingest_of(store, second) == ("damaged", f"its file {rel} is refused")


def test_an_ingest_without_its_seal_is_not_taken_for_complete(study_copy: tuple[Path, list[str]]) -> None:
    study_dir, (_, second, _) = study_copy
    store = Store(study_dir / "store")
    (store.directory / "ingests" / f"{second}.json").unlink()
    assert _refused(study_dir) == {}
    status, reason = _ingest_of(store, second)
    assert status == "damaged" and reason.startswith(f"its seal ingests/{second}.json is missing or unreadable")


# ------------------------------------------------------------------ a deleted store
READERS = (("status",), ("export", "long", "OUT.csv"), ("audit",), ("quarantine",))


def test_a_fresh_study_is_empty_not_lost(tmp_path: Path) -> None:
    study_dir = tmp_path / "fresh"
    shutil.copytree(FIXTURES / "keldmar", study_dir)
    code, out, err = cli(None, "--study", str(study_dir), "status", "--check")
    assert code == 0 and "nothing ingested yet" in out and err == ""
    code, out, _ = cli(None, "--study", str(study_dir), "repair")
    assert code == 0 and out.startswith("nothing to repair")


def test_a_deleted_store_folder_is_a_lost_store(study_copy: tuple[Path, list[str]], tmp_path: Path) -> None:
    study_dir, (_, _, third) = study_copy
    # the copy is used (which writes its own marker: the one it came with names the original folder)
    assert cli(None, "--study", str(study_dir), "status")[0] == 0
    shutil.rmtree(study_dir / "store")
    for args in READERS:
        args = tuple(str(tmp_path / a) if a == "OUT.csv" else a for a in args)
        code, out, err = cli(None, "--study", str(study_dir), *args)
        assert code == 2, (args, out, err)
        assert len(err.strip().splitlines()) == 1, err
        assert "is gone" in err and f"the last: {third}" in err and "harmonize repair" in err, err
    code, out, _ = cli(None, "--study", str(study_dir), "status", "--check")
    assert code == 1 and "is gone" in out and "not an empty study" in out
    # an ingest does not start a new store over the lost one
    with pytest.raises(Exception, match="is gone"):
        _ingest(study_dir)
    code, out, _ = cli(None, "--study", str(study_dir), "repair")
    assert code == 1 and "is gone" in out
    code, out, _ = cli(None, "--study", str(study_dir), "repair", "--apply")
    assert code == 0 and "the next ingest starts an empty store" in out
    _ingest(study_dir)
    assert Store(study_dir / "store").check() == []


def test_deleted_parts_with_the_database_left_are_a_damaged_store(study_copy: tuple[Path, list[str]],
                                                                 tmp_path: Path) -> None:
    study_dir, _ = study_copy
    store = Store(study_dir / "store")
    with store.connect(view=False) as con:
        n_live, n_ingests = con.execute(
            """SELECT count(*), count(DISTINCT ingest_id) FROM observation_files
               JOIN ingests USING (ingest_id) WHERE status = 'complete'""").fetchall()[0]
    shutil.rmtree(store.directory / "observations")
    expected = (f"the store's parquet files are gone: {n_live} of the {n_live} live file(s) of {n_ingests} "
                f"ingest(s) the manifest lists are missing ({store.directory / 'observations'} is missing); "
                "the store is damaged, not empty: 'harmonize status --check' names the files, 'harmonize repair' "
                "takes their ingests out")
    for args in READERS:
        args = tuple(str(tmp_path / a) if a == "OUT.csv" else a for a in args)
        code, out, err = cli(None, "--study", str(study_dir), *args)
        assert (code, err.strip()) == (2, f"error: {expected}"), (args, out)
    code, out, _ = cli(None, "--study", str(study_dir), "status", "--check")
    assert code == 1 and f"integrity problem: {expected}" in out
    assert store.check() == [expected]


def test_the_seal_lists_every_file_of_its_ingest(study_copy: tuple[Path, list[str]]) -> None:
    study_dir, ids = study_copy
    store = Store(study_dir / "store")
    con = duckdb.connect(str(store.db_path), read_only=True)
    try:
        for ingest_id in ids:
            listed = con.execute("SELECT path, n_rows, sha256, size_bytes FROM observation_files "
                                 "WHERE ingest_id = ? ORDER BY path", [ingest_id]).fetchall()
            seal = json.loads((store.directory / "ingests" / f"{ingest_id}.json").read_text())
            assert sorted((p["path"], p["rows"], p["sha256"], p["size_bytes"]) for p in seal["parts"]) == listed
            for rel, _, sha, _ in listed:
                assert hashlib.sha256((store.directory / rel).read_bytes()).hexdigest() == sha
    finally:
        con.close()


def test_twin_windows_and_flags_survive_a_rebuild(tmp_path: Path) -> None:
    # an agency transect sighting and a volunteer record 330 m and 20 minutes from it, under a
    # profile whose windows are not the defaults: the rebuilt store flags the same twin
    import pandas as pd
    from factories import store_frames

    study_dir = tmp_path / "study"
    shutil.copytree(FIXTURES / "keldmar", study_dir)
    profile = study_dir / "profiles" / "opportunistic_volunteer.toml"
    profile.write_text(profile.read_text().replace("distance_km = 2.0", "distance_km = 0.5")
                       .replace("minutes = 60", "minutes = 30"))
    study = load_study(study_dir)
    events = pd.DataFrame({"event_id": ["T1"], "event_start": ["2022-11-05T08:00"],
                           "event_end": [pd.Timestamp("2022-11-05T08:10")], "lat": [43.5], "lon": [-152.0],
                           "depth_min_m": [0.0], "depth_max_m": [0.0]})
    values = pd.DataFrame({"event_id": ["T1"], "variable": ["Procellix keldica"], "value": [4.0]})
    store_frames(study, events, values, source_id="keldmar_ship_survey", kind="transect", protocol=None)
    vol = study_dir / "vol.csv"
    vol.write_text("sighting_id,list_id,obs_time,latitude,longitude,observer_name,species,how_many,all_reported,"
                   "minutes_watched,km_travelled\nA,,2022-11-05T08:20,43.503,-152.0,Ann Vell,keld fulmar,2,,,\n")
    run(study, "opportunistic_volunteer", {"rows": vol})
    store = Store(study.store_dir)

    def state() -> tuple[object, ...]:
        with store.connect() as con:
            return (con.execute("SELECT ingest_id, source_id, distance_km, minutes, rank FROM twin_settings "
                                "ORDER BY ALL").fetchall(),
                    con.execute("SELECT source_id, twin_source_id, variable, distance_km, minutes FROM twins "
                                "ORDER BY ALL").fetchall(),
                    con.execute("SELECT source_id, event_id, flags FROM observations ORDER BY ALL").fetchall())

    before = state()
    assert before[0][0][2:4] == (0.5, 30.0) and len(before[1]) == 1
    store.db_path.unlink()
    assert repair(store, apply=True, rebuild_manifest=True).applied
    assert state() == before


def test_an_ingest_without_part_files_is_rebuilt_from_its_seal(tmp_path: Path) -> None:
    # every row of this ingest went to quarantine: it wrote no part file, only its seal says it was done
    study_dir = tmp_path / "study"
    shutil.copytree(FIXTURES / "keldmar", study_dir)
    for f in (FIXTURES / "trawl").glob("*.csv"):
        shutil.copy(f, study_dir / f.name)
    events = (study_dir / "hauls_messy.csv").read_text().splitlines()
    (study_dir / "bad_hauls.csv").write_text(events[0] + "\n" + "\n".join(
        ",".join(["X" + str(i)] + ["not a value"] * (events[0].count(","))) for i in range(3)) + "\n")
    result = run(load_study(study_dir), "trawl_agency", {"events": study_dir / "bad_hauls.csv",
                                                         "records": study_dir / "catch_messy.csv"})
    assert result.status == "complete" and result.records_written == 0
    store = Store(study_dir / "store")
    assert _parts(store) == []
    with store.connect(view=False) as con:
        before = con.execute("SELECT ingest_id, status, rows_read, rows_quarantined, records_written FROM ingests"
                             ).fetchall()
    store.db_path.unlink()
    code, out, err = cli(None, "--study", str(study_dir), "repair", "--rebuild-manifest", "--apply")
    assert code == 0, err
    with store.connect(view=False) as con:
        assert con.execute("SELECT ingest_id, status, rows_read, rows_quarantined, records_written FROM ingests"
                           ).fetchall() == before


def test_an_older_store_gets_its_marker_when_opened(study_copy: tuple[Path, list[str]]) -> None:
    # a store of version 4 had no marker: a deleted store folder would have looked empty
    study_dir, ids = study_copy
    store = Store(study_dir / "store")
    store.marker.unlink()
    con = duckdb.connect(str(store.db_path))
    con.execute("UPDATE store_meta SET value = '4' WHERE key = 'store_version'")
    con.close()
    store.ingests()  # any command that reads the store
    assert json.loads(store.marker.read_text())["last_ingest"] == max(ids)
    assert store.upgrade() and store.store_version() == STORE_VERSION


@pytest.mark.parametrize(("change", "expected"), [
    ({"version": "2.0"}, "has 'harmonize' metadata of version 2.0, this harmonize reads 1.0"),
    ({"contract_version": "999"}, "was written under contract version 999, this harmonize writes "),
    ({"ingest": None}, "has 'harmonize' metadata without ingest"),
    ({"ingest": {"ingest_id": "x"}}, "has 'harmonize' metadata with an incomplete ingest record"),
    ({"ingest_id": "someone-else"}, "has 'harmonize' metadata whose ingest_id (someone-else) differs from its ingest's"),
    ("not json", "is unreadable ("),
])
def test_each_kind_of_bad_metadata_is_refused_by_name(study_copy: tuple[Path, list[str]],
                                                      change: dict[str, object] | str, expected: str) -> None:
    study_dir, (_, second, _) = study_copy
    store = Store(study_dir / "store")
    with store.connect(view=False) as con:
        rel = con.execute("SELECT min(path) FROM observation_files WHERE ingest_id = ?", [second]).fetchall()[0][0]
    path = store.directory / rel
    if isinstance(change, str):
        table = pq.read_table(path)
        pq.write_table(table.replace_schema_metadata({b"harmonize": change.encode()}), path)
    else:
        if change.get("ingest") is None and "ingest" in change:
            doc = json.loads(pq.read_metadata(path).metadata[b"harmonize"])
            del doc["ingest"]
            pq.write_table(pq.read_table(path).replace_schema_metadata({b"harmonize": json.dumps(doc).encode()}), path)
        else:
            _rewrite_metadata(path, change)
    refused = _refused(study_dir)
    assert list(refused) == [rel] and refused[rel].startswith(expected), refused
    assert _ingest_of(store, second) == ("damaged", f"its file {rel} is refused")


def test_a_part_disagreeing_with_its_seal_damages_its_ingest(study_copy: tuple[Path, list[str]]) -> None:
    study_dir, (_, second, _) = study_copy
    store = Store(study_dir / "store")
    with store.connect(view=False) as con:
        rel = con.execute("SELECT min(path) FROM observation_files WHERE ingest_id = ?", [second]).fetchall()[0][0]
    doc = json.loads(pq.read_metadata(store.directory / rel).metadata[b"harmonize"])
    _rewrite_metadata(store.directory / rel, {"ingest": {**doc["ingest"], "rows_read": 999}})
    assert _refused(study_dir) == {}
    status, reason = _ingest_of(store, second)
    assert status == "damaged"
    assert reason == f"its files disagree about the ingest (ingest: ingests/{second}.json and {rel})"


def test_a_copy_of_the_study_without_its_store_is_empty_not_lost(study_copy: tuple[Path, list[str]],
                                                                 tmp_path: Path) -> None:
    # the marker travels with the copy, but names another folder: the copy is a new study
    study_dir, _ = study_copy
    copy = tmp_path / "copy"
    shutil.copytree(study_dir, copy, ignore=shutil.ignore_patterns("store"))
    assert (copy / ".store.ingested").is_file()
    code, out, _ = cli(None, "--study", str(copy), "status", "--check")
    assert code == 0 and "nothing ingested yet" in out
    _ingest(copy)
    # a study in use, moved (renamed) and then its store deleted, is still a lost store
    assert cli(None, "--study", str(study_dir), "status")[0] == 0
    moved = tmp_path / "moved"
    study_dir.rename(moved)
    shutil.rmtree(moved / "store")
    code, out, _ = cli(None, "--study", str(moved), "status", "--check")
    assert code == 1 and "is gone" in out
