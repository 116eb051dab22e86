"""Seabird strip transects: geodesic lengths, strip densities, flying birds, zeros, observer privacy."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pytest
from geographiclib.geodesic import Geodesic
from hypothesis import given
from hypothesis import strategies as st

from harmonize import Store, load_study, run
from harmonize.adapters.transect import DEFAULT_STRIP_WIDTH_M, strip_area_km2
from harmonize.errors import ConfigError
from harmonize.geodesy import track_geometry
from harmonize.privacy import pseudonymise, study_salt

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures" / "transect"
OBSERVERS = ("Maren Lindqvist", "Oskar Thelin")  # invented names in the fixture
WGS84 = Geodesic.WGS84


@pytest.fixture
def transect_dir(study_dir: Path) -> Path:
    for f in FIXTURES.glob("*.csv"):
        shutil.copy(f, study_dir / f.name)
    return study_dir


def _inputs(folder: Path) -> dict[str, Path]:
    return {"events": folder / "segments_messy.csv", "records": folder / "birds_messy.csv"}


def _observations(study_dir: Path) -> pd.DataFrame:
    with Store(study_dir / "store").connect() as con:
        return con.sql("SELECT * FROM observations ORDER BY event_id, variable, behavior").df()


# --- the computations against outside sources ----------------------------------------------

def test_strip_density_worked_example() -> None:
    # Tasker et al. (1984), The Auk 101:567-577: a 300 m strip, density = n / (L x w).
    # Worked example (arithmetic, /work/shared/NOTES.md): 10 min at 10 kn = 3.0867 km,
    # 0.9260 km2; 12 birds -> 12.959 per km2.
    assert DEFAULT_STRIP_WIDTH_M == 300.0
    length_km = 10 * 1.852 * 10 / 60
    assert length_km == pytest.approx(3.0867, abs=5e-5)
    area = strip_area_km2(np.array([length_km]), np.array([300.0]))
    assert area[0] == pytest.approx(0.9260, abs=5e-5)
    assert 12 / area[0] == pytest.approx(12.959, abs=5e-4)


def test_geodesic_lengths_match_geographiclib_check_values() -> None:
    # GeographicLib documentation check values (Karney 2013, Algorithms for geodesics,
    # J. Geodesy 87:43-55): one degree of longitude on the equator 111,319.491 m; the
    # inverse problem (-41.32, 174.81) -> (40.96, -5.50) s12 = 19,959,679.267 m.
    km, _, _ = track_geometry(np.array([0.0, 174.81]), np.array([0.0, -41.32]),
                                np.array([1.0, -5.50]), np.array([0.0, 40.96]))
    assert km[0] * 1000 == pytest.approx(111_319.491, abs=1e-3)
    assert km[1] * 1000 == pytest.approx(19_959_679.267, abs=1e-3)


@given(
    lat1=st.floats(-80, 80), lon1=st.floats(-180, 180),
    azimuth=st.floats(0, 360), dist_m=st.floats(10, 50_000),
)
def test_segment_length_and_midpoint_agree_with_geographiclib(lat1: float, lon1: float, azimuth: float, dist_m: float) -> None:
    # Reference: geographiclib (Karney 2013) solves the same WGS84 geodesic problems.
    end = WGS84.Direct(lat1, lon1, azimuth, dist_m)
    km, mid_lon, mid_lat = track_geometry(np.array([lon1]), np.array([lat1]), np.array([end["lon2"]]), np.array([end["lat2"]]))
    inv = WGS84.Inverse(lat1, lon1, end["lat2"], end["lon2"])
    assert km[0] * 1000 == pytest.approx(inv["s12"], abs=1e-6)
    mid = WGS84.Direct(lat1, lon1, inv["azi1"], inv["s12"] / 2)
    assert mid_lat[0] == pytest.approx(mid["lat2"], abs=1e-9)
    assert ((mid_lon[0] - mid["lon2"] + 180) % 360) - 180 == pytest.approx(0, abs=1e-9)


# --- the messy fixture end to end ----------------------------------------------------------

def test_messy_segments_accounting_and_reasons(transect_dir: Path) -> None:
    study = load_study(transect_dir)
    result = run(study, "transect_agency", _inputs(transect_dir))
    assert result.status == "complete"
    assert result.rows_read == 13 + 14
    assert result.rows_read == result.rows_accepted + result.rows_quarantined
    q = result.quarantine
    reasons = dict(zip(q["source_row"].astype(str) + "@" + q["source_file"], q["reason_code"], strict=True))
    assert reasons == {
        "4@segments_messy.csv": "duplicate_record",
        "5@segments_messy.csv": "end_before_start",
        "6@segments_messy.csv": "bad_effort",          # start and end positions equal
        "7@segments_messy.csv": "implausible_speed",   # 20 km in 10 minutes
        "8@segments_messy.csv": "outside_domain",
        "9@segments_messy.csv": "bad_type",            # latitude '43,5'
        "10@segments_messy.csv": "missing_value",      # neither end position nor length
        "12@segments_messy.csv": "bad_effort",         # start time = end time
        "13@segments_messy.csv": "missing_value",      # no start time
        "8@birds_messy.csv": "end_before_start",       # birds of a rejected segment follow it
        "9@birds_messy.csv": "orphan_record",
        "10@birds_messy.csv": "unknown_taxon",
        "11@birds_messy.csv": "bad_type",              # count 'lots'
        "12@birds_messy.csv": "out_of_range",          # count -2
        "13@birds_messy.csv": "bad_type",              # in_flight 'maybe'
    }
    messages = dict(zip(q["source_row"].astype(str) + "@" + q["source_file"], q["message"], strict=True))
    assert "65.5 knots (20.219 km in 10 min)" in messages["7@segments_messy.csv"]
    assert "in_flight (column 'FLYING') holds 'maybe'; expected true or false" == messages["13@birds_messy.csv"]
    assert Store(study.store_dir).check() == []


def test_messy_segments_effort_density_tags(transect_dir: Path) -> None:
    run(load_study(transect_dir), "transect_agency", _inputs(transect_dir))
    obs = _observations(transect_dir)
    seg = obs.drop_duplicates("event_id").set_index("event_id")
    assert sorted(seg.index) == ["S01", "S02", "S03", "S11"]
    # effort = geodesic length (geographiclib, Karney 2013) x strip width (Tasker et al. 1984)
    for sid, (a, b, width) in {"S01": ((43.0, -152.0), (43.0, -151.95), 300), "S02": ((43.0, -151.95), (43.02, -151.92), 300),
                               "S11": ((43.7, -152.2), (43.725, -152.2), 200)}.items():
        inv = WGS84.Inverse(a[0], a[1], b[0], b[1])
        assert seg.loc[sid, "effort"] == pytest.approx(inv["s12"] / 1000 * width / 1000, rel=1e-12)
        mid = WGS84.Direct(a[0], a[1], inv["azi1"], inv["s12"] / 2)
        assert (seg.loc[sid, "lat"], seg.loc[sid, "lon"]) == pytest.approx((mid["lat2"], mid["lon2"]), abs=1e-9)
    # S03 gives 1.6667 nmi (10 min at 10 kn) and no strip width: the worked example
    assert seg.loc["S03", "effort"] == pytest.approx(1.6667 * 1.852 * 0.3, rel=1e-12)
    assert sorted(seg.loc["S03", "flags"]) == ["length_given", "strip_width_default"]
    assert set(obs["effort_unit"]) == {"km2"}
    # birds at the surface: depth 0 -> the study's top layer, "surface"
    assert set(obs["depth_layer"]) == {"surface"} and set(obs["depth_min_m"]) == {0.0} == set(obs["depth_max_m"])
    assert set(obs["season"]) == {"autumn"} and set(obs["season_year"]) == {2022}

    row = obs.set_index(["event_id", "variable", "behavior"])
    gull = row.loc[("S03", "Larivox pallens", "on_water")]
    assert gull["value"] == 12 and gull["density"] == pytest.approx(12.959, abs=5e-4)
    # birds on the water and in flight are kept apart; rows of one kind are summed
    fulmar = row.loc["S01", "Procellix keldica"]
    assert fulmar["value"].to_dict() == {"in_flight": 2.0, "on_water": 4.0}
    assert list(fulmar.loc["on_water", "source_record_rows"]) == [1, 4]
    assert row.loc[("S01", "Larivox pallens", "on_water"), "value"] == 1  # a blank in_flight is a bird on the water
    assert obs["record_id"].is_unique


def test_zero_filling_per_behavior(transect_dir: Path) -> None:
    run(load_study(transect_dir), "transect_agency", _inputs(transect_dir))
    obs = _observations(transect_dir)
    zeros = obs[obs["zero_filled"]]
    got = set(zip(zeros["event_id"], zeros["variable"], zeros["behavior"], strict=True))
    assert got == {
        ("S01", "Aukelle minima", "on_water"), ("S01", "Aukelle minima", "in_flight"), ("S01", "Larivox pallens", "in_flight"),
        ("S02", "Procellix keldica", "on_water"), ("S02", "Procellix keldica", "in_flight"),
        ("S02", "Larivox pallens", "on_water"), ("S02", "Aukelle minima", "in_flight"),
        ("S03", "Procellix keldica", "on_water"), ("S03", "Procellix keldica", "in_flight"),
        ("S03", "Aukelle minima", "on_water"), ("S03", "Aukelle minima", "in_flight"), ("S03", "Larivox pallens", "in_flight"),
        # S11: every target taxon has a quarantined row there, so none is inferred absent
    }
    assert (zeros["value"] == 0).all()


def test_observers_are_pseudonymised(transect_dir: Path) -> None:
    study = load_study(transect_dir)
    run(study, "transect_agency", _inputs(transect_dir))
    seg = _observations(transect_dir).drop_duplicates("event_id").set_index("event_id")["observer_id"]
    salt = study_salt(study.root)
    names = pseudonymise(pd.Series(list(OBSERVERS)), salt)
    # "Maren Lindqvist" and "maren  lindqvist" are one observer; S11 has none
    assert seg["S01"] == seg["S02"] == names[0] and seg["S03"] == names[1] and pd.isna(seg["S11"])
    assert seg["S01"].startswith("obs-") and len(seg["S01"]) == 20


def test_no_observer_name_anywhere_in_the_store(transect_dir: Path) -> None:
    study = load_study(transect_dir)
    run(study, "transect_agency", _inputs(transect_dir))
    names = [n.casefold() for n in OBSERVERS] + ["lindqvist", "thelin"]
    files = [p for p in study.store_dir.rglob("*") if p.is_file()]
    assert any(p.suffix == ".parquet" for p in files)
    # the bytes of every file in the store folder (the salt lives outside it)
    for path in files:
        blob = path.read_bytes().lower()
        assert not any(n.encode() in blob for n in names), path
    assert not (study.store_dir / ".harmonize-salt").exists()
    # and the decompressed content: every table of the database and every parquet file as text
    con = duckdb.connect(str(study.store_dir / "harmonized.duckdb"), read_only=True)
    try:
        tables = [r[0] for r in con.execute("SELECT table_name FROM duckdb_tables()").fetchall()]
        text = [con.sql(f'SELECT * FROM "{t}"').df().to_csv() for t in tables]
        text += [con.sql("SELECT * FROM read_parquet(?)", params=[str(p)]).df().to_csv()
                 for p in files if p.suffix == ".parquet"]
    finally:
        con.close()
    assert "quarantine" in tables
    dump = "\n".join(text).casefold()
    assert "obs-" in dump  # the pseudonyms are there
    assert not any(n in dump for n in names)
    # the raw rows kept in quarantine carry the pseudonym in the observer column
    with Store(study.store_dir).connect() as c:
        raw = [json.loads(r[0]) for r in c.execute("SELECT raw FROM quarantine WHERE source_file = 'segments_messy.csv'").fetchall()]
    assert {r["OBSERVER"][:4] for r in raw} == {"obs-"}


def test_continuous_flying_counts_carry_no_density(transect_dir: Path) -> None:
    run(load_study(transect_dir), "transect_volunteer", _inputs(transect_dir))
    obs = _observations(transect_dir)
    assert set(obs["provider_type"]) == {"volunteer"}
    flying = obs[obs["behavior"] == "in_flight"]
    water = obs[obs["behavior"] == "on_water"]
    assert flying["density"].isna().all() and flying["effort"].isna().all()
    assert all("flying_not_snapshot" in f for f in flying["flags"])
    assert water["density"].notna().all()


def test_without_in_flight_column_birds_have_no_behavior(study_dir: Path) -> None:
    (study_dir / "s.csv").write_text(
        "event_id,start_time,end_time,start_lat,start_lon,length_km\nA,2021-01-10T10:00,2021-01-10T10:10,43,-152,3\n")
    (study_dir / "b.csv").write_text("event_id,taxon,count\nA,pale gull,4\n")
    (study_dir / "profiles" / "transect_plain.toml").write_text(
        '[source]\nid = "plain"\nkind = "transect"\nprovider_type = "agency"\nprotocol = "keldmar_seabird_strip"\n')
    run(load_study(study_dir), "transect_plain", {"events": study_dir / "s.csv", "records": study_dir / "b.csv"})
    obs = _observations(study_dir)
    assert obs["behavior"].isna().all()
    assert dict(zip(obs["variable"], obs["value"], strict=True)) == {
        "Larivox pallens": 4.0, "Procellix keldica": 0.0, "Aukelle minima": 0.0}
    gull = obs[obs["variable"] == "Larivox pallens"].iloc[0]
    assert gull["density"] == pytest.approx(4 / (3 * 0.3))  # default 300 m strip
    # January belongs to the winter of its own year
    assert (gull["season"], gull["season_year"]) == ("winter", 2021)


def test_unknown_flying_mode_is_a_config_error(transect_dir: Path) -> None:
    profile = transect_dir / "profiles" / "transect_agency.toml"
    profile.write_text(profile.read_text().replace('flying = "snapshot"', 'flying = "sometimes"'))
    with pytest.raises(ConfigError, match=r"strip\.flying: 'sometimes' is not known; expected \"snapshot\""):
        run(load_study(transect_dir), "transect_agency", _inputs(transect_dir), write=False)


def test_reingest_is_a_noop_and_ids_are_stable(transect_dir: Path) -> None:
    study = load_study(transect_dir)
    checked = run(study, "transect_agency", _inputs(transect_dir), write=False)
    first = run(study, "transect_agency", _inputs(transect_dir))
    assert checked.records_written == first.records_written == len(_observations(transect_dir))
    again = run(study, "transect_agency", _inputs(transect_dir))
    assert again.status == "unchanged" and again.ingest_id == first.ingest_id


def test_segment_whose_only_bird_row_is_malformed_is_kept_without_values(study_dir: Path) -> None:
    # B's only bird row is cut short: no segment can claim it, so no segment's counts are
    # known complete (flag counts_incomplete, no inferred zeros) and B yields no value. It is
    # kept in events_without_values, so its events row stays accounted for.
    (study_dir / "s.csv").write_text(
        "SEG,T_START,T_END,LAT1,LON1,LAT2,LON2,DIST_NM,STRIP_M,OBSERVER\n"
        "A,2022-11-05T08:00,2022-11-05T08:10,43.0,-152.0,43.0,-151.95,,300,Oskar Thelin\n"
        "B,2022-11-05T08:10,2022-11-05T08:20,43.0,-151.95,43.02,-151.92,,300,Maren Lindqvist\n")
    (study_dir / "b.csv").write_text("SEG,SPECIES,N,FLYING\nA,pale gull,4,N\nB,keld\n")
    study = load_study(study_dir)
    result = run(study, "transect_agency", {"events": study_dir / "s.csv", "records": study_dir / "b.csv"})
    assert [(f.rows_read, f.rows_accepted, f.rows_quarantined) for f in result.files] == [(2, 2, 0), (2, 1, 1)]
    assert result.records_written == 1  # A's gull; no zeros
    assert any("no readable segment id" in n for n in result.notes)
    store = Store(study.store_dir)
    assert store.check() == []
    empty = store.events_without_values()
    assert list(empty["event_id"]) == ["B"]
    b = empty.iloc[0]
    assert list(b["flags"]) == ["counts_incomplete"]
    assert (b["source_file"], b["source_row"], b["season"], b["season_year"]) == ("s.csv", 2, "autumn", 2022)
    # strip area = geodesic length (geographiclib, Karney 2013) x 300 m
    length_km = WGS84.Inverse(43.0, -151.95, 43.02, -151.92)["s12"] / 1000
    assert (b["effort_unit"], b["effort"]) == ("km2", pytest.approx(length_km * 0.3, rel=1e-9))
    # the observer is a pseudonym, never the name
    assert b["observer_id"] == pseudonymise(pd.Series(["Maren Lindqvist"]), study_salt(study.root))[0]
    gull = _observations(study_dir).iloc[0]
    assert (gull["event_id"], gull["value"], list(gull["flags"])) == ("A", 4.0, ["counts_incomplete"])
