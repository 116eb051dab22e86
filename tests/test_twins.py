"""Cross-source twins: windows checked with geographiclib, order independence, the primary rule."""

from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from geographiclib.geodesic import Geodesic

from harmonize import Store, load_study, run
from harmonize.study import Study
from harmonize.twins import local_distance_km, volunteer_only
from tests.factories import store_frames

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
PROFILE = "opportunistic_volunteer"
HEADER = ("sighting_id,list_id,obs_time,latitude,longitude,observer_name,species,how_many,all_reported,"
          "minutes_watched,km_travelled\n")
AGENCY = (43.5, -152.0)  # an agency seabird sighting, inside the fixture domain


def _at(distance_m: float, azimuth: float = 60.0) -> tuple[float, float]:
    """The point ``distance_m`` from the agency sighting along a WGS84 geodesic (Karney 2013)."""
    g = Geodesic.WGS84.Direct(AGENCY[0], AGENCY[1], azimuth, distance_m)
    return g["lat2"], g["lon2"]


def _agency(study: Study, time: str = "2022-11-05T08:00", taxon: str = "Procellix keldica", count: float = 4.0) -> None:
    events = pd.DataFrame({"event_id": ["T1"], "event_start": [time], "event_end": [pd.Timestamp(time) + pd.Timedelta(minutes=10)],
                           "lat": [AGENCY[0]], "lon": [AGENCY[1]], "depth_min_m": [0.0], "depth_max_m": [0.0]})
    values = pd.DataFrame({"event_id": ["T1"], "variable": [taxon], "value": [count]})
    store_frames(study, events, values, source_id="keldmar_ship_survey", kind="transect", protocol=None)


def _volunteers(study_dir: Path, rows: list[str], name: str = "vol.csv") -> Path:
    path = study_dir / name
    path.write_text(HEADER + "".join(r + "\n" for r in rows))
    return path


def _flagged(study: Study) -> dict[str, bool]:
    with Store(study.store_dir).connect() as con:
        rows = con.execute("""SELECT coalesce(nullif(split_part(source_file, '.', 1), ''), source_id) || ':' || event_id,
                                     list_contains(flags, 'probable_duplicate')
                              FROM observations WHERE NOT zero_filled""").fetchall()
    return dict(rows)


def _twins(study: Study) -> pd.DataFrame:
    with Store(study.store_dir).connect() as con:
        return con.execute("SELECT * FROM twins ORDER BY source_id, distance_km").df()


# --------------------------------------------------------------------------- distance
@pytest.mark.parametrize("lat", [0.0, 43.5, 62.0, 78.0])
@pytest.mark.parametrize("azimuth", [0.0, 33.0, 90.0, 151.0])
@pytest.mark.parametrize("distance_m", [150.0, 2000.0, 9000.0])
def test_local_distance_matches_the_geodesic(lat: float, azimuth: float, distance_m: float) -> None:
    # Karney 2013, "Algorithms for geodesics", J. Geodesy 87:43-55 (GeographicLib)
    g = Geodesic.WGS84.Direct(lat, -151.0, azimuth, distance_m)
    got = local_distance_km(np.array([-151.0]), np.array([lat]), np.array([g["lon2"]]), np.array([g["lat2"]]))[0]
    assert got * 1000 == pytest.approx(distance_m, rel=2e-5)


def test_local_distance_across_the_antimeridian() -> None:
    g = Geodesic.WGS84.Inverse(10.0, 179.99, 10.0, -179.99)
    got = local_distance_km(np.array([179.99]), np.array([10.0]), np.array([-179.99]), np.array([10.0]))[0]
    assert got * 1000 == pytest.approx(g["s12"], rel=1e-6)


# --------------------------------------------------------------------------- windows
@pytest.mark.parametrize(("distance_m", "azimuth", "clock", "taxon", "twin"), [
    # the fast lane runs each edge from one side of it; make test runs both sides
    (1980.0, 60.0, "08:30", "keld fulmar", True),    # 1.98 km, 20 min after the agency event
    (2020.0, 200.0, "08:30", "keld fulmar", False),  # 2.02 km
    pytest.param(1980.0, 300.0, "09:09", "keld fulmar", True, marks=pytest.mark.slow),  # 59 min after the agency event's end (08:10)
    (1980.0, 300.0, "09:11", "keld fulmar", False),  # 61 min after
    pytest.param(1980.0, 60.0, "07:05", "keld fulmar", True, marks=pytest.mark.slow),   # 55 min before its start
    (300.0, 60.0, "08:30", "pale gull", False),      # another taxon
])
def test_window_edges_measured_with_geographiclib(study_dir: Path, distance_m: float, azimuth: float,
                                                  clock: str, taxon: str, twin: bool) -> None:
    study = load_study(study_dir)
    _agency(study)
    lat, lon = _at(distance_m, azimuth)
    run(study, PROFILE, {"rows": _volunteers(study_dir, [f"A,,2022-11-05T{clock},{lat:.8f},{lon:.8f},Ann Vell,{taxon},2,,,"])})
    twins = _twins(study)
    with Store(study.store_dir).connect() as con:
        flags = con.execute("SELECT source_id, flags FROM observations ORDER BY source_id").fetchall()
    # the agency record is always kept unflagged
    assert flags == [("keldmar_seawatch", ["probable_duplicate"] if twin else []), ("keldmar_ship_survey", [])]
    if twin:
        assert twins[["source_id", "twin_source_id", "variable"]].values.tolist() == [
            ["keldmar_seawatch", "keldmar_ship_survey", "Procellix keldica"]]
        assert twins["distance_km"].iloc[0] == pytest.approx(distance_m / 1000, abs=1e-4)
    else:
        assert twins.empty


def test_profile_windows_are_used(study_dir: Path) -> None:
    profile = study_dir / "profiles" / f"{PROFILE}.toml"
    profile.write_text(profile.read_text().replace("distance_km = 2.0", "distance_km = 0.5")
                       .replace("minutes = 60", "minutes = 15"))
    study = load_study(study_dir)
    _agency(study)
    near, far = _at(450.0), _at(1200.0)
    rows = [f"A,,2022-11-05T08:20,{near[0]:.7f},{near[1]:.7f},Ann Vell,keld fulmar,2,,,",
            f"B,,2022-11-05T08:20,{far[0]:.7f},{far[1]:.7f},Bo Tarrin,keld fulmar,2,,,",
            f"C,,2022-11-05T08:40,{near[0]:.7f},{near[1]:.7f},Cal Dunmore,keld fulmar,2,,,"]
    run(study, PROFILE, {"rows": _volunteers(study_dir, rows)})
    assert _twins(study)["distance_km"].round(2).tolist() == [0.45]


def test_agency_ingested_after_the_volunteers_gives_the_same_twins(study_dir: Path, tmp_path: Path) -> None:
    point = _at(800.0)
    rows = [f"A,,2022-11-05T08:05,{point[0]:.7f},{point[1]:.7f},Ann Vell,keld fulmar,2,,,"]
    results = []
    for order in ("agency_first", "volunteers_first"):
        folder = tmp_path / order
        shutil.copytree(study_dir, folder)
        study = load_study(folder)
        if order == "agency_first":
            _agency(study)
            run(study, PROFILE, {"rows": _volunteers(folder, rows)})
        else:
            run(study, PROFILE, {"rows": _volunteers(folder, rows)})
            _agency(study)
        twins = _twins(study)
        results.append(twins[["source_id", "twin_source_id", "variable", "distance_km", "minutes"]])
        assert len(twins) == 1 and Store(study.store_dir).check() == []
    pd.testing.assert_frame_equal(results[0], results[1])


# --------------------------------------------------------------------------- the primary rule
def test_shared_checklists_and_consecutive_checklists(study_dir: Path) -> None:
    study = load_study(study_dir)
    rows = [
        # two observers of one party submit the same watch: the second is a twin
        "a1,P1,2022-11-05T08:00,43.5,-152.0,Ann Vell,keld fulmar,5,true,60,0",
        "b1,P2,2022-11-05T08:00,43.5,-152.0,Bo Tarrin,keld fulmar,5,true,60,0",
        # Ann's next hour at the same spot is new effort, not a duplicate of her first list
        "a2,P3,2022-11-05T09:00,43.5,-152.0,Ann Vell,keld fulmar,3,true,60,0",
    ]
    run(study, PROFILE, {"rows": _volunteers(study_dir, rows)})
    flagged = _flagged(study)
    assert flagged == {"vol:P1": False, "vol:P2": True, "vol:P3": False}
    # a counted record is kept before a presence-only one, whatever the order
    rows = ["c1,,2022-11-05T08:05,43.5001,-152.0,Cal Dunmore,keld fulmar,noted,,,"]
    run(study, PROFILE, {"rows": _volunteers(study_dir, rows, "incidental.csv")})
    twins = _twins(study)
    assert len(twins) == 2 and not _flagged(study)["vol:P1"]


def test_rank_in_the_profile_changes_the_primary(study_dir: Path) -> None:
    study = load_study(study_dir)
    app = _volunteers(study_dir, ["a1,,2022-11-05T08:00,43.5,-152.0,Ann Vell,keld fulmar,2,,,"], "app.csv")
    run(study, PROFILE, {"rows": app})
    # a second volunteer scheme reports the same bird later: by default it yields (later record)
    scheme = study_dir / "profiles" / "scheme.toml"
    scheme.write_text((study_dir / "profiles" / f"{PROFILE}.toml").read_text().replace("keldmar_seawatch", "keldmar_scheme"))
    late = _volunteers(study_dir, ["s1,,2022-11-05T08:10,43.501,-152.0,Bo Tarrin,keld fulmar,2,,,"], "scheme.csv")
    run(study, "scheme", {"rows": late})
    assert _flagged(study) == {"app:" + _event(study, "app.csv"): False, "scheme:" + _event(study, "scheme.csv"): True}
    # the user ranks the vetted scheme first: now the app's record is the duplicate
    scheme.write_text(scheme.read_text() + "rank = 1\n")
    run(study, "scheme", {"rows": late}, replace=True)
    assert _flagged(study) == {"app:" + _event(study, "app.csv"): True, "scheme:" + _event(study, "scheme.csv"): False}
    twins = _twins(study)
    assert twins[["source_id", "twin_source_id"]].values.tolist() == [["keldmar_seawatch", "keldmar_scheme"]]


def _event(study: Study, file_name: str) -> str:
    with Store(study.store_dir).connect() as con:
        return con.execute("SELECT DISTINCT event_id FROM observations WHERE source_file = ?", [file_name]).fetchall()[0][0]


def test_resubmitted_checklist_in_a_second_file_is_a_twin(study_dir: Path) -> None:
    study = load_study(study_dir)
    row = "a1,L1,2022-11-05T08:00,43.5,-152.0,Ann Vell,keld fulmar,5,true,60,0"
    run(study, PROFILE, {"rows": _volunteers(study_dir, [row], "week1.csv")})
    run(study, PROFILE, {"rows": _volunteers(study_dir, [row, row.replace("a1", "a9").replace("L1", "L9").replace("08:00", "14:00")], "week2.csv")})
    with Store(study.store_dir).connect() as con:
        dup = con.execute("""SELECT source_file, event_id FROM observations
                             WHERE list_contains(flags, 'probable_duplicate')""").fetchall()
    assert dup == [("week2.csv", "L1")]


def test_high_counts_are_flagged_not_rejected(study_dir: Path) -> None:
    study = load_study(study_dir)
    rng = np.random.default_rng(4)
    n = 30
    lat = 42.2 + np.arange(n) * 0.09  # >= 10 km apart: no twins among them
    events = pd.DataFrame({"event_id": [f"T{i}" for i in range(n)], "lat": lat, "lon": -153.0,
                           "event_start": pd.Timestamp("2022-06-01") + pd.to_timedelta(np.arange(n), unit="D")})
    values = pd.DataFrame({"event_id": events["event_id"], "variable": "Larivox pallens",
                           "value": rng.integers(1, 9, n).astype(float)})
    store_frames(study, events, values, source_id="keldmar_ship_survey", kind="transect")
    rows = ["a1,L1,2022-11-05T08:00,44.9,-150.2,Ann Vell,pale gull,5000,true,60,0",
            "b1,L2,2022-11-06T08:00,44.9,-150.2,Ann Vell,pale gull,6,true,60,0"]
    result = run(study, PROFILE, {"rows": _volunteers(study_dir, rows)})
    assert result.rows_quarantined == 0
    with Store(study.store_dir).connect() as con:
        flags = dict(con.execute("""SELECT event_id, list_contains(flags, 'high_count') FROM observations
                                    WHERE source_id = 'keldmar_seawatch' AND variable = 'Larivox pallens'""").fetchall())
    assert flags == {"L1": True, "L2": False}


def test_replace_refreshes_the_twins(study_dir: Path) -> None:
    study = load_study(study_dir)
    _agency(study)
    path = _volunteers(study_dir, ["a1,,2022-11-05T08:05,43.501,-152.0,Ann Vell,keld fulmar,2,,,"])
    run(study, PROFILE, {"rows": path})
    assert len(_twins(study)) == 1
    path.write_text(path.read_text().replace("2022-11-05T08:05", "2022-11-07T08:05"))
    run(study, PROFILE, {"rows": path}, replace=True)
    assert _twins(study).empty
    assert not any(_flagged(study).values())


def test_volunteer_only_strata_and_seasons(study_dir: Path) -> None:
    study = load_study(study_dir)
    _agency(study, time="2022-11-05T08:00")
    run(study, PROFILE, {"rows": _volunteers(study_dir, [
        "a1,,2022-11-05T08:05,43.51,-152.0,Ann Vell,keld fulmar,2,,,",
        "a2,,2023-02-05T08:05,43.51,-152.0,Ann Vell,keld fulmar,2,,,"])})
    with Store(study.store_dir).connect() as con:
        only = volunteer_only(con)
    # autumn 2022 has the agency survey; winter 2023 only the volunteer
    assert only[["season_year", "season", "volunteer_events"]].values.tolist() == [[2023, "winter", 1]]


# --------------------------------------------------------------------------- end to end
def test_agency_transects_and_overlapping_volunteers_end_to_end(study_dir: Path) -> None:
    for f in ("segments_messy.csv", "birds_messy.csv"):
        shutil.copy(FIXTURES / "transect" / f, study_dir)
    shutil.copy(FIXTURES / "opportunistic" / "volunteer_near_transect.csv", study_dir)
    study = load_study(study_dir)
    vol = run(study, PROFILE, {"rows": study_dir / "volunteer_near_transect.csv"})
    assert vol.rows_read == vol.rows_accepted + vol.rows_quarantined == 6
    run(study, "transect_agency", {"events": study_dir / "segments_messy.csv", "records": study_dir / "birds_messy.csv"})
    store = Store(study.store_dir)
    assert store.check() == []
    with store.connect() as con:
        dup = con.execute("""SELECT o.source_row, o.variable, t.twin_source_id FROM observations o
                             JOIN twins t ON t.record_id = o.record_id AND t.ingest_id = o.ingest_id
                             WHERE list_contains(o.flags, 'probable_duplicate') ORDER BY o.source_row, o.variable""").fetchall()
        agency_flagged = con.execute("""SELECT count(*) FROM observations WHERE source_kind = 'transect'
                                        AND list_contains(flags, 'probable_duplicate')""").fetchall()[0][0]
        loose = con.execute("""SELECT count(*) FROM observations WHERE source_kind = 'opportunistic'
                               AND quantity = 'presence' AND (zero_filled OR density IS NOT NULL OR effort IS NOT NULL)""").fetchall()[0][0]
    # V01 (fulmar, 0.7 km, 10 min after segment S01), V02 (gull, 15 min) and the fulmar of the
    # complete checklist CL9 (1.7 km, overlapping S01) repeat the ship's sightings; so does
    # its little aukelle (1 bird, 1.4 km from the start of S02's track, where the ship counted
    # 5: distances are to the nearest point of a track, issue 17); V03 (4 h later) and V04
    # (33 km north) do not
    assert dup == [(1, "Procellix keldica", "keldmar_seabirds"), (2, "Larivox pallens", "keldmar_seabirds"),
                   (5, "Aukelle minima", "keldmar_seabirds"), (5, "Procellix keldica", "keldmar_seabirds")]
    assert agency_flagged == 0 and loose == 0


@pytest.mark.subprocess
def test_cli_ingest_then_twins_lists_the_pair(study_dir: Path, tmp_path: Path) -> None:
    import subprocess
    import sys

    study = load_study(study_dir)
    _agency(study)
    point = _at(700.0)
    path = _volunteers(study_dir, [f"A,,2022-11-05T08:20,{point[0]:.7f},{point[1]:.7f},Ann Vell,keld fulmar,2,,,"])
    cli = [sys.executable, "-c", "from harmonize.cli.app import main; main()", "--study", str(study_dir)]
    ingest = subprocess.run([*cli, "ingest", PROFILE, str(path)], capture_output=True, text=True, check=False)
    assert ingest.returncode == 0, ingest.stderr
    out = tmp_path / "twins.csv"
    shown = subprocess.run([*cli, "twins", "--csv", str(out)], capture_output=True, text=True, check=False)
    assert shown.returncode == 0, shown.stderr
    assert "keldmar_seawatch" in shown.stdout and "0.70 km" in shown.stdout
    assert "does not assess stocks" in shown.stdout
    table = pd.read_csv(out)
    assert table[["source_id", "twin_source_id"]].values.tolist() == [["keldmar_seawatch", "keldmar_ship_survey"]]
