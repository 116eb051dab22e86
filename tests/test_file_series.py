"""A source is a series of files: values that span files are merged, never counted twice."""

from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from examples import scaled
from factories import store_frames
from gridded_files import regular_file, write_profile
from hypothesis import HealthCheck, Phase, given, settings
from hypothesis import strategies as st

from harmonize import load_study, run
from harmonize.colocate import colocate, colocate_wide
from harmonize.export.grid import export_grid, read_grid
from harmonize.export.wide import read_wide
from harmonize.store import Store
from harmonize.study import Study

LAT = np.round(np.arange(42.55, 43.5, 0.1), 6)
LON = np.round(np.arange(-152.95, -151.9, 0.1), 6)
SST = 'sst = "sea_surface_temperature"'
DEGC = {"units": "degC", "_FillValue": np.float32(-999.0)}


def _file(path: Path, days: list[float], values: list[float], origin: str = "2019-12-01") -> Path:
    """A file whose time step i holds values[i] at every pixel."""
    data = np.ones((len(days), LAT.size, LON.size), np.float32) * np.asarray(values, np.float32)[:, None, None]
    return regular_file(path, {"sst": (data, DEGC)}, LAT, LON, time=days, time_units=f"days since {origin}")


def _view(study: Study) -> pd.DataFrame:
    with Store(study.store_dir).connect() as con:
        return con.execute("""SELECT event_id, cell_id, season_year, season, value, effort, n_values, source_file
                              FROM observations WHERE source_kind = 'gridded' ORDER BY event_id""").df()


def _winter_case(study_dir: Path) -> Study:
    """December 2019 (8 degC) in one yearly file, January and February 2020 (10 degC) in the next."""
    study = load_study(study_dir)
    write_profile(study_dir, "sat", SST, period="season", source_id="satellite")
    _file(study_dir / "sst_2019.nc", [14.5], [8.0])
    _file(study_dir / "sst_2020.nc", [45.5, 76.5], [10.0, 10.0])
    run(study, "sat", {"rows": study_dir / "sst_2019.nc"})
    run(study, "sat", {"rows": study_dir / "sst_2020.nc"})
    return study


def test_a_season_split_over_two_yearly_files_is_one_mean(study_dir: Path) -> None:
    study = _winter_case(study_dir)
    view = _view(study)
    # one row per cell-period, the mean of the three monthly steps: equal pixel areas in every
    # step, so the area-weighted mean is (8 + 10 + 10) / 3 (hand arithmetic)
    assert view["event_id"].is_unique
    winter = view[(view["season"] == "winter") & (view["season_year"] == 2020)]
    assert len(winter) == view["cell_id"].nunique() and len(winter) > 0
    assert winter["value"].to_numpy() == pytest.approx((8 + 10 + 10) / 3, abs=1e-9)
    assert round(float(winter["value"].iloc[0]), 2) == 9.33
    assert (winter["source_file"] == "sst_2019.nc and 1 more file").all()
    # each step counts its values once: three steps of the pixels of each cell
    one_step = _single_file_counts(study_dir)
    assert dict(zip(winter["cell_id"], winter["n_values"], strict=True)) == {
        c: 3 * n for c, n in one_step["n"].items()}
    # the effort (valid area per time step) is the pixel area of the cell, as for one step
    assert dict(zip(winter["cell_id"], winter["effort"], strict=True)) == pytest.approx(one_step["effort"])

    # the grid export's provenance lists both files' ingests behind the merged rows
    written = export_grid(study, study_dir / "grid.csv")
    ingests = Store(study.store_dir).ingests()
    assert {i["ingest_id"] for i in written.metadata["ingests"]} == set(ingests["ingest_id"])
    grid = read_grid(study)
    g = grid[(grid["variable"] == "sea_surface_temperature") & (grid["season_year"] == 2020)]
    assert (g["events"] == 1).all() and len(g) == len(winter)
    assert g["mean_value"].to_numpy() == pytest.approx((8 + 10 + 10) / 3, abs=1e-9)
    assert g["total_value"].to_numpy() == pytest.approx((8 + 10 + 10) / 3, abs=1e-9)

    # a haul in the cell in January 2020 gets the season's mean, once
    events = pd.DataFrame({"event_id": ["haul-1"], "event_start": ["2020-01-20 10:00"], "lat": [43.0],
                           "lon": [-152.4], "depth_layer": ["surface"]})
    store_frames(study, events, pd.DataFrame({"event_id": ["haul-1"], "variable": "Ostravix keldensis",
                                              "value": [2.0]}), source_id="survey", kind="trawl")
    long = colocate(study, ["sea_surface_temperature"])
    assert len(long) == 1 and long["value"].iloc[0] == pytest.approx(28 / 3, abs=1e-9)
    wide = colocate_wide(study, ["sea_surface_temperature"])
    assert len(wide) == 1 and wide["sea_surface_temperature"].iloc[0] == pytest.approx(28 / 3, abs=1e-9)
    table = read_wide(study)
    assert len(table) == 1
    assert table["gridded_sea_surface_temperature"].iloc[0] == pytest.approx(28 / 3, abs=1e-9)


def _single_file_counts(study_dir: Path) -> dict[str, dict[str, float]]:
    """Values and valid area per cell of one time step, from a one-file ingest in a fresh study."""
    other = study_dir.parent / (study_dir.name + "-single")
    if not other.exists():
        shutil.copytree(study_dir, other, ignore=shutil.ignore_patterns("store"))
        study = load_study(other)
        run(study, "sat", {"rows": other / "sst_2019.nc"})
    view = _view(load_study(other))
    return {"n": dict(zip(view["cell_id"], view["n_values"], strict=True)),
            "effort": dict(zip(view["cell_id"], view["effort"], strict=True))}


def test_replace_and_superseding_work_per_file(study_dir: Path) -> None:
    study = _winter_case(study_dir)
    # a corrected second file replaces only its own part: (8 + 13 + 13) / 3
    _file(study_dir / "sst_2020.nc", [45.5, 76.5], [13.0, 13.0])
    run(study, "sat", {"rows": study_dir / "sst_2020.nc"}, replace=True)
    winter = _view(study)
    winter = winter[winter["season_year"] == 2020]
    assert winter["value"].to_numpy() == pytest.approx((8 + 13 + 13) / 3, abs=1e-9)
    # re-ingesting an unchanged file changes nothing
    assert run(study, "sat", {"rows": study_dir / "sst_2019.nc"}).status == "unchanged"
    again = _view(study)
    assert again["value"].to_numpy() == pytest.approx(_view(study)["value"].to_numpy(), abs=0)
    assert Store(study.store_dir).check() == []


# -------------------------------------------------------------- invariance (hypothesis)
MONTHS = pd.date_range("2019-10-01", "2020-09-01", freq="MS")


@settings(max_examples=scaled(6, at_least=1), deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture],
          phases=[Phase.explicit, Phase.reuse, Phase.generate])
@given(
    values=st.lists(st.floats(-1.5, 29.0, allow_nan=False, width=32), min_size=6, max_size=12),
    cloudy=st.lists(st.booleans(), min_size=12, max_size=12),
    cuts=st.sets(st.integers(1, 11), max_size=4),
    order_seed=st.integers(0, 1000),
)
def test_one_file_or_many_in_any_order_give_the_same_store(study_dir: Path, values: list[float], cloudy: list[bool],
                                                           cuts: set[int], order_seed: int) -> None:
    """1 file vs N files split by time vs the files ingested in shuffled order -> same values (1e-9)."""
    n = len(values)
    days = [(MONTHS[i] - MONTHS[0]).days + 10.5 for i in range(n)]
    rng = np.random.default_rng(order_seed)
    # pixel-level variation and clouds, so weights differ between cells and steps
    data = (np.asarray(values, np.float32)[:, None, None]
            + rng.normal(0, 1, (n, LAT.size, LON.size)).astype(np.float32))
    for i in range(n):
        if cloudy[i]:
            data[i, : LAT.size // 2, :] = -999.0
    bounds = [0, *sorted(c for c in cuts if c < n), n]
    results = []
    for split in (False, True):
        target = study_dir.parent / f"{study_dir.name}-{'split' if split else 'one'}-{order_seed}"
        shutil.rmtree(target, ignore_errors=True)
        shutil.copytree(study_dir, target, ignore=shutil.ignore_patterns("store"))
        study = load_study(target)
        write_profile(target, "sat", SST, period="season", source_id="satellite")
        pieces = list(zip(bounds[:-1], bounds[1:], strict=True)) if split else [(0, n)]
        files = []
        for k, (a, b) in enumerate(pieces):
            files.append(regular_file(target / f"sst_{k}.nc", {"sst": (data[a:b], DEGC)}, LAT, LON,
                                      time=days[a:b], time_units="days since 2019-10-01"))
        for k in rng.permutation(len(files)):
            run(study, "sat", {"rows": files[k]})
        view = _view(study).set_index("event_id")
        results.append(view)
        assert view.index.is_unique
    one, many = results
    assert list(one.index) == list(many.index)
    np.testing.assert_allclose(many["value"], one["value"], rtol=0, atol=1e-9)
    np.testing.assert_allclose(many["effort"], one["effort"], rtol=1e-12)
    assert many["n_values"].tolist() == one["n_values"].tolist()


# -------------------------------------------------------------- pings delivered in several files
PING_HEADER = "vessel,time_utc,lat,lon,sog,gear\n"


def _pings(rng: np.random.Generator, n_vessels: int, n_pings: int) -> pd.DataFrame:
    """Tracks of n_vessels around the cell boundary near -152.094 E, every 20 min, fishing or steaming."""
    rows = []
    for v in range(n_vessels):
        t = pd.Timestamp("2021-06-01T06:00:00Z") + pd.Timedelta(minutes=int(rng.integers(0, 600)))
        lon = -152.3 + 0.4 * rng.random()
        lat = 42.8 + 0.2 * rng.random()
        for _ in range(n_pings):
            sog = float(rng.choice([3.0, 3.5, 8.0, np.nan]))
            rows.append((f"V-{v}", t.strftime("%Y-%m-%dT%H:%M:%SZ"), round(lat, 5), round(lon, 5),
                         "" if np.isnan(sog) else sog, "OTB"))
            t += pd.Timedelta(minutes=int(rng.choice([10, 20, 30, 200])))
            lon += float(rng.normal(0, 0.01))
    frame = pd.DataFrame(rows, columns=["vessel", "time_utc", "lat", "lon", "sog", "gear"])
    dup = frame.sample(n=3, random_state=int(rng.integers(0, 1000)))  # exact duplicates
    return pd.concat([frame, dup], ignore_index=True)


def _effort_view(study: Study) -> pd.DataFrame:
    with Store(study.store_dir).connect() as con:
        return con.execute("""SELECT event_id, value, effort, n_vessels, n_values FROM observations
                              WHERE source_kind = 'effort' ORDER BY event_id""").df().set_index("event_id")


@settings(max_examples=scaled(5, at_least=1), deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture],
          phases=[Phase.explicit, Phase.reuse, Phase.generate])
@given(seed=st.integers(0, 10_000), n_vessels=st.integers(3, 7), n_files=st.integers(2, 4))
def test_pings_in_one_file_in_vessel_files_or_shuffled_give_the_same_cells(study_dir: Path, seed: int, n_vessels: int,
                                                                         n_files: int) -> None:
    """Fishing hours, distinct vessels and the rule of three per cell-period do not depend on
    how the pings were cut into files (whole tracks per file) or on their row order."""
    rng = np.random.default_rng(seed)
    pings = _pings(rng, n_vessels, 12)
    file_of_vessel = {f"V-{v}": int(rng.integers(0, n_files)) for v in range(n_vessels)}
    results = {}
    for case in ("one", "files", "shuffled"):
        target = study_dir.parent / f"{study_dir.name}-pings-{case}-{seed}"
        shutil.rmtree(target, ignore_errors=True)
        shutil.copytree(study_dir, target, ignore=shutil.ignore_patterns("store"))
        study = load_study(target)
        if case == "files":
            parts = [pings[pings["vessel"].map(file_of_vessel) == k] for k in range(n_files)]
        elif case == "shuffled":
            parts = [pings.sample(frac=1.0, random_state=seed)]
        else:
            parts = [pings]
        for k, part in enumerate(parts):
            if part.empty:
                continue
            path = target / f"pings_{k}.csv"
            part.to_csv(path, index=False)
            run(study, "effort_pings", {"rows": path})
        results[case] = _effort_view(study)
    one = results["one"]
    assert len(one) > 0 and one.index.is_unique
    for case in ("files", "shuffled"):
        got = results[case]
        assert list(got.index) == list(one.index)
        np.testing.assert_allclose(got["value"], one["value"], rtol=0, atol=1e-9)
        np.testing.assert_allclose(got["effort"], one["effort"], rtol=0, atol=1e-9)
        assert got["n_vessels"].tolist() == one["n_vessels"].tolist()
        assert got["n_values"].tolist() == one["n_values"].tolist()
    # so the rule of three (fewer than 3 vessels -> suppressed) blanks the same cell-periods
    assert ((results["files"]["n_vessels"] < 3) == (one["n_vessels"] < 3)).all()


def _three_vessel_days(study: Study, study_dir: Path) -> None:
    """Three vessels fishing one cell, each on its own day in its own file (four pings 1 h apart)."""
    for k, vessel in enumerate(["A-1", "B-2", "C-3"]):
        day = f"2021-06-0{k + 1}"
        text = PING_HEADER + "".join(f"{vessel},{day}T{h:02d}:00:00Z,42.9,{-152.0 + 0.001 * h},3.0,OTB\n"
                                     for h in range(8, 12))
        (study_dir / f"day{k}.csv").write_text(text)
        run(study, "effort_pings", {"rows": study_dir / f"day{k}.csv"})


def test_vessel_counts_merge_across_files_for_the_rule_of_three(study_dir: Path) -> None:
    """Three vessels fishing one cell in one season, each in its own daily file: 3 vessels, not 1."""
    study = load_study(study_dir)
    _three_vessel_days(study, study_dir)
    view = _effort_view(study)
    assert len(view) == 1
    # four pings 1 h apart, each gets half of each neighbouring interval (within the
    # max_gap_h / 2 = 1 h cap): 0.5 + 1 + 1 + 0.5 = 3 h per vessel (hand arithmetic)
    assert view["value"].iloc[0] == pytest.approx(9.0, abs=1e-12)
    assert view["n_vessels"].iloc[0] == 3 and view["n_values"].iloc[0] == 12
    # with the second file replaced by one of vessel A again, two distinct vessels remain
    (study_dir / "day1.csv").write_text(PING_HEADER + "".join(
        f"A-1,2021-06-05T{h:02d}:00:00Z,42.9,{-152.0 + 0.001 * h},3.0,OTB\n" for h in range(8, 12)))
    run(study, "effort_pings", {"rows": study_dir / "day1.csv"}, replace=True)
    view = _effort_view(study)
    # A's two days are one track: its last ping of June 1 and its first of June 5 are
    # neighbours, and each gets half of that 4-day interval capped at max_gap_h / 2 = 1 h:
    # A 3 + 1 + 3 + 1 = 8 h, C 3 h (hand arithmetic; as when the two days are one file)
    assert view["n_vessels"].iloc[0] == 2 and view["value"].iloc[0] == pytest.approx(11.0, abs=1e-12)


def test_a_store_written_before_the_parts_still_reads_one_row_per_cell_period(study_dir: Path) -> None:
    """Parquet files without the part columns (older stores): merged by n_values, still one row."""
    import pyarrow.parquet as pq

    study = _winter_case(study_dir)
    exact = _view(study).set_index("event_id")
    store = Store(study.store_dir)
    with store.connect() as con:
        paths = [store.directory / r[0] for r in con.execute("SELECT path FROM observation_files").fetchall()]
    for path in paths:
        table = pq.read_table(path)
        pq.write_table(table.drop_columns([c for c in ("part_sum", "part_weight", "part_steps", "vessel_ids")
                                           if c in table.column_names]), path)
    # a store written then had no file checksums either (store version < 3): they are taken on open
    import duckdb

    con = duckdb.connect(str(store.db_path))
    con.execute("UPDATE observation_files SET sha256 = NULL, size_bytes = NULL")
    con.close()
    old = _view(study).set_index("event_id")
    assert list(old.index) == list(exact.index)
    # every step has the same valid pixels here, so weighting by the count of values is exact
    np.testing.assert_allclose(old["value"], exact["value"], rtol=0, atol=1e-9)
    np.testing.assert_allclose(old["effort"], exact["effort"], rtol=1e-12)
    assert store.check() == []


def test_the_merge_rule_is_recorded_at_commit_and_older_ingests_follow_their_kind(study_dir: Path) -> None:
    """The store merges parts by ``ingests.merge_rule``, written at commit from the adapter
    (store version 7): the store's views consult no adapter. An ingest committed before the
    rule was recorded (null) follows the later ingests of its source kind; with no rule recorded
    at all, the part files' footers say it (area-weighted parts: a mean)."""
    import duckdb

    study = _winter_case(study_dir)
    exact = _view(study)
    store = Store(study.store_dir)
    with store.connect() as con:
        # docs/store.md: a grid cell's value is the area-weighted mean of its parts
        assert con.execute("SELECT DISTINCT source_kind, merge_rule FROM ingests").fetchall() == [("gridded", "mean")]
    con = duckdb.connect(str(store.db_path))
    con.execute("UPDATE ingests SET merge_rule = NULL WHERE ingest_id = (SELECT min(ingest_id) FROM ingests)")
    con.close()
    pd.testing.assert_frame_equal(_view(study), exact)
    con = duckdb.connect(str(store.db_path))
    con.execute("UPDATE ingests SET merge_rule = NULL")
    con.close()
    pd.testing.assert_frame_equal(_view(study), exact)


def test_a_store_of_version_6_reads_merged_and_is_upgraded_with_its_rules(study_dir: Path) -> None:
    """A store written before the rules were recorded (version 6: no merge_rule column): its
    readers merge the grid's parts (a mean) and the fishing hours (a sum) as its writer did, and
    the first writer records each ingest's rule, read from the footers of its part files."""
    import duckdb

    study = _winter_case(study_dir)
    _three_vessel_days(study, study_dir)
    grid, hours = _view(study), _effort_view(study)
    # three vessels x (0.5 + 1 + 1 + 0.5) h, one cell-period (hand arithmetic, as above)
    assert hours["value"].tolist() == pytest.approx([9.0], abs=1e-12)
    store = Store(study.store_dir)
    con = duckdb.connect(str(store.db_path))
    con.execute("ALTER TABLE ingests DROP COLUMN merge_rule")
    con.execute("UPDATE store_meta SET value = '6' WHERE key = 'store_version'")
    con.execute("DELETE FROM store_meta WHERE starts_with(key, 'view_sql:')")
    con.close()
    pd.testing.assert_frame_equal(_view(study), grid)
    pd.testing.assert_frame_equal(_effort_view(study), hours)
    with store.connect(read_only=False) as con:   # the first writer upgrades the store
        rules = dict(con.execute("SELECT DISTINCT source_kind, merge_rule FROM ingests").fetchall())
        version = con.execute("SELECT value FROM store_meta WHERE key = 'store_version'").fetchall()[0][0]
    assert rules == {"gridded": "mean", "effort": "sum"} and version == "7"
    pd.testing.assert_frame_equal(_view(study), grid)
    pd.testing.assert_frame_equal(_effort_view(study), hours)
