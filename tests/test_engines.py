"""The Dask engine gives the same results as the DuckDB engine on the same data.

A ``dask.distributed.LocalCluster`` of two worker threads in this process, listening on the
loopback interface only, stands in for a cluster; the steps reach it by its scheduler
address, as they would reach a remote one. The reference is the DuckDB path of the same
library, which the rest of the suite checks against outside sources (GeographicLib, pyproj,
hand-worked tracks).
"""

from __future__ import annotations

import shutil
from collections.abc import Iterator
from pathlib import Path

import distributed
import numpy as np
import pandas as pd
import pytest
from audit_stores import build_known_gaps
from factories import messy_ping_text
from store_content import assert_same_fishing_store, store_tables

from harmonize import load_study, run
from harmonize.audit.run import audit
from harmonize.engines import EngineChoice, check_engine, current_engine, engine_scope
from harmonize.errors import HarmonizeError
from harmonize.geodesy import distance_m
from harmonize.privacy import study_salt

pytestmark = pytest.mark.dask

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"


@pytest.fixture(scope="module")
def scheduler() -> Iterator[str]:
    cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False, protocol="tcp",
                                       host="127.0.0.1", dashboard_address=None)
    try:
        assert cluster.scheduler_address.startswith("tcp://127.0.0.1:")
        yield cluster.scheduler_address
    finally:
        cluster.close()


def _task_prefixes(scheduler: str) -> set[str]:
    """Names of the kinds of task the cluster's scheduler has seen."""
    with distributed.Client(scheduler) as client:
        return set(client.run_on_scheduler(lambda dask_scheduler: list(dask_scheduler.task_prefixes)))


def _messy_pings(path: Path, seed: int = 4) -> None:
    """Simulated tracks of 8 vessels with the problems real ping files have.

    Missing speeds (derived from positions), isolated position jumps (skipped), exact and
    conflicting duplicates, an out-of-sequence time, an unknown gear and a ping outside
    the domain: every branch of the track rules is taken.
    """
    rng = np.random.default_rng(seed)
    df, jumps = messy_ping_text(rng, 8, 300, "2021-05-20", ("OTB", "OTB", "TBB", "OTM", "OTB", "DRB", "OTB", "TBB"))
    df.loc[jumps[:3] + 1, "lat"] = (df.loc[jumps[:3] + 1, "lat"].astype(float) + 0.4).round(5).astype(str)
    df.loc[5, "gear"] = "XYZ"
    df.loc[7, "lat"] = "10.0"
    df.loc[40, "time_utc"] = "2021-05-01T00:00:00Z"
    extra = df.iloc[[100, 101]].copy()
    extra.iloc[1, extra.columns.get_loc("sog")] = "9.9"
    df = pd.concat([df.iloc[:200], extra, df.iloc[200:]], ignore_index=True)
    df.to_csv(path, index=False)


def _ingest_both(study_dir: Path, tmp_path: Path, files: list[Path], scheduler: str) -> tuple[Path, Path]:
    """Ingest the same ping files into two copies of the study, one per engine."""
    study_salt(study_dir)  # both copies hash vessel ids with the same salt
    dirs = []
    for engine in ("duckdb", "dask"):
        target = tmp_path / engine
        shutil.copytree(study_dir, target)
        study = load_study(target)
        for f in files:
            result = run(study, "effort_pings", {"rows": f}, engine=engine,
                         scheduler=scheduler if engine == "dask" else None)
            assert result.status == "complete"
            assert result.rows_read == result.rows_accepted + result.rows_quarantined
        dirs.append(target)
    return dirs[0], dirs[1]


def test_ping_tracks_on_dask_equal_duckdb(study_dir: Path, tmp_path: Path, scheduler: str) -> None:
    messy = tmp_path / "pings_messy.csv"
    _messy_pings(messy)
    hand = tmp_path / "pings_hand.csv"
    shutil.copy(FIXTURES / "effort" / "pings_hand.csv", hand)
    on_duckdb, on_dask = _ingest_both(study_dir, tmp_path, [messy, hand], scheduler)
    assert "bucket" in _task_prefixes(scheduler)  # the track step did run on the cluster (task _bucket)
    a, b = store_tables(on_duckdb), store_tables(on_dask)
    assert_same_fishing_store(a, b)
    # the messy file exercised the rules the engines must agree on
    reasons = set(a["quarantine"]["reason_code"])
    assert {"implausible_speed", "duplicate_record", "outside_domain"} <= reasons
    assert a["observations"]["flags"].map(lambda f: "speed_derived" in list(f)).any()


def test_audit_on_dask_equals_duckdb(study_dir: Path, tmp_path: Path, scheduler: str) -> None:
    study = load_study(study_dir)
    build_known_gaps(study)
    shutil.copy(FIXTURES / "effort" / "pings_hand.csv", study_dir / "pings_hand.csv")
    run(study, "effort_pings", {"rows": study_dir / "pings_hand.csv"})
    on_duckdb = audit(study)
    on_dask = audit(study, engine="dask", scheduler=scheduler)
    assert "file_partials" in _task_prefixes(scheduler)
    for name in ("extent", "coverage", "layer_events", "stratum_events", "source_years", "bio_providers",
                 "encounters", "comparisons", "cell_maps", "suppressed"):
        a, b = getattr(on_duckdb.metrics, name), getattr(on_dask.metrics, name)
        assert len(a) > 0 or name == "suppressed", name
        pd.testing.assert_frame_equal(a.reset_index(drop=True), b.reset_index(drop=True), check_dtype=False,
                                      rtol=1e-12, obj=name)
    # the same findings, with the same messages; numbers in the details to the last bits
    # of a mean (another summation order)
    found_a, found_b = [f.to_dict() for f in on_duckdb.findings], [f.to_dict() for f in on_dask.findings]
    assert [{k: v for k, v in f.items() if k != "details"} for f in found_a] == \
        [{k: v for k, v in f.items() if k != "details"} for f in found_b]
    assert {f["code"] for f in found_a} >= {"source_disagreement", "no_samples", "coverage_drop"}
    for fa, fb in zip(found_a, found_b, strict=True):
        da, db = fa.get("details") or {}, fb.get("details") or {}
        assert da.keys() == db.keys()
        for key, value in da.items():
            if isinstance(value, float):
                assert value == pytest.approx(db[key], rel=1e-12), key
            else:
                assert value == db[key], key
    # what the next audit compares with (audit --since) is the same on both engines
    assert on_duckdb.basis == on_dask.basis
    # incomplete periods and effort totals: from the event pass on DuckDB, from their own queries on Dask
    pd.testing.assert_frame_equal(on_duckdb.metrics.periods, on_dask.metrics.periods, obj="periods")
    pd.testing.assert_frame_equal(on_duckdb.received.effort, on_dask.received.effort, check_dtype=False,
                                  rtol=1e-12, obj="effort")
    # the store's probable_duplicate row is left out by both (the known-gaps store has one)
    assert on_duckdb.metrics.encounters["records"].sum() == on_dask.metrics.encounters["records"].sum()
    # an annual audit too
    year = int(on_duckdb.coverage["season_year"].max())
    pd.testing.assert_frame_equal(audit(study, year).coverage,
                                  audit(study, year, engine="dask", scheduler=scheduler).coverage,
                                  check_dtype=False)


def test_distance_formula_matches_geographiclib() -> None:
    # The ping distance formula (ellipsoid radii of curvature at the mean latitude) against
    # the geodesic of Karney 2013 (GeographicLib), for steps of the size pings are apart.
    from geographiclib.geodesic import Geodesic

    lat1 = np.array([42.9, 45.0, 10.0, -60.0, 43.1])
    lon1 = np.array([-152.2, -150.0, 179.99, 20.0, -148.5])
    lat2 = lat1 + np.array([0.01, -0.02, 0.005, 0.03, 0.0])
    lon2 = np.array([-152.19, -149.97, -179.99, 20.05, -148.45])
    ref = [Geodesic.WGS84.Inverse(a, b, c, d)["s12"] for a, b, c, d in zip(lat1, lon1, lat2, lon2, strict=True)]
    np.testing.assert_allclose(distance_m(lat1, lon1, lat2, lon2), ref, rtol=1e-5)


def test_engine_choice_and_errors(monkeypatch: pytest.MonkeyPatch) -> None:
    from harmonize import settings

    assert current_engine().name == "duckdb"
    # the library reads no environment variable: only the run's settings choose the engine
    monkeypatch.setenv("HARMONIZE_ENGINE", "dask")
    assert current_engine().name == "duckdb"
    with settings.applied(settings.from_environment({"HARMONIZE_ENGINE": "dask",
                                                     "HARMONIZE_DASK_SCHEDULER": "tcp://h:8786"})):
        assert current_engine() == EngineChoice("dask", "tcp://h:8786")
        with engine_scope("duckdb"):
            assert current_engine().name == "duckdb"
    assert current_engine().name == "duckdb"
    with pytest.raises(HarmonizeError, match="unknown engine 'spark'; choose one of duckdb, dask"):
        check_engine("spark")


@pytest.mark.subprocess
def test_cli_engine_option(study_dir: Path) -> None:
    import subprocess
    import sys

    shutil.copy(FIXTURES / "effort" / "pings_hand.csv", study_dir / "pings_hand.csv")
    harmonize = str(Path(sys.executable).parent / "harmonize")
    cmd = [harmonize, "--study", str(study_dir), "ingest", "effort_pings", str(study_dir / "pings_hand.csv")]
    bad = subprocess.run([*cmd, "--engine", "spark"], capture_output=True, text=True)
    assert bad.returncode == 2
    assert "Invalid value for '--engine': 'spark' is not one of 'duckdb', 'dask'." in bad.stderr
    good = subprocess.run([*cmd, "--engine", "dask"], capture_output=True, text=True)
    assert good.returncode == 0, good.stderr
    audit_run = subprocess.run([harmonize, "--study", str(study_dir), "audit", "--engine", "dask"],
                               capture_output=True, text=True)
    assert audit_run.returncode == 0, audit_run.stderr
    assert "coverage of" in audit_run.stdout


def test_scratch_folder_must_exist(tmp_path: Path) -> None:
    from harmonize import settings
    from harmonize.engines import scratch_parent

    with settings.applied(settings.from_environment({"HARMONIZE_DASK_SCRATCH": str(tmp_path / "missing")})):
        with pytest.raises(HarmonizeError, match="HARMONIZE_DASK_SCRATCH=.*missing is not an existing folder"):
            scratch_parent()
    with settings.applied(settings.Settings(dask_scratch=str(tmp_path))):
        assert scratch_parent() == str(tmp_path)
    assert scratch_parent() is None


def test_ping_files_cut_by_time_on_dask_equal_one_file_on_duckdb(study_dir: Path, tmp_path: Path,
                                                                  scheduler: str) -> None:
    """The edges of the files the Dask engine writes join into the same tracks (harmonize.parts)."""
    messy = tmp_path / "pings_messy.csv"
    _messy_pings(messy)
    frame = pd.read_csv(messy, dtype=str, keep_default_na=False)
    day = frame["time_utc"].str[:10]
    cuts = sorted(day.unique())
    parts = []
    for k, chunk in enumerate((cuts[: len(cuts) // 3], cuts[len(cuts) // 3: 2 * len(cuts) // 3],
                               cuts[2 * len(cuts) // 3:])):
        path = tmp_path / f"part{k}.csv"
        frame[day.isin(chunk)].to_csv(path, index=False)
        parts.append(path)
    study_salt(study_dir)
    one, split = tmp_path / "one", tmp_path / "split"
    shutil.copytree(study_dir, one)
    shutil.copytree(study_dir, split)
    run(load_study(one), "effort_pings", {"rows": messy})
    for path in reversed(parts):
        run(load_study(split), "effort_pings", {"rows": path}, engine="dask", scheduler=scheduler)
    cols = ["event_id", "value", "n_vessels", "n_values"]
    a = store_tables(one)["observations"][cols].sort_values("event_id").reset_index(drop=True)
    b = store_tables(split)["observations"][cols].sort_values("event_id").reset_index(drop=True)
    assert len(a) > 20
    pd.testing.assert_frame_equal(a[["event_id", "n_vessels", "n_values"]], b[["event_id", "n_vessels", "n_values"]])
    np.testing.assert_allclose(b["value"], a["value"], rtol=0, atol=1e-9)
