"""Ping tracks carried across file boundaries: one file or many, in any order -> the same store.

A vessel's track delivered as daily (or any time-split) files is one track: the last ping of
one file and the first of the next form an interval, judged by the gap cap, the speed window
and the jump rule as any interval within a file (harmonize.parts, harmonize.tracks). The
expected numbers are computed here by a small numpy reference of the rule, written from its
statement and not from the code: pings sorted per vessel by time, each ping gets half of the
interval to each neighbour capped at max_gap_h / 2 (common practice: a long gap is not
fishing time), a ping fishes when its reported speed lies in [2, 5] knots (Skaar et al. 2011,
ICES J. Mar. Sci. 68:1615-1620), and the grid cell is floor(x / 25 km), floor(y / 25 km) of
the position in EPSG:6933 (pyproj).
"""

from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pyproj
import pytest
from hypothesis import HealthCheck, Phase, given, settings
from hypothesis import strategies as st

from harmonize import load_study, run
from harmonize.disclosure import Disclosure
from harmonize.store import Store
from harmonize.study import Study

GAP_H = 2.0  # the fixture profile's max_gap_h
WINDOW_KN = (2.0, 5.0)  # its speed window for OTB
TO_GRID = pyproj.Transformer.from_crs("EPSG:4326", "EPSG:6933", always_xy=True)
START = pd.Timestamp("2021-05-30T12:00:00Z")  # spring (May) and summer (June) in one track


def _tracks(seed: int, n_vessels: int, n_pings: int, missing_speed: float = 0.0,
            jumps: float = 0.0) -> pd.DataFrame:
    """Random tracks: steps of 5 min to 3 h (some beyond the gap cap), speeds in and out of
    the window, small moves across cell edges; optionally missing speeds and position jumps."""
    rng = np.random.default_rng(seed)
    rows = []
    for v in range(n_vessels):
        t = START + pd.Timedelta(minutes=int(rng.integers(0, 300)))
        lat, lon = 42.8 + 0.3 * rng.random(), -152.4 + 0.6 * rng.random()
        for _ in range(int(rng.integers(1, n_pings + 1))):
            sog = float(rng.choice([1.0, 3.0, 4.5, 7.0]))
            jump = rng.random() < jumps
            rows.append((f"V-{v}", t, round(lat + (0.5 if jump else 0.0), 5), round(lon, 5),
                         np.nan if rng.random() < missing_speed else sog, "OTB"))
            t += pd.Timedelta(minutes=int(rng.choice([5, 20, 45, 90, 150, 180])))
            lat += float(rng.normal(0, 0.002))  # at most ~10 kn over 5 min: no position jump
            lon += float(rng.normal(0, 0.004))
    return pd.DataFrame(rows, columns=["vessel", "time", "lat", "lon", "sog", "gear"])


def reference(pings: pd.DataFrame) -> pd.DataFrame:
    """Fishing hours, pings and distinct vessels per cell-period, by the rule in the module docstring."""
    out = []
    for vessel, g in pings.sort_values(["vessel", "time"]).groupby("vessel"):
        t = (g["time"] - START).dt.total_seconds().to_numpy() / 3600.0
        half = np.minimum(np.diff(t), GAP_H) / 2
        hours = np.zeros(len(t))
        hours[1:] += half
        hours[:-1] += half
        sog = g["sog"].to_numpy(float)
        fishing = (sog >= WINDOW_KN[0]) & (sog <= WINDOW_KN[1]) & (hours > 0)
        x, y = TO_GRID.transform(g["lon"].to_numpy(float), g["lat"].to_numpy(float))
        ix, iy = np.floor(x / 25_000).astype(int), np.floor(y / 25_000).astype(int)
        season = np.where(g["time"].dt.month.to_numpy() <= 5, "spring", "summer")
        for k in np.flatnonzero(fishing):
            out.append((f"OTB/x{ix[k]}_y{iy[k]}/2021-{season[k]}/near_bottom", vessel, hours[k]))
    frame = pd.DataFrame(out, columns=["event_id", "vessel", "hours"]).astype({"hours": float})
    return frame.groupby("event_id").agg(value=("hours", "sum"), n_values=("hours", "size"),
                                         n_vessels=("vessel", "nunique")).sort_index()


def _write(pings: pd.DataFrame, path: Path) -> None:
    frame = pings.assign(time_utc=pings["time"].dt.strftime("%Y-%m-%dT%H:%M:%SZ"),
                         sog=pings["sog"].map(lambda s: "" if np.isnan(s) else repr(float(s))))
    frame[["vessel", "time_utc", "lat", "lon", "sog", "gear"]].to_csv(path, index=False)


def _ingest(study_dir: Path, name: str, files: list[pd.DataFrame], order: list[int]) -> Study:
    target = study_dir.parent / name
    shutil.rmtree(target, ignore_errors=True)
    shutil.copytree(study_dir, target, ignore=shutil.ignore_patterns("store"))
    study = load_study(target)
    for k in order:
        path = target / f"pings_{k:03d}.csv"
        _write(files[k], path)
        run(study, "effort_pings", {"rows": path})
    return study


def _view(study: Study) -> pd.DataFrame:
    with Store(study.store_dir).connect() as con:
        return con.execute("""SELECT event_id, value, effort, n_values, n_vessels FROM observations
                              WHERE source_kind = 'effort' ORDER BY event_id""").df().set_index("event_id")


def _withheld(study: Study) -> set[str]:
    """Event ids the rule of three withholds (harmonize.disclosure, the exports' rule)."""
    rules = Disclosure(min_vessels=3)
    with Store(study.store_dir).connect() as con:
        rows = con.execute(f"SELECT event_id FROM observations WHERE {rules.confidential_sql()}").fetchall()
    return {r[0] for r in rows}


def _split(pings: pd.DataFrame, rng: np.random.Generator, cuts: int, by_vessel: bool) -> list[pd.DataFrame]:
    """Files cut at random instants (every vessel cut at the same ones), optionally also by
    vessel group, each with its rows shuffled."""
    span = (pings["time"].max() - pings["time"].min()).total_seconds()
    at = sorted(pings["time"].min() + pd.to_timedelta(rng.random(cuts) * span, unit="s"))
    part = np.searchsorted(np.asarray([a.tz_localize(None) for a in at], dtype="datetime64[ns]"),
                           pings["time"].dt.tz_localize(None).to_numpy("datetime64[ns]"), side="right")
    if by_vessel:
        group = {v: int(rng.integers(0, 2)) for v in pings["vessel"].unique()}
        part = part * 2 + pings["vessel"].map(group).to_numpy()
    files = [pings[part == k] for k in np.unique(part)]
    return [f.sample(frac=1.0, random_state=int(rng.integers(0, 2**31))) for f in files]


def _assert_same(got: pd.DataFrame, want: pd.DataFrame) -> None:
    assert list(got.index) == list(want.index)
    np.testing.assert_allclose(got["value"], want["value"], rtol=0, atol=1e-9)
    assert got["n_values"].tolist() == want["n_values"].tolist()
    assert got["n_vessels"].tolist() == want["n_vessels"].tolist()


@pytest.mark.slow
@settings(max_examples=8, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture],
          phases=[Phase.explicit, Phase.reuse, Phase.generate])
@given(seed=st.integers(0, 100_000), n_vessels=st.integers(1, 4), n_pings=st.integers(1, 25),
       cuts=st.integers(1, 4), by_vessel=st.booleans())
def test_time_split_files_in_any_order_give_the_reference_hours(study_dir: Path, seed: int, n_vessels: int,
                                                                n_pings: int, cuts: int, by_vessel: bool) -> None:
    """1 file, or N files cut by time (and by vessel) with shuffled rows ingested in shuffled
    order: the same hours, pings and vessels per cell-period as the numpy reference."""
    pings = _tracks(seed, n_vessels, n_pings)
    want = reference(pings)
    rng = np.random.default_rng(seed + 1)
    one = _view(_ingest(study_dir, f"one-{seed}", [pings], [0]))
    files = _split(pings, rng, cuts, by_vessel)
    many = _ingest(study_dir, f"many-{seed}", files, list(rng.permutation(len(files))))
    got = _view(many)
    _assert_same(one, want)
    _assert_same(got, want)
    np.testing.assert_allclose(got["effort"], want["value"], rtol=0, atol=1e-9)
    assert _withheld(many) == {e for e, n in want["n_vessels"].items() if n < 3}


@pytest.mark.slow
@settings(max_examples=5, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture],
          phases=[Phase.explicit, Phase.reuse, Phase.generate])
@given(seed=st.integers(0, 100_000), cuts=st.integers(1, 5))
def test_derived_speeds_and_jumps_across_files_match_one_file(study_dir: Path, seed: int, cuts: int) -> None:
    """Missing speeds (derived from the neighbours) and position jumps (skipped) near file
    edges: the split store equals the one-file store, whose track rules other tests check."""
    pings = _tracks(seed, 3, 30, missing_speed=0.3, jumps=0.05)
    rng = np.random.default_rng(seed + 7)
    one = _view(_ingest(study_dir, f"one-{seed}", [pings], [0]))
    files = _split(pings, rng, cuts, by_vessel=False)
    many = _view(_ingest(study_dir, f"many-{seed}", files, list(rng.permutation(len(files)))))
    assert len(one) > 0
    _assert_same(many, one)


def test_daily_files_replace_and_reingest_do_not_double_count(study_dir: Path) -> None:
    """Two days of one vessel in two files; the second replaced by a changed file and then by
    the original again, and the first re-ingested unchanged: the numbers of the one-file track."""
    rows = [("V-1", START + pd.Timedelta(hours=h), 42.9, -152.0 + 0.002 * h, 3.0, "OTB") for h in range(0, 48, 1)]
    pings = pd.DataFrame(rows, columns=["vessel", "time", "lat", "lon", "sog", "gear"])
    want = reference(pings)
    # 48 pings 1 h apart: 47 intervals of 1 h, every ping fishing (hand arithmetic: 47 h)
    assert want["value"].sum() == pytest.approx(47.0, abs=1e-12)
    day1, day2 = pings.iloc[:24], pings.iloc[24:]
    study = _ingest(study_dir, "daily", [day1, day2], [1, 0])
    _assert_same(_view(study), want)
    path = study.root / "pings_001.csv"
    _write(day2.iloc[:10], path)  # a shorter delivery of day 2
    run(study, "effort_pings", {"rows": path}, replace=True)
    assert _view(study)["value"].sum() == pytest.approx(24 - 1 + 1 + 9, abs=1e-9)  # 23 h + the bridge + 9 h
    _write(day2, path)
    run(study, "effort_pings", {"rows": path}, replace=True)
    assert run(study, "effort_pings", {"rows": study.root / "pings_000.csv"}).status == "unchanged"
    _assert_same(_view(study), want)
    assert Store(study.store_dir).check() == []


def test_a_jump_at_the_start_of_a_file_is_quarantined_with_its_message(study_dir: Path) -> None:
    """The first ping of a vessel 66 km from the next, 10 min before it: a bad fix, named as such."""
    rows = [("V-1", START + pd.Timedelta(minutes=10 * k), 43.5 if k == 0 else 42.9, -152.0 + 0.001 * k, 3.0, "OTB")
            for k in range(4)]
    study = load_study(study_dir)
    _write(pd.DataFrame(rows, columns=["vessel", "time", "lat", "lon", "sog", "gear"]), study_dir / "jump.csv")
    result = run(study, "effort_pings", {"rows": study_dir / "jump.csv"}, write=False)
    q = result.quarantine
    assert q["source_row"].tolist() == [1] and q["reason_code"].tolist() == ["implausible_speed"]
    assert q["message"].iloc[0].startswith("position jump: the first ping of the vessel in this file, leaving it "
                                           "for row 2 takes")


def test_files_that_overlap_in_time_are_named_in_the_ingest_notes(study_dir: Path) -> None:
    """Two exports of the same hours of one vessel (every other ping in each): not a cut by
    time, so the ingest says their tracks are joined only at the files' edges."""
    rows = [("V-1", START + pd.Timedelta(minutes=20 * k), 42.9, -152.0 + 0.001 * k, 3.0, "OTB") for k in range(20)]
    pings = pd.DataFrame(rows, columns=["vessel", "time", "lat", "lon", "sog", "gear"])
    study = load_study(study_dir)
    _write(pings.iloc[0::2], study_dir / "even.csv")
    _write(pings.iloc[1::2], study_dir / "odd.csv")
    first = run(study, "effort_pings", {"rows": study_dir / "even.csv"})
    assert not any("joined only at the files' edges" in n for n in first.notes)
    second = run(study, "effort_pings", {"rows": study_dir / "odd.csv"})
    assert ("1 vessel of this file also has pings within the same hours in even.csv: such tracks are joined "
            "only at the files' edges") in " ".join(second.notes)


def test_an_ingest_reads_its_ping_file_once_for_the_hash(study_dir: Path) -> None:
    """The sha256 of the input is taken once per ingest (it was taken twice), and a file
    changed between two ingests is hashed afresh (its digest is not remembered across runs)."""
    from unittest import mock

    import harmonize.files as files

    rows = [("V-1", START + pd.Timedelta(minutes=20 * k), 42.9, -152.0, 3.0, "OTB") for k in range(5)]
    pings = pd.DataFrame(rows, columns=["vessel", "time", "lat", "lon", "sog", "gear"])
    _write(pings, study_dir / "p.csv")
    study = load_study(study_dir)
    with mock.patch.object(files, "_sha256", side_effect=files._sha256) as spy:
        run(study, "effort_pings", {"rows": study_dir / "p.csv"})
        assert [c.args[0] for c in spy.call_args_list].count(study_dir / "p.csv") == 1
        _write(pings.iloc[:4], study_dir / "p.csv")
        result = run(study, "effort_pings", {"rows": study_dir / "p.csv"}, replace=True)
    assert result.status == "complete" and result.rows_read == 4
