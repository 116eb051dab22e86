"""Fishing effort: pings and logbooks -> fishing hours per cell, checked by hand and against
outside references (GeographicLib, pyproj, pint)."""

from __future__ import annotations

import json
import shutil
from pathlib import Path
from unittest import mock

import duckdb
import numpy as np
import pandas as pd
import pint
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
import pyproj
import pytest
from geographiclib.geodesic import Geodesic

from harmonize import Store, load_study, run
from harmonize.adapters.logbooks import split_tows_by_cell
from harmonize.errors import ConfigError
from harmonize.geodesy import M_PER_NMI, distance_m
from harmonize.tagging import Grid

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
GEOD = Geodesic.WGS84
TO_GRID = pyproj.Transformer.from_crs("EPSG:4326", "EPSG:6933", always_xy=True)


def _cell(lon: float, lat: float, size_m: float = 25_000.0) -> str:
    """Cell id computed straight from pyproj (EPSG:6933, 25 km cells)."""
    x, y = TO_GRID.transform(lon, lat)
    return f"x{int(np.floor(x / size_m))}_y{int(np.floor(y / size_m))}"


W = _cell(-152.20, 42.9)  # cell west of the boundary near -152.094 E
E = _cell(-152.00, 42.9)


def _observations(study_dir: Path) -> pd.DataFrame:
    con = duckdb.connect(str(study_dir / "store" / "harmonized.duckdb"), read_only=True)
    try:
        Store(study_dir / "store")._define_view(con, temporary=True)
        return con.sql("SELECT * FROM observations ORDER BY gear, cell_id").df()
    finally:
        con.close()


@pytest.fixture
def ping_study(study_dir: Path) -> Path:
    shutil.copy(FIXTURES / "effort" / "pings_hand.csv", study_dir / "pings_hand.csv")
    return study_dir


@pytest.mark.parametrize("written", ["-inf", "infinity", "-Infinity"])
def test_an_infinite_ping_time_is_bad_time(ping_study: Path, written: str) -> None:
    # found by tests/test_fuzz_adapters.py: DuckDB reads these words as timestamps
    path = ping_study / "pings_hand.csv"
    lines = path.read_text().splitlines()
    cells = lines[1].split(",")
    cells[1] = written
    lines[1] = ",".join(cells)
    path.write_text("\n".join(lines) + "\n")
    result = run(load_study(ping_study), "effort_pings", {"rows": path})
    q = result.quarantine.set_index("source_row")
    assert q.loc[1, "reason_code"] == "bad_time"
    assert f"holds '{written}', which is not a date-time" in q.loc[1, "message"]


def test_hand_worked_track(ping_study: Path) -> None:
    """Duplicates, gaps, a vessel crossing cells, slow steaming, a backwards time, a jump."""
    study = load_study(ping_study)
    result = run(study, "effort_pings", {"rows": ping_study / "pings_hand.csv"})
    assert result.status == "complete"
    assert (result.rows_read, result.rows_accepted, result.rows_quarantined) == (31, 21, 10)
    reasons = dict(zip(result.quarantine["source_row"], result.quarantine["reason_code"], strict=True))
    # bravo's 05:00 (row 7, between its 08:30 and 09:00 pings in the file) is sorted into place
    assert reasons == {
        10: "duplicate_record",   # ALPHA-1 10:00 twice
        12: "bad_type",           # one field too many
        19: "implausible_speed",  # DELTA-4 jumps ~178 km in 15 min and back
        21: "outside_domain",
        22: "future_time",
        23: "implausible_speed",  # reported 45 knots
        28: "missing_value",
        29: "bad_type",
        30: "unknown_gear",
        31: "bad_time",
    }
    msg = dict(zip(result.quarantine["source_row"], result.quarantine["message"], strict=True))
    assert "exact duplicate of row 9" in msg[10]
    assert "column 'lat' holds 'abc'" in msg[29]

    obs = _observations(ping_study)
    got = {(r.gear, r.cell_id, r.depth_layer): (r.value, r.n_vessels, r.n_values) for r in obs.itertuples()}
    # Hand-worked (max_gap_h = 2, so each half-interval is capped at 1 h):
    # E/OTB: ALPHA-1 09:30 0.5 + 10:00 0.5 + 14:30 (1.0 + 0.25) + 15:00 0.25 = 2.5 h (10:30 steams
    #        at 9.5 kn); bravo 2, sorted 05:00, 08:00, 08:30, 09:00: 05:00 has no speed (its
    #        only link, 3 h, is longer than max_gap_h) and is not fishing; 08:00 (1.0 capped
    #        + 0.25) + 08:30 0.5 + 09:00 0.25 = 2.0 h at a derived 3.0 kn; DELTA-4:
    #        08:00 and 08:30 get 0.25 h each once the 08:15 jump is skipped = 0.5 h. CHARLIE-3
    #        steams slowly (0.8-1.2 kn) and adds nothing. Total 5.0 h from 3 vessels, 9 pings.
    # W/OTB: ALPHA-1 08:00 0.25 + 08:30 0.5 + 09:00 0.5 = 1.25 h.
    # W/TBB: ECHO-5 at 6 kn, inside the profile's 2-8 kn beam-trawl window: 0.5 + 0.5 = 1.0 h.
    # E/OTM: FOXTROT-6, midwater -> the profile's pelagic layer: 0.25 + 0.25 = 0.5 h.
    assert got == {
        ("OTB", E, "near_bottom"): (5.0, 3, 9),
        ("OTB", W, "near_bottom"): (1.25, 1, 3),
        ("OTM", E, "epipelagic"): (0.5, 1, 2),
        ("TBB", W, "near_bottom"): (1.0, 1, 2),
    }
    row = obs[(obs["gear"] == "OTB") & (obs["cell_id"] == E)].iloc[0]
    assert row["variable"] == "fishing_hours" and row["unit"] == "h" and row["effort_unit"] == "h"
    assert row["effort"] == 5.0 and row["variable_kind"] == "effort" and row["quantity"] == "measurement"
    assert list(row["flags"]) == ["speed_derived"]
    assert (row["season"], row["season_year"]) == ("summer", 2021)
    assert row["event_start"] == pd.Timestamp("2021-06-01", tz="UTC") and row["event_end"] == pd.Timestamp("2021-09-01", tz="UTC")
    # lat/lon is the cell centre
    x, y = TO_GRID.transform(row["lon"], row["lat"])
    assert x / 25_000 % 1 == pytest.approx(0.5, abs=1e-6) and y / 25_000 % 1 == pytest.approx(0.5, abs=1e-6)
    assert Store(study.store_dir).check() == []


def test_vessel_ids_never_reach_the_store(ping_study: Path) -> None:
    study = load_study(ping_study)
    run(study, "effort_pings", {"rows": ping_study / "pings_hand.csv"})
    con = duckdb.connect(str(study.store_dir / "harmonized.duckdb"), read_only=True)
    dump = json.dumps(con.sql("SELECT * FROM quarantine").df().astype(str).to_dict("records"))
    con.close()
    dump += _observations(ping_study).astype(str).to_json()
    for name in ("ALPHA", "alpha", "bravo", "CHARLIE", "DELTA", "ECHO", "FOXTROT", "GOLF"):
        assert name not in dump
    assert "vessel-" in dump


def test_distance_formula_against_geographiclib() -> None:
    """The distance of a logbook tow (harmonize.geodesy's numpy form; its SQL twin, which the
    ping tracks use, is checked in tests/test_geodesy.py) vs the geodesic (Karney 2013,
    J. Geodesy 87:43-55)."""
    rng = np.random.default_rng(3)
    n = 2000
    lat1 = rng.uniform(-70, 70, n)
    lon1 = rng.uniform(-180, 180, n)
    azi = rng.uniform(0, 360, n)
    dist = rng.uniform(10, 20_000, n)  # up to 20 km: steps between pings
    ends = [GEOD.Direct(a, b, c, d) for a, b, c, d in zip(lat1, lon1, azi, dist, strict=True)]
    lat2 = np.array([e["lat2"] for e in ends])
    lon2 = np.array([e["lon2"] for e in ends])
    got = distance_m(lat1, lon1, lat2, lon2)
    assert np.max(np.abs(got - dist) / dist) < 1e-5  # the accuracy the adapter documents
    # GeographicLib documentation check values: 1 degree of longitude along the equator and
    # of latitude from 0 to 1 N
    assert distance_m(np.array([0.0]), np.array([0.0]), np.array([0.0]), np.array([1.0]))[0] == pytest.approx(111_319.491, abs=0.01)
    assert distance_m(np.array([0.0]), np.array([0.0]), np.array([1.0]), np.array([0.0]))[0] == pytest.approx(110_574.389, abs=1.0)
    # across the antimeridian
    e = GEOD.Inverse(10.0, 179.99, 10.01, -179.99)
    assert distance_m(np.array([10.0]), np.array([179.99]), np.array([10.01]), np.array([-179.99]))[0] == pytest.approx(e["s12"], rel=1e-6)


def test_knot_is_1852_metres_per_hour() -> None:
    """The international knot is exactly 1852 m/h (BIPM SI Brochure 2019, Table 8), per pint."""
    ureg = pint.UnitRegistry()
    assert ureg.Quantity(1, "knot").to("m/h").magnitude == pytest.approx(1852.0, rel=1e-15)
    assert M_PER_NMI == 1852.0


def _write_csv(path: Path, rows: list[tuple]) -> None:
    frame = pd.DataFrame(rows, columns=["vessel", "time_utc", "lat", "lon", "sog", "gear"])
    pacsv.write_csv(pa.Table.from_pandas(frame.astype(str).replace({"nan": ""}), preserve_index=False), path)


@pytest.mark.parametrize(("window", "hours"), [((2.999, 3.001), 1.5), ((3.001, 5.0), 0.0)])
def test_derived_speed_is_geodesic(study_dir: Path, window: tuple[float, float], hours: float) -> None:
    """Pings 2778 m apart (GeographicLib direct problem) every 30 min: 5556 m/h = 3.000 knots."""
    rows, lat, lon = [], 43.2, -151.5
    for k in range(4):
        rows.append(("KV-9", f"2021-03-0{1}T0{8 + k // 2}:{'30' if k % 2 else '00'}:00Z", round(lat, 9), round(lon, 9), "", "OTB"))
        step = GEOD.Direct(lat, lon, 37.0, 2778.0)
        lat, lon = step["lat2"], step["lon2"]
    _write_csv(study_dir / "slow.csv", rows)
    profile = (study_dir / "profiles" / "effort_pings.toml").read_text()
    profile = profile.replace("speed_min_kn = 2.0     #", f"speed_min_kn = {window[0]}     #")
    profile = profile.replace("speed_max_kn = 5.0\n", f"speed_max_kn = {window[1]}\n", 1)
    (study_dir / "profiles" / "narrow.toml").write_text(profile.replace('id = "keldmar_pings"', 'id = "narrow"'))
    result = run(load_study(study_dir), "narrow", {"rows": study_dir / "slow.csv"}, write=False)
    assert result.rows_accepted == 4
    # 4 pings over 1.5 h: 0.25 + 0.5 + 0.5 + 0.25 h, all fishing only if the speed is 3.000 kn
    assert result.records_written == (1 if hours else 0)


def test_logbook_split_by_cell(study_dir: Path) -> None:
    """A 2 h haul along 42.9 N across the cell edge: hours in proportion to the length per cell.

    EPSG:6933 is a cylindrical projection, so along a parallel x is linear in longitude and
    the share west of the edge is (edge - start) / (end - start), the edge from pyproj.
    """
    edge_lon, _ = pyproj.Transformer.from_crs("EPSG:6933", "EPSG:4326", always_xy=True).transform(
        -587 * 25_000.0, TO_GRID.transform(-152.1, 42.9)[1])
    share_w = (edge_lon - -152.2) / 0.2
    rows = [
        ("H1", "Skerra Dawn", "2021-07-01 06:00", "2021-07-01 08:00", 42.9, -152.2, 42.9, -152.0, "OTB"),
        ("H2", "Hollin Grey", "2021-07-02 06:00", "2021-07-02 09:00", 42.9, -152.0, 42.9, -151.98, "otb"),
        ("H2", "Hollin Grey", "2021-07-02 06:00", "2021-07-02 09:00", 42.9, -152.0, 42.9, -151.98, "otb"),
        ("H3", "Tessaly", "2021-07-03 06:00", "2021-07-03 05:00", 42.9, -152.0, 42.9, -151.98, "OTB"),
        ("H4", "Tessaly", "2021-07-03 06:00", "2021-07-03 06:00", 42.9, -152.0, 42.9, -151.98, "OTB"),
        ("H5", "Tessaly", "2021-07-04 06:00", "2021-07-04 07:00", 42.9, -152.0, 42.9, -151.98, "KITE"),
        ("H6", "Tessaly", "2021-07-05 06:00", "2021-07-05 07:00", 39.0, -152.0, 42.9, -151.98, "OTB"),
        ("H7", "Tessaly", "2021-07-06 06:00", "2021-07-06 06:30", 42.9, -153.5, 42.9, -151.0, "OTB"),
        ("H8", "Tessaly", "2021-07-07 06:00", "2021-07-07 10:00", 42.9, -151.95, "", "", "OTB"),
    ]
    cols = ["haul", "vessel", "shot", "hauled", "lat_shot", "lon_shot", "lat_haul", "lon_haul", "gear"]
    pd.DataFrame(rows, columns=cols).to_csv(study_dir / "logbook.csv", index=False)
    result = run(load_study(study_dir), "effort_logbook", {"rows": study_dir / "logbook.csv"})
    reasons = dict(zip(result.quarantine["source_row"], result.quarantine["reason_code"], strict=True))
    assert reasons == {3: "duplicate_record", 4: "end_before_start", 5: "bad_effort", 6: "unknown_gear",
                       7: "outside_domain", 8: "implausible_speed"}
    assert (result.rows_read, result.rows_accepted) == (9, 3)
    obs = _observations(study_dir)
    got = {r.cell_id: (r.value, r.n_vessels, r.n_values) for r in obs.itertuples()}
    assert got[W][0] == pytest.approx(2.0 * share_w, rel=1e-6)
    # E: the rest of H1, all 3 h of H2 and, without an end position, all 4 h of H8
    assert got[E][0] == pytest.approx(2.0 * (1 - share_w) + 3.0 + 4.0, rel=1e-6)
    assert got[E][1:] == (3, 3) and got[W][1:] == (1, 1)
    assert "Tessaly" not in result.quarantine["raw"].str.cat()
    assert Store(load_study(study_dir).store_dir).check() == []


def test_split_tows_shares_sum_to_one() -> None:
    grid = Grid("EPSG:6933", 25)
    rng = np.random.default_rng(5)
    n = 300
    slon, slat = rng.uniform(-154, -150, n), rng.uniform(42, 45, n)
    elon, elat = slon + rng.normal(0, 0.4, n), slat + rng.normal(0, 0.3, n)
    elon[:5], elat[:5] = slon[:5], slat[:5]  # zero-length tows stay in their cell
    parts = split_tows_by_cell(grid, slon, slat, elon, elat)
    assert np.allclose(parts.groupby("tow")["share"].sum().to_numpy(), 1.0)
    assert (parts["share"] > 0).all()
    # each piece's cell is on the line: the cells of start and end are among the pieces
    for tow in range(0, n, 37):
        cells = set(zip(parts.loc[parts["tow"] == tow, "ix"], parts.loc[parts["tow"] == tow, "iy"], strict=True))
        ix, iy = grid.indices(np.array([slon[tow], elon[tow]]), np.array([slat[tow], elat[tow]]))
        assert {(ix[0], iy[0]), (ix[1], iy[1])} <= cells


def test_suppressed_export(ping_study: Path) -> None:
    """Rule of three (common practice in fisheries agencies): cells with < 3 vessels withheld."""
    from harmonize.export.long import export_long
    from harmonize.export.selection import ExportFilters

    study = load_study(ping_study)
    run(study, "effort_pings", {"rows": ping_study / "pings_hand.csv"})
    obs = _observations(ping_study)
    public = obs[obs["n_vessels"] >= study.min_vessels]
    assert list(zip(public["gear"], public["cell_id"], strict=True)) == [("OTB", E)]
    result = export_long(study, ping_study / "long.parquet", ExportFilters.build(kinds="effort"))
    out = pd.read_parquet(result.path)
    assert len(out) == 1 and out["event_id"].iloc[0].startswith(f"OTB/{E}/") and out["value"].iloc[0] == 5.0
    assert result.metadata["confidentiality"]["effort_rows_withheld"] == 3
    assert any(n.startswith("3 fishing-effort rows") for n in result.notes)
    # the store keeps the true values
    assert _observations(ping_study)["value"].notna().all() and len(_observations(ping_study)) == 4


def test_rejects_beyond_the_limit_are_counted(ping_study: Path) -> None:
    profile = (ping_study / "profiles" / "effort_pings.toml").read_text()
    profile = profile.replace("max_gap_h = 2.0", "max_gap_h = 2.0\nquarantine_rows = 4")
    (ping_study / "profiles" / "effort_pings.toml").write_text(profile)
    study = load_study(ping_study)
    result = run(study, "effort_pings", {"rows": ping_study / "pings_hand.csv"})
    assert len(result.quarantine) == 4 and list(result.quarantine["source_row"]) == [10, 12, 19, 21]
    assert result.masked["n_values"].sum() == 6
    assert result.rows_quarantined == 10 and result.rows_read == result.rows_accepted + result.rows_quarantined
    assert result.reasons().to_dict()["implausible_speed"] == 2
    assert Store(study.store_dir).check() == []


def test_parquet_input_gives_the_same_cells(ping_study: Path) -> None:
    text = pacsv.read_csv(FIXTURES / "effort" / "pings_hand.csv", parse_options=pacsv.ParseOptions(
        invalid_row_handler=lambda row: "skip"), convert_options=pacsv.ConvertOptions(strings_can_be_null=True,
        column_types={c: pa.string() for c in ("vessel", "time_utc", "lat", "lon", "sog", "gear")}))
    pq.write_table(text, ping_study / "pings.parquet")
    result = run(load_study(ping_study), "effort_pings", {"rows": ping_study / "pings.parquet"})
    assert (result.rows_read, result.rows_quarantined) == (30, 9)
    got = {(r.gear, r.cell_id): r.value for r in _observations(ping_study).itertuples()}
    assert got[("OTB", E)] == 5.0 and got[("OTB", W)] == 1.25


def test_local_times_are_stored_in_utc(study_dir: Path) -> None:
    rows = [("KV-1", "2021-02-28 22:00", 43.2, -151.5, 3.0, "OTB"),
            ("KV-1", "2021-02-28 23:00", 43.2, -151.49, 3.0, "OTB")]
    _write_csv(study_dir / "local.csv", rows)
    profile = (study_dir / "profiles" / "effort_pings.toml").read_text().replace('timezone = "UTC"', 'timezone = "Pacific/Honolulu"')
    (study_dir / "profiles" / "effort_pings.toml").write_text(profile)
    run(load_study(study_dir), "effort_pings", {"rows": study_dir / "local.csv"})
    obs = _observations(study_dir)
    # 22:00 in Honolulu (UTC-10) is 08:00 UTC on 1 March: spring, not winter
    assert list(obs["season"]) == ["spring"] and obs["value"].iloc[0] == 1.0


def test_profile_mistakes_name_the_key(study_dir: Path) -> None:
    path = study_dir / "profiles" / "effort_pings.toml"
    base = path.read_text()
    path.write_text(base.replace("max_gap_h = 2.0", "max_gap_hours = 2.0"))
    with pytest.raises(ConfigError, match="fishing.max_gap_hours: unknown key"):
        run(load_study(study_dir), "effort_pings", {"rows": FIXTURES / "effort" / "pings_hand.csv"}, write=False)
    path.write_text(base.replace('pelagic_layer = "epipelagic"\n', ""))
    with pytest.raises(ConfigError, match="gear 'OTM' fishes in midwater"):
        run(load_study(study_dir), "effort_pings", {"rows": FIXTURES / "effort" / "pings_hand.csv"}, write=False)


@pytest.mark.slow   # the demo's whole fleet: its ping and logbook files at demo size
def test_demo_fleet(tmp_path: Path) -> None:
    """The demo's invented fleet: junk pings quarantined, cells with fewer than 3 vessels exist."""
    from harmonize.demo.sea import write_study
    from harmonize.demo.sources.effort import generate

    folder = tmp_path / "demo"
    write_study(folder)
    items = generate(folder, np.random.default_rng(11))
    study = load_study(folder)
    for item in items:
        result = run(study, folder / item.profile, {k: folder / v for k, v in item.inputs.items()})
        assert result.rows_read == result.rows_accepted + result.rows_quarantined
        if "pings" in item.profile:
            assert result.reasons().to_dict() == {"duplicate_record": 25, "outside_domain": 1, "bad_type": 1}
    obs = _observations(folder)
    assert set(obs["gear"]) == {"OTB", "TBB", "OTM", "DRB"}
    assert (obs["n_vessels"] < 3).any() and (obs["n_vessels"] >= 3).any()
    assert set(obs.loc[obs["gear"] == "OTM", "depth_layer"]) == {"epipelagic"}
    assert Store(study.store_dir).check() == []


def _quarantined(result) -> list[tuple[int, str, str]]:  # type: ignore[no-untyped-def]
    q = result.quarantine
    return list(zip(q["source_row"].astype(int), q["reason_code"], q["message"], strict=True))


def test_fast_reader_and_line_reader_number_rows_alike(ping_study: Path) -> None:
    """A well-formed file stays on DuckDB's fast path; the line reader gives the same result."""
    from harmonize.adapters.pings import PingReader

    lines = (FIXTURES / "effort" / "pings_hand.csv").read_text().splitlines()
    clean = [line for line in lines if not line.endswith(",extra")]  # the row with a field too many
    assert len(clean) == len(lines) - 1
    (ping_study / "clean.csv").write_text("\n".join(clean) + "\n")
    study = load_study(ping_study)
    with mock.patch.object(PingReader, "_read_lines", side_effect=AssertionError("left the fast path")):
        fast = run(study, "effort_pings", {"rows": ping_study / "clean.csv"}, write=False)
    with mock.patch.object(PingReader, "_read_fast", return_value=False):
        slow = run(study, "effort_pings", {"rows": ping_study / "clean.csv"}, write=False)
    assert (fast.rows_read, fast.rows_accepted, fast.rows_quarantined) == (30, 21, 9)
    assert _quarantined(fast) == _quarantined(slow)
    assert fast.quarantine["raw"].tolist() == slow.quarantine["raw"].tolist()
    assert fast.records_written == slow.records_written == 4


@pytest.mark.parametrize("block_rows", [100_000, 4, 1])
def test_rows_are_counted_as_a_person_counts_them(ping_study: Path, block_rows: int) -> None:
    """Blank lines, lines of delimiters and rows that cannot be split, in blocks of any size."""
    lines = (FIXTURES / "effort" / "pings_hand.csv").read_text().splitlines()
    semi = [line.replace(",", ";") for line in lines[2:4]]  # data rows 2 and 3
    text = "\n".join([lines[0], ",,,,,", lines[1], "", semi[0], " , ,", "", semi[1], "\r", *lines[4:]]) + "\n"
    (ping_study / "odd.csv").write_text(text)
    with mock.patch("harmonize.adapters.pings.FALLBACK_BLOCK_ROWS", block_rows):
        result = run(load_study(ping_study), "effort_pings", {"rows": ping_study / "odd.csv"}, write=False)
    assert (result.rows_read, result.rows_accepted, result.rows_quarantined) == (31, 19, 12)
    got = {row: reason for row, reason, _ in _quarantined(result)}
    # the hand-worked rows of test_hand_worked_track keep their numbers; rows 2 and 3 are added
    assert got == {2: "bad_type", 3: "bad_type", 10: "duplicate_record", 12: "bad_type",
                   19: "implausible_speed", 21: "outside_domain", 22: "future_time", 23: "implausible_speed",
                   28: "missing_value", 29: "bad_type", 30: "unknown_gear", 31: "bad_time"}
    msg = {row: m for row, _, m in _quarantined(result)}
    assert msg[2] == ("row has a different number of fields than the header (1 instead of 6); "
                      "check delimiters and quotes")
    assert json.loads(result.quarantine["raw"].iloc[0])["note"].startswith("row text withheld")


def test_messages_quote_cells_on_one_line_cut_to_60_characters(ping_study: Path) -> None:
    lines = (FIXTURES / "effort" / "pings_hand.csv").read_text().splitlines()
    lines[2] = lines[2].replace(",3.2,OTB", ',"3.\r\n2",OTB')
    lines[3] = lines[3].replace(",OTB", "," + "Z" * 500)
    (ping_study / "cells.csv").write_text("\n".join(lines) + "\n")
    result = run(load_study(ping_study), "effort_pings", {"rows": ping_study / "cells.csv"}, write=False)
    assert result.rows_read == 31
    msg = {row: m for row, _, m in _quarantined(result)}
    assert msg[2] == "speed_kn (column 'sog') holds '3.\\r\\n2', which is not a number"
    assert f"gear '{'Z' * 57}...' is not a known gear code" in msg[3]
    assert len(msg[3]) < 250
