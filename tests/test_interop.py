"""Outputs that open right in general-purpose readers: UTC-aware times, a store that stands alone.

Every check opens the files with at least two readers that are not harmonize (pyarrow,
DuckDB, pandas, pyogrio) and states the expected rule independently of the code under test.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
import shutil
from pathlib import Path

import duckdb
import pandas as pd
import pyarrow as pa
import pyarrow.dataset as ds
import pyarrow.parquet as pq
import pytest
from geographiclib.geodesic import Geodesic

from harmonize import Store, load_study, run, store_layout
from harmonize.export.run import export
from harmonize.store import STORE_VERSION
from harmonize.study import Study
from tests.factories import store_frames

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
PROFILE = "opportunistic_volunteer"
HEADER = ("sighting_id,list_id,obs_time,latitude,longitude,observer_name,species,how_many,all_reported,"
          "minutes_watched,km_travelled\n")
AGENCY = (43.5, -152.0)  # an agency seabird sighting inside the fixture domain
# ISO 8601-1:2019, extended format with the UTC designator Z
ISO_UTC = re.compile(r"^\d{4}-\d{2}-\d{2}T\d{2}:\d{2}:\d{2}(\.\d{1,6})?Z$")


def _trawl(study_dir: Path) -> Study:
    study = load_study(study_dir)
    run(study, "trawl_agency", {"events": study_dir / "hauls_messy.csv", "records": study_dir / "catch_messy.csv"})
    return study


def _parts(study: Study) -> list[Path]:
    return sorted((study.store_dir / "observations").rglob("*.parquet"))


def _record_digests(store: Store) -> None:
    """Record the rewritten files' sha256 and size in the manifest, as an older harmonize that
    wrote them would have (the integrity check compares them)."""
    con = duckdb.connect(str(store.db_path))
    for (rel,) in con.execute("SELECT path FROM observation_files").fetchall():
        data = (store.directory / rel).read_bytes()
        con.execute("UPDATE observation_files SET sha256 = ?, size_bytes = ? WHERE path = ?",
                    [hashlib.sha256(data).hexdigest(), len(data), rel])
    con.close()


def _epochs_us(con: duckdb.DuckDBPyConnection) -> list[tuple[str, int]]:
    return con.execute("SELECT record_id, epoch_us(event_start) FROM observations ORDER BY record_id").fetchall()


# --------------------------------------------------------------------------- UTC-aware times
def test_store_times_are_utc_instants_in_every_reader(study_dir: Path) -> None:
    study = _trawl(study_dir)
    files = _parts(study)
    assert files
    for f in files:
        field = pq.read_schema(f).field("event_start")
        assert field.type == pa.timestamp("us", tz="UTC")
        logical = pq.ParquetFile(f).metadata.schema.column(pq.read_schema(f).get_field_index("event_start")).logical_type
        assert "isAdjustedToUTC=true" in str(logical)
    # the instants as pyarrow reads them (microseconds since 1970-01-01T00:00Z)
    table = pa.concat_tables([pq.read_table(f, columns=["record_id", "event_start"]) for f in files])
    expected = sorted(zip(table["record_id"].to_pylist(),
                          table["event_start"].cast(pa.int64()).to_pylist(), strict=True))
    # plain DuckDB in a session far from UTC reads the same instants, typed TIMESTAMPTZ
    con = duckdb.connect()
    con.execute("SET TimeZone = 'America/Halifax'")
    listing = [str(f) for f in files]
    got = con.execute("SELECT record_id, epoch_us(event_start) FROM read_parquet(?) ORDER BY 1", [listing]).fetchall()
    assert got == expected
    assert con.execute("SELECT typeof(event_start) FROM read_parquet(?) LIMIT 1", [listing]).fetchall()[0][0] \
        == "TIMESTAMP WITH TIME ZONE"
    # the store's view, under the same session zone
    with Store(study.store_dir).connect() as s:
        s.execute("SET TimeZone = 'America/Halifax'")
        assert _epochs_us(s) == expected
        types = {r[0]: r[1] for r in s.execute("DESCRIBE observations").fetchall()}
        assert types["event_start"] == types["event_end"] == "TIMESTAMP WITH TIME ZONE"
    # pandas reads zone-aware UTC
    frame = pd.read_parquet(files[0])
    assert str(frame["event_start"].dt.tz) == "UTC"


def test_a_store_with_naive_times_reads_the_same_instants(study_dir: Path) -> None:
    # a store written before the times carried their zone (store version 2) holds UTC wall
    # clocks in timestamp[us] (isAdjustedToUTC=false): its rows must read as the same instants
    study = _trawl(study_dir)
    store = Store(study.store_dir)
    with store.connect() as con:
        before = _epochs_us(con)
    for f in _parts(study):
        t = pq.read_table(f)
        for name in ("event_start", "event_end"):
            i = t.schema.get_field_index(name)
            t = t.set_column(i, pa.field(name, pa.timestamp("us")), t[name].cast(pa.timestamp("us")))
        meta = pq.ParquetFile(f).metadata
        pq.write_table(t, f, row_group_size=max(meta.num_rows, 1))
        assert not pq.read_schema(f).field("event_start").type.tz
    _record_digests(store)
    with store.connect() as con:
        con.execute("SET TimeZone = 'America/Halifax'")
        assert _epochs_us(con) == before
    # as an older store: version 3, its persisted views made when its files were read as they
    # are (plain DuckDB in Halifax now reads them 3 hours off: the views must be rewritten)
    con = duckdb.connect(str(store.db_path))
    con.execute("UPDATE store_meta SET value = '3' WHERE key = 'store_version'")
    con.close()
    # the upgrade (first writer, or 'harmonize status --check') rewrites the persisted views
    # and records the version: plain DuckDB then reads the same instants too
    assert store.upgrade()
    assert store.store_version() == STORE_VERSION
    con = duckdb.connect(str(store.db_path), read_only=True)
    con.execute(f"SET TimeZone = 'America/Halifax'; SET file_search_path = '{store.directory}'")
    assert _epochs_us(con) == before
    con.close()
    assert store.check() == []


def test_long_csv_and_gpkg_write_iso_8601_utc(study_dir: Path, tmp_path: Path) -> None:
    study = _trawl(study_dir)
    export(study, "long", tmp_path / "long.parquet")
    export(study, "long", tmp_path / "long.csv")
    parquet = pq.read_table(tmp_path / "long.parquet")
    assert parquet.schema.field("event_start").type == pa.timestamp("us", tz="UTC")
    text = pd.read_csv(tmp_path / "long.csv", dtype=str)
    assert text["event_start"].str.match(ISO_UTC).all()
    assert text["event_end"].dropna().str.match(ISO_UTC).all()
    # the CSV's text and the parquet file name the same instants (pandas and pyarrow)
    from_csv = pd.to_datetime(text["event_start"], format="ISO8601", utc=True)
    from_parquet = parquet["event_start"].to_pandas()
    assert sorted(from_csv.astype("int64") // 1000) == sorted(from_parquet.astype("int64") // 1000)
    # DuckDB reads the CSV's times as TIMESTAMPTZ without being told the zone
    con = duckdb.connect()
    con.execute("SET TimeZone = 'America/Halifax'")
    kind = con.execute("SELECT typeof(event_start) FROM read_csv(?) LIMIT 1", [str(tmp_path / "long.csv")]).fetchall()
    assert kind[0][0] == "TIMESTAMP WITH TIME ZONE"
    # GeoPackage: pyogrio's raw text of the samples layer ends in Z
    import pyogrio
    export(study, "gpkg", tmp_path / "out.gpkg")
    layer = pyogrio.read_dataframe(tmp_path / "out.gpkg", layer="samples", datetime_as_string=True)
    assert layer["event_start"].str.match(ISO_UTC).all()


# --------------------------------------------------------------------------- a store that stands alone
def test_moved_study_opens_with_plain_duckdb(study_dir: Path, tmp_path: Path) -> None:
    study = _trawl(study_dir)
    with Store(study.store_dir).connect() as con:
        expected = con.execute("SELECT count(*), sum(value) FROM observations").fetchall()
    moved = tmp_path / "elsewhere" / "study"
    moved.parent.mkdir()
    shutil.move(str(study_dir), moved)  # the old folder is gone: an absolute path would break
    here = Path.cwd()
    try:
        os.chdir(moved / "store")
        con = duckdb.connect("harmonized.duckdb", read_only=True)
        assert con.execute("SELECT count(*), sum(value) FROM observations").fetchall() == expected
        con.close()
    finally:
        os.chdir(here)
    # from any other working folder, with the store folder as a search path
    con = duckdb.connect(str(moved / "store" / "harmonized.duckdb"), read_only=True)
    con.execute(f"SET file_search_path = '{moved / 'store'}'")
    assert con.execute("SELECT count(*), sum(value) FROM observations").fetchall() == expected
    con.close()


def _at(distance_m: float, azimuth: float = 60.0) -> tuple[float, float]:
    """The point ``distance_m`` from the agency sighting along a WGS84 geodesic (Karney 2013)."""
    g = Geodesic.WGS84.Direct(AGENCY[0], AGENCY[1], azimuth, distance_m)
    return g["lat2"], g["lon2"]


def _agency_and_volunteers(study_dir: Path) -> Study:
    """An agency transect sighting and two volunteer records 300 m from it, 5 and 15 minutes later."""
    study = load_study(study_dir)
    events = pd.DataFrame({"event_id": ["T1"], "event_start": ["2022-11-05T08:00"],
                           "event_end": [pd.Timestamp("2022-11-05T08:10")],
                           "lat": [AGENCY[0]], "lon": [AGENCY[1]], "depth_min_m": [0.0], "depth_max_m": [0.0]})
    values = pd.DataFrame({"event_id": ["T1"], "variable": ["Procellix keldica"], "value": [4.0]})
    store_frames(study, events, values, source_id="keldmar_ship_survey", kind="transect", protocol=None)
    near = _at(300.0)
    (study_dir / "vol.csv").write_text(
        HEADER + f"A,,2022-11-05T08:05,{near[0]:.7f},{near[1]:.7f},Ann Vell,keld fulmar,2,,,\n"
        + f"B,,2022-11-05T08:15,{near[0]:.7f},{near[1]:.7f},Bo Tarrin,keld fulmar,3,,,\n")
    run(study, PROFILE, {"rows": study_dir / "vol.csv"})
    return study


def test_flags_and_season_year_read_without_harmonize(study_dir: Path) -> None:
    study = _agency_and_volunteers(study_dir)
    from harmonize.twins import twins_frame  # what 'harmonize twins' lists
    with Store(study.store_dir).connect() as con:
        listed = twins_frame(con)
    assert len(listed) >= 1
    store = study.store_dir
    con = duckdb.connect(str(store / "harmonized.duckdb"), read_only=True)
    con.execute(f"SET file_search_path = '{store}'")
    flagged = con.execute("""SELECT count(DISTINCT record_id) FROM current
                             WHERE list_contains(flags, 'probable_duplicate')""").fetchall()[0][0]
    con.close()
    assert flagged == listed["record_id"].nunique()
    # season_year as an integer in pandas, with the partitioning documented in docs/store.md
    part = ds.partitioning(pa.schema([("source_kind", pa.string()), ("season_year", pa.int32())]), flavor="hive")
    frame = pd.read_parquet(store / "observations", partitioning=part)
    assert frame["season_year"].dtype == "int32" and (frame["season_year"] >= 2022).all()
    # and in polars, which reads hive keys as integers by itself
    import polars as pl
    lazy = pl.scan_parquet(store / "observations" / "**" / "*.parquet", hive_partitioning=True)
    assert lazy.collect_schema()["season_year"].is_integer()
    assert lazy.filter(pl.col("season_year") >= 2022).select(pl.len()).collect().item() == len(frame)


def test_flags_read_from_the_parquet_files_alone(study_dir: Path) -> None:
    """store/index/ holds the store-wide flags and the live part files as plain parquet: a
    reader with pandas or polars alone counts the twins 'harmonize twins' lists."""
    study = _agency_and_volunteers(study_dir)
    from harmonize.twins import twins_frame
    with Store(study.store_dir).connect() as con:
        listed = twins_frame(con)
    assert len(listed) >= 1
    store = study.store_dir
    flags = pd.read_parquet(store / "index" / "flags.parquet")
    twins_read = flags[flags["flag"] == "probable_duplicate"]
    assert sorted(twins_read["record_id"]) == sorted(listed["record_id"])
    # the rows themselves, from the live files only (the folder may hold files no ingest lists)
    run(study, PROFILE, {"rows": study_dir / "vol.csv"}, replace=True)
    live = pd.read_parquet(store / "index" / "live_files.parquet")
    with Store(study.store_dir).connect() as con:
        expected = con.execute("SELECT count(*) FROM observations").fetchall()[0][0]
    assert live["n_rows"].sum() == expected
    on_disk = {p.relative_to(store).as_posix() for p in (store / "observations").rglob("*.parquet")}
    assert set(live["path"]) <= on_disk
    rows = pd.concat([pd.read_parquet(store / rel) for rel in live["path"]], ignore_index=True)
    flags = pd.read_parquet(store / "index" / "flags.parquet")
    marked = rows.merge(flags[flags["flag"] == "probable_duplicate"], on=["record_id", "ingest_id"])
    with Store(study.store_dir).connect() as con:
        listed = twins_frame(con)
    assert len(marked) == len(listed) >= 1
    # polars reads the same files
    import polars as pl
    pl_flags = pl.read_parquet(store / "index" / "flags.parquet")
    assert pl_flags.filter(pl.col("flag") == "probable_duplicate").height == len(listed)
    # the index says which store wrote it, like every part file
    meta = pq.read_schema(store / "index" / "flags.parquet").metadata
    assert json.loads(meta[b"harmonize"])["version"] == "1.0"


def test_a_stale_index_is_found_and_rewritten(study_dir: Path) -> None:
    study = _trawl(study_dir)
    store = Store(study.store_dir)
    index = study.store_dir / "index" / "live_files.parquet"
    good = index.read_bytes()
    pq.write_table(pa.table({"path": ["observations/elsewhere.parquet"], "ingest_id": ["x"], "source_id": ["x"],
                             "source_kind": ["trawl"], "n_rows": [1]}), index)
    with store.connect() as con:
        assert "disagrees with the database" in store_layout.index_problem(con, store.directory)
    assert store.check() == []  # a writable store: rewritten from the database
    assert pq.read_table(index).equals(pq.read_table(pa.BufferReader(good)))
    index.unlink()
    assert store.check() == [] and index.is_file()



# --------------------------------------------------------------------------- units as data
def _pint_text(udunits: str) -> str:
    """UDUNITS-style products ("kg km-2") in pint's syntax ("kg * km**-2")."""
    return " * ".join(re.sub(r"^([A-Za-z]+)(-?\d+)$", r"\1**\2", term) for term in udunits.split())


def test_density_unit_is_the_unit_of_value_over_effort(study_dir: Path, tmp_path: Path) -> None:
    import pint
    ureg = pint.UnitRegistry()
    study = _trawl(study_dir)
    export(study, "long", tmp_path / "long.parquet")
    rows = pq.read_table(tmp_path / "long.parquet").to_pandas()
    dense = rows[rows["density"].notna()]
    assert len(dense) and dense["density_unit"].notna().all()
    assert rows.loc[rows["density"].isna(), "density_unit"].isna().all()
    assert set(dense.loc[dense["quantity"] == "count", "density_unit"]) == {"km-2"}
    assert set(dense.loc[dense["quantity"] == "biomass", "density_unit"]) <= {"kg km-2"}
    for r in dense.itertuples():
        # pint: (value [unit]) / (effort [effort_unit]) expressed in density_unit is the density
        value = ureg.Quantity(r.value, "dimensionless" if r.unit == "1" else r.unit)
        effort = ureg.Quantity(r.effort, _pint_text(r.effort_unit))
        got = (value / effort).to(_pint_text(r.density_unit)).magnitude
        assert got == pytest.approx(r.density, rel=1e-12)
    # DuckDB reads the same column from the same file
    con = duckdb.connect()
    n = con.execute("SELECT count(*) FROM read_parquet(?) WHERE density_unit = 'km-2'",
                    [str(tmp_path / "long.parquet")]).fetchall()[0][0]
    assert n == int((rows["density_unit"] == "km-2").sum())


def test_density_unit_of_files_written_before_the_column(study_dir: Path) -> None:
    study = _trawl(study_dir)
    store = Store(study.store_dir)
    with store.connect() as con:
        before = con.execute("SELECT record_id, density_unit FROM observations ORDER BY 1").fetchall()
    for f in _parts(study):
        pq.write_table(pq.read_table(f).drop_columns(["density_unit"]), f)
    _record_digests(store)
    with store.connect() as con:
        assert con.execute("SELECT record_id, density_unit FROM observations ORDER BY 1").fetchall() == before


# --------------------------------------------------------------------------- Python API
def test_observations_in_three_readers_with_nullable_integers(study_dir: Path) -> None:
    from harmonize import open_study
    study = _trawl(study_dir)
    handle = open_study(study.root)
    frame = handle.observations()
    table = handle.observations(as_="arrow")
    relation = handle.observations(as_="duckdb")
    assert isinstance(table, pa.Table) and isinstance(frame, pd.DataFrame)
    assert len(frame) == table.num_rows == relation.count("*").fetchall()[0][0] > 0
    # nullable integers: a null vessel count (no trawl has one) keeps the column an integer
    assert frame["n_vessels"].dtype == pd.Int64Dtype() and frame["n_vessels"].isna().all()
    assert frame["season_year"].dtype == pd.Int64Dtype()
    assert str(frame["event_start"].dt.tz) == "UTC"
    assert table.schema.field("event_start").type == pa.timestamp("us", tz="UTC")
    ids = sorted(table["record_id"].to_pylist())
    assert sorted(frame["record_id"]) == ids == sorted(r[0] for r in relation.select("record_id").fetchall())
    with pytest.raises(Exception, match="as_='polars' is not a reader; choose one of pandas, arrow, duckdb"):
        handle.observations(as_="polars")


def test_package_ships_py_typed_and_no_unused_netcdf_engine() -> None:
    import tomllib
    from importlib import resources
    assert resources.files("harmonize").joinpath("py.typed").is_file()
    root = Path(__file__).resolve().parent.parent
    project = tomllib.loads((root / "pyproject.toml").read_text())
    assert "py.typed" in project["tool"]["setuptools"]["package-data"]["harmonize"]
    deps = " ".join(project["project"]["dependencies"])
    assert "h5netcdf" not in deps
    sources = [p for d in ("harmonize", "cli") for p in (root / d).rglob("*.py")]
    assert not [p for p in sources if "h5netcdf" in p.read_text()]


def test_units_of_numeric_columns_in_parquet_field_metadata(study_dir: Path, tmp_path: Path) -> None:
    study = _trawl(study_dir)
    for fmt in ("long", "grid"):
        path = tmp_path / f"{fmt}.parquet"
        export(study, fmt, path)
        schema = pq.read_schema(path)
        numeric = [f for f in schema if pa.types.is_integer(f.type) or pa.types.is_floating(f.type)]
        assert numeric
        for f in numeric:
            meta = {k.decode(): v.decode() for k, v in (f.metadata or {}).items()}
            assert "unit" in meta or meta.get("unit_column") in schema.names, (fmt, f.name, meta)
        units = {f.name: {k.decode(): v.decode() for k, v in (f.metadata or {}).items()} for f in numeric}
        if fmt == "long":
            assert units["lat"]["unit"] == "degrees_north" and units["depth_min_m"]["unit"] == "m"
            assert units["value"]["unit_column"] == "unit" and units["density"]["unit_column"] == "density_unit"
        else:
            assert units["mean_density"]["unit_column"] == "density_unit"
            assert units["total_effort"]["unit_column"] == "effort_unit"
        # the schema entry changes nothing of the values: pyarrow and DuckDB read the same rows
        arrow_rows = pq.read_table(path).num_rows
        assert duckdb.connect().execute("SELECT count(*) FROM read_parquet(?)", [str(path)]).fetchall()[0][0] == arrow_rows
        # the provenance key is still there
        assert b"harmonize" in pq.read_metadata(path).metadata
    grid = pq.read_table(tmp_path / "grid.parquet").to_pandas()
    counts = grid[grid["quantity"] == "count"]
    assert len(counts) and set(counts["density_unit"]) == {"km-2"}
