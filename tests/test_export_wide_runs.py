"""The wide export pivoted in runs of season years equals the one-pass export, in bounded memory."""

from __future__ import annotations

import datetime as dt
import tempfile
from pathlib import Path

import pandas as pd
import pyarrow.parquet as pq
import pytest
from export_store import _values, export_study
from factories import store_frames

from harmonize.errors import HarmonizeError
from harmonize.export.metadata import read_export_metadata
from harmonize.export.selection import (
    MEMORY_LIMIT_ENV,
    ExportFilters,
    bounded_memory,
    open_selection,
)
from harmonize.export.wide import RUN_ROWS_ENV, _safe_cuts, export_wide, read_wide, wide_runs
from harmonize.study import Study

ONE_PASS = 10**9   # more rows than any test store: one run
TINY = 1           # every safe cut is taken: as many runs as the planner allows


@pytest.fixture(scope="module")
def study(tmp_path_factory: pytest.TempPathFactory) -> Study:
    """The export test store plus ``coastal_tows``, a plankton source ingested from two files.

    - tows_a.csv: P1 (June 2018), P2 (15 Dec 2018: season_year 2019), P3 (July 2019) and
      P9 (May 2019);
    - tows_b.csv: P9 again (May 2020; the same event id in another season year, so P9 has
      rows in 2019 and 2020 and the runs must not cut between them), P4 (August 2020),
      P7 (April 2021, tagged season_year 2020 by its provider: it starts after P5, so no
      cut may fall between 2020 and 2021 either) and P5 (March 2021).
    """
    study, _built = export_study(tmp_path_factory.mktemp("wide_runs") / "study")
    pos = {"lat": 43.3, "lon": -152.4, "depth_layer": "epipelagic", "effort_unit": "m3"}
    ev_a = pd.DataFrame({"event_id": ["P1", "P2", "P3", "P9"],
                         "event_start": ["2018-06-01 10:00", "2018-12-15 10:00", "2019-07-01 10:00",
                                         "2019-05-01 10:00"],
                         "effort": [50.0, 40.0, 80.0, 25.0], **pos})
    ev_a["event_end"] = ev_a["event_start"]
    va_a = _values([
        {"event_id": "P1", "variable": "Ostravix keldensis", "value": 100.0},
        {"event_id": "P1", "variable": "Pelagon argentea", "value": 20.0, "life_stage": "larva"},
        {"event_id": "P2", "variable": "Pelagon argentea", "value": 8.0, "life_stage": "larva"},
        {"event_id": "P2", "variable": "Pelagon argentea", "value": 2.0, "life_stage": "adult"},
        {"event_id": "P3", "variable": "Ostravix keldensis", "value": 0.0, "zero_filled": True},
        {"event_id": "P9", "variable": "Ostravix keldensis", "value": 5.0},
    ])
    store_frames(study, ev_a, va_a, source_id="coastal_tows", kind="plankton", file_name="tows_a.csv")
    ev_b = pd.DataFrame({"event_id": ["P9", "P4", "P7", "P5"],
                         "event_start": ["2020-05-01 10:00", "2020-08-01 10:00", "2021-04-01 10:00",
                                         "2021-03-01 10:00"],
                         "effort": [25.0, 60.0, 30.0, 45.0],
                         "season_year": pd.array([None, None, 2020, None], dtype="Int32"), **pos})
    ev_b["event_end"] = ev_b["event_start"]
    va_b = _values([
        {"event_id": "P9", "variable": "Pelagon argentea", "value": 3.0, "life_stage": "larva"},
        {"event_id": "P4", "variable": "Ostravix keldensis", "value": 12.0},
        {"event_id": "P7", "variable": "Pelagon argentea", "value": 6.0, "life_stage": "larva"},
        {"event_id": "P5", "variable": "Ostravix keldensis", "value": 9.0},
        {"event_id": "P5", "variable": "Pelagon argentea", "value": 1.0, "quantity": "presence"},
    ])
    store_frames(study, ev_b, va_b, source_id="coastal_tows", kind="plankton", file_name="tows_b.csv")
    return study


def _runs(study: Study, run_rows: int, filters: ExportFilters | None = None) -> list[str]:
    with open_selection(study, filters or ExportFilters()) as (con, _counts):
        return wide_runs(con, run_rows)


def test_runs_cut_only_where_the_table_cannot_change(study: Study) -> None:
    assert _runs(study, ONE_PASS) == ["TRUE"]
    runs = _runs(study, TINY)
    tows = [r for r in runs if "coastal_tows" in r]
    # 2018 | 2019-2021: P9 spans 2019 and 2020, P7 (season 2020) starts after P5 (season 2021)
    assert tows == ["(source_id = 'coastal_tows' AND (season_year BETWEEN 2018 AND 2018))",
                    "(source_id = 'coastal_tows' AND (season_year BETWEEN 2019 AND 2021))"]
    # survey_trawl: 2020 (T4, T1, T2) | 2021 (T3); volunteer_birds: 2020
    assert len(runs) == 5
    assert len(_runs(study, 6)) < len(runs)   # bigger runs, fewer of them


def _frame(path: Path) -> pd.DataFrame:
    frame = pd.read_parquet(path) if path.suffix == ".parquet" else pd.read_csv(path, keep_default_na=False, dtype=str)
    # P9 is one event id in two season years: any_value() may take either year's season tags
    frame.loc[frame["event_id"] == "P9", ["season_year", "season"]] = None
    return frame


def _lines(path: Path) -> list[bytes]:
    return [line for line in path.read_bytes().splitlines() if b",P9," not in line]


CASES = {
    "all": {},
    "filters": {"filters": ExportFilters.build(kinds="trawl,plankton", years="2019-2021")},
    "covariates": {"covariates": pd.DataFrame({"source_id": ["coastal_tows", "survey_trawl"],
                                               "event_id": ["P4", "T3"], "model_chl_mg_m3": [0.8, 1.6]})},
    "by_life_stage": {"by_life_stage": True, "link_gridded": False},
    "biomass": {"quantity": "biomass"},
}


#: The combinations the fast lane runs (make test runs every one).
FAST_CASES = {("all", ".parquet"), ("filters", ".csv")}


@pytest.mark.parametrize(("case", "suffix"), [
    pytest.param(case, suffix, marks=() if (case, suffix) in FAST_CASES else pytest.mark.slow)
    for case in CASES for suffix in (".parquet", ".csv")])
def test_runs_write_the_one_pass_file(study: Study, tmp_path: Path, suffix: str, case: str) -> None:
    options = CASES[case]
    one = export_wide(study, tmp_path / f"one{suffix}", run_rows=ONE_PASS, **options)
    runs = export_wide(study, tmp_path / f"runs{suffix}", run_rows=TINY, **options)
    assert runs.rows == one.rows > 0
    expected, got = _frame(one.path), _frame(runs.path)
    pd.testing.assert_frame_equal(got, expected)   # columns, their order and dtypes, row order
    if suffix == ".csv":
        assert _lines(runs.path) == _lines(one.path)   # the same text, byte for byte
    else:
        # the same Arrow types (whether DuckDB marks a column "required" follows its statistics)
        assert [(f.name, f.type) for f in pq.read_schema(runs.path)] == [(f.name, f.type) for f in pq.read_schema(one.path)]
    meta_one, meta_runs = read_export_metadata(one.path), read_export_metadata(runs.path)
    for meta in (meta_one, meta_runs):
        meta.pop("generated_at")
    assert meta_runs == meta_one
    # no spill folder is left in the store's staging folder
    staging = study.store_dir / "staging"
    assert not staging.is_dir() or not any(staging.iterdir())


def test_straddling_event_is_one_row_with_all_its_rows(study: Study) -> None:
    wide = read_wide(study, ExportFilters.build(sources="coastal_tows"), run_rows=TINY)
    # one-pass order: by start time; P9 takes its earliest start (May 2019)
    assert list(wide["event_id"]) == ["P1", "P2", "P9", "P3", "P4", "P5", "P7"]
    p9 = wide.set_index("event_id").loc["P9"]
    # density = count / volume filtered, summed over both ingests' rows (arithmetic)
    assert p9["Ostravix keldensis (per m3)"] == pytest.approx(5.0 / 25.0)
    assert p9["Pelagon argentea (per m3)"] == pytest.approx(3.0 / 25.0)
    assert p9["event_start"] == pd.Timestamp("2019-05-01 10:00", tz="UTC")
    assert wide.set_index("event_id").loc["P5", "detected_presence_only"] == "Pelagon argentea"
    one = read_wide(study, ExportFilters.build(sources="coastal_tows"), run_rows=ONE_PASS)
    # any_value() of a repeated event's season tags is not defined: compare those apart
    pd.testing.assert_frame_equal(wide.drop(columns=["season_year", "season"]),
                                  one.drop(columns=["season_year", "season"]))
    assert set(wide.loc[wide["event_id"] != "P9", "season_year"]) == {2018, 2019, 2020, 2021}


def test_read_wide_in_runs_equals_one_pass(study: Study) -> None:
    keep = ExportFilters.build(sources="survey_trawl,volunteer_birds")
    wide = read_wide(study, keep, run_rows=TINY)
    pd.testing.assert_frame_equal(wide, read_wide(study, keep, run_rows=ONE_PASS))
    assert list(wide["event_id"]) == ["T4", "T1", "T2", "T3", "V1", "@V2"]
    assert not set(wide["source_kind"]) & {"effort", "gridded"}   # fishing effort never reaches the matrix


def test_run_rows_from_the_environment(study: Study, monkeypatch: pytest.MonkeyPatch) -> None:
    from harmonize import settings

    # read at the command line's boundary into the run's settings, never by the library itself
    monkeypatch.setenv(RUN_ROWS_ENV, "1")
    assert _runs(study, None) == _runs(study, ONE_PASS) != _runs(study, TINY)
    with settings.applied(settings.from_environment({RUN_ROWS_ENV: "1"})):
        assert _runs(study, None) == _runs(study, TINY)
    with settings.applied(settings.from_environment({RUN_ROWS_ENV: "a few"})):
        with pytest.raises(HarmonizeError, match=RUN_ROWS_ENV):
            _runs(study, None)
    with pytest.raises(HarmonizeError, match="at least 1 row"):
        _runs(study, 0)


def test_safe_cuts_need_ordered_starts_and_no_split_event() -> None:
    t = dt.datetime
    # (source, year, rows, first start, last start, rows without start, ingests)
    groups = [("a", 2000, 5, t(2000, 1, 1), t(2000, 6, 1), 0, ["i"]),
              ("a", 2001, 5, t(2001, 1, 1), t(2001, 6, 1), 0, ["i"]),
              ("a", 2002, 5, t(2001, 6, 1), t(2002, 6, 1), 0, ["i"]),   # a tie with 2001's last start
              ("a", 2003, 5, t(2003, 1, 1), t(2003, 6, 1), 1, ["i"]),   # a row without a start
              ("a", 2004, 5, t(2004, 1, 1), t(2004, 6, 1), 0, ["i"]),
              ("b", 2000, 5, t(2000, 1, 1), t(2000, 6, 1), 0, ["j"])]
    # the last group of a source always ends a stretch: the next source sorts after it
    assert _safe_cuts(groups, {}) == [True, False, True, False, True, True]
    # an event of source a with rows in 2000 and 2002 forbids both cuts between them
    assert _safe_cuts(groups, {"a": [(2000, 2002)]}) == [False, False, True, False, True, True]


def test_memory_limit_and_spill_folder(study: Study, tmp_path: Path) -> None:
    from harmonize import settings

    out = tmp_path / "outputs" / "wide.parquet"
    out.parent.mkdir()
    with open_selection(study, ExportFilters()) as (con, _counts):
        default = con.execute("SELECT current_setting('memory_limit')").fetchall()[0][0]
        with bounded_memory(con, "300MB", beside=out) as spill:
            limit, temp = con.execute(
                "SELECT current_setting('memory_limit'), current_setting('temp_directory')").fetchall()[0]
            assert limit == "286.1 MiB"   # DuckDB shows 300 MB (10^6 bytes) in MiB
            # beside the output, never inside the store
            assert Path(temp) == spill and spill.parent == out.parent and spill.is_dir()
            assert not spill.resolve().is_relative_to(study.store_dir.resolve())
        assert not spill.exists()
        assert con.execute("SELECT current_setting('memory_limit')").fetchall()[0][0] == default
        with bounded_memory(con) as spill:   # no output file (read_wide): a system temporary folder
            assert spill.parent == Path(tempfile.gettempdir())
        with settings.applied(settings.from_environment({MEMORY_LIMIT_ENV: "400MB"})), bounded_memory(con):
            assert con.execute("SELECT current_setting('memory_limit')").fetchall()[0][0] == "381.4 MiB"
    with settings.applied(settings.from_environment({MEMORY_LIMIT_ENV: "lots"})):
        with pytest.raises(HarmonizeError, match=MEMORY_LIMIT_ENV):
            read_wide(study)
