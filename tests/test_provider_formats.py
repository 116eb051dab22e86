"""Provider formats read with no outside conversion: degrees and minutes, date and time apart, 1/4 and 25 %."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from cli_runner import run_cli
from hypothesis import given
from hypothesis import strategies as st

from harmonize.errors import ConfigError
from harmonize.ingest import run
from harmonize.reading.fields import to_float
from harmonize.reading.formats import parse_angles, parse_fractions
from harmonize.store import Store
from harmonize.study import load_study

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"


# --------------------------------------------------------------------------- the parsers
# A degree is 60 minutes and a minute 60 seconds (ISO 6709:2008, Standard representation of
# geographic point location by coordinates, annex D: sexagesimal degrees).
@pytest.mark.parametrize(("cell", "axis", "expected"), [
    ("41°50.159'N", "lat", 41 + 50.159 / 60),
    ("41 50.159 S", "lat", -(41 + 50.159 / 60)),
    ("N41 50.159", "lat", 41 + 50.159 / 60),
    ("-41 50.159", "lat", -(41 + 50.159 / 60)),
    ("153°02.5'W", "lon", -(153 + 2.5 / 60)),
    ("153d 2,5 E", "lon", 153 + 2.5 / 60),
    ("0 30 S", "lat", -0.5),
])
def test_degrees_minutes(cell: str, axis: str, expected: float) -> None:
    values, bad, messages = parse_angles(pd.Series([cell], dtype="string"), "degrees_minutes", axis)
    assert not bad.any() and messages == []
    assert values.iloc[0] == pytest.approx(expected, abs=1e-12)


@pytest.mark.parametrize(("cell", "axis", "expected"), [
    ("41°50'09.5\"N", "lat", 41 + 50 / 60 + 9.5 / 3600),
    ("41 50 9.5 S", "lat", -(41 + 50 / 60 + 9.5 / 3600)),
    ("153:02:30W", "lon", -(153 + 2 / 60 + 30 / 3600)),
    ("41°50'9''S", "lat", -(41 + 50 / 60 + 9 / 3600)),
])
def test_degrees_minutes_seconds(cell: str, axis: str, expected: float) -> None:
    values, bad, _ = parse_angles(pd.Series([cell], dtype="string"), "degrees_minutes_seconds", axis)
    assert not bad.any()
    assert values.iloc[0] == pytest.approx(expected, abs=1e-12)


@given(deg=st.integers(0, 89), minutes=st.integers(0, 59), sec=st.floats(0, 59.99, allow_nan=False),
       south=st.booleans(), style=st.sampled_from(["{d}°{m:02d}'{s:05.2f}\"{h}", "{h}{d} {m} {s:.2f}",
                                                    "{d}:{m}:{s:.2f}{h}", "{d} {m:02d} {s:.2f} {h}"]))
def test_dms_round_trip(deg: int, minutes: int, sec: float, south: bool, style: str) -> None:
    sec = round(sec, 2)
    cell = style.format(d=deg, m=minutes, s=sec, h="S" if south else "N")
    values, bad, _ = parse_angles(pd.Series([cell], dtype="string"), "degrees_minutes_seconds", "lat")
    expected = (deg + minutes / 60 + sec / 3600) * (-1 if south else 1)
    assert not bad.any(), cell
    assert values.iloc[0] == pytest.approx(expected, abs=1e-9)


@pytest.mark.parametrize(("cell", "axis", "message"), [
    ("41.5", "lat", "'41.5' is not a position in degrees minutes (expected e.g. 41°50.159'N)"),
    ("41°50.159E", "lat", "'41°50.159E' has hemisphere E, which belongs to a longitude; are latitude and longitude swapped?"),
    ("153 02.5 N", "lon", "has hemisphere N, which belongs to a latitude"),
    ("41 61.0 N", "lat", "'41 61.0 N' has minutes or seconds of 60 or more"),
    ("-41 50.1 N", "lat", "gives the hemisphere twice (a sign and a letter, or two letters); give one"),
])
def test_bad_degree_minute_cells_are_named(cell: str, axis: str, message: str) -> None:
    values, bad, messages = parse_angles(pd.Series([cell, None], dtype="string"), "degrees_minutes", axis)
    assert bad.tolist() == [True, False]  # a missing cell is not a bad one
    assert message in messages[0]
    assert values.isna().all()


def test_fractions_ratio_and_percent() -> None:
    text = pd.Series(["1/4", "25%", "0.5", None, "1/0", "half", "12.5 %"], dtype="string")
    out = parse_fractions(text, to_float(text), "decimal")
    assert out.iloc[0] == 0.25 and out.iloc[1] == 0.25 and out.iloc[2] == 0.5 and out.iloc[6] == 0.125
    assert out.iloc[3:6].isna().all()
    bare = pd.Series(["25", "50%", "1/2"], dtype="string")
    assert parse_fractions(bare, to_float(bare), "percent").tolist() == [0.25, 0.5, 0.5]


# --------------------------------------------------------------------------- a provider's files
def _dm(value: float, axis: str) -> str:
    """Degrees and decimal minutes as a provider writes them, from decimal degrees (test's own writer)."""
    hemi = ("N" if value >= 0 else "S") if axis == "lat" else ("E" if value >= 0 else "W")
    whole = int(abs(value))
    return f"{whole}°{(abs(value) - whole) * 60:06.3f}'{hemi}"


def _clean_plankton(folder: Path) -> tuple[pd.DataFrame, pd.DataFrame]:
    tows = pd.DataFrame({
        "TOW": [f"T{i}" for i in range(1, 7)],
        "START_UTC": [f"2021-0{m}-1{d} 0{d}:30" for m, d in zip([4, 4, 5, 7, 8, 9], range(6), strict=True)],
        "LAT": [43.0, 43.5125, 42.2, 44.017, 43.25, 42.75],
        "LON": [-152.0, -151.50833, -150.5, -153.125, -151.0, -152.6],
        "Z_TOP": [0] * 6, "Z_BOTTOM": [50] * 6, "WATER_DEPTH": [400] * 6, "NET_CM": [60] * 6,
        "REVS": [1000, 800, 1500, 900, 1100, 1200]})
    counts = pd.DataFrame({"TOW": ["T1", "T1", "T2", "T3", "T4", "T5", "T6"],
                           "TAXON": ["keld krill", "Copelix marina", "keld krill", "keld krill", "Copelix marina",
                                     "keld krill", "Copelix marina"],
                           "STAGE": ["adult"] * 7, "N": [500, 30, 120, 80, 44, 10, 3],
                           "SPLIT": [0.25, 0.5, 1.0, 0.125, 0.25, 1.0, 0.5]})
    return tows, counts


def _provider_copy(study_dir: Path) -> None:
    """The same tows as a provider sends them: degree-minute positions, date and time apart, 1/4 splits."""
    tows, counts = _clean_plankton(study_dir)
    tows.to_csv(study_dir / "tows.csv", index=False)
    counts.to_csv(study_dir / "counts.csv", index=False)
    prov = tows.drop(columns=["START_UTC", "LAT", "LON"])
    prov.insert(1, "DATE", tows["START_UTC"].str[:10])
    prov.insert(2, "TIME", tows["START_UTC"].str[11:])
    prov.insert(3, "LAT", [_dm(v, "lat") for v in tows["LAT"]])
    prov.insert(4, "LON", [_dm(v, "lon") for v in tows["LON"]])
    prov.to_csv(study_dir / "tows_provider.csv", index=False)
    fractions = {0.25: "1/4", 0.5: "50%", 1.0: "1", 0.125: "1/8"}
    counts.assign(SPLIT=[fractions[v] for v in counts["SPLIT"]]).to_csv(study_dir / "counts_provider.csv", index=False)
    decimal = """[source]
id = "keldmar_plankton"
kind = "plankton"
provider_type = "agency"
protocol = "keldmar_plankton_net"

[columns.events]
event_id = "TOW"
time = "START_UTC"
lat = "LAT"
lon = "LON"
depth_min_m = "Z_TOP"
depth_max_m = "Z_BOTTOM"
bottom_depth_m = "WATER_DEPTH"
mouth_diameter_m = "NET_CM"
flowmeter_revs = "REVS"

[columns.records]
event_id = "TOW"
taxon = "TAXON"
life_stage = "STAGE"
count = "N"
split_fraction = "SPLIT"

[units]
mouth_diameter_m = "cm"

[constants]
m_per_rev = 0.26873
"""
    (study_dir / "profiles" / "plankton_decimal.toml").write_text(decimal)
    provider = decimal.replace('id = "keldmar_plankton"', 'id = "keldmar_plankton_provider"')
    provider = provider.replace('time = "START_UTC"', 'time = ["DATE", "TIME"]')
    provider += '\n[formats]\nlat = "degrees_minutes"\nlon = "degrees_minutes"\n'
    (study_dir / "profiles" / "plankton_provider.toml").write_text(provider)


def _observations(study_dir: Path, source_id: str) -> pd.DataFrame:
    with Store(study_dir / "store").connect() as con:
        return con.execute("SELECT event_id, event_start, lat, lon, variable, value, density, effort FROM observations "
                           "WHERE source_id = ? ORDER BY event_id, variable", [source_id]).df()


def test_provider_files_give_the_same_numbers_as_decimal_files(study_dir: Path) -> None:
    _provider_copy(study_dir)
    study = load_study(study_dir)
    a = run(study, "plankton_decimal", {"events": study_dir / "tows.csv", "records": study_dir / "counts.csv"})
    b = run(study, "plankton_provider", {"events": study_dir / "tows_provider.csv",
                                         "records": study_dir / "counts_provider.csv"})
    assert a.rows_quarantined == 0 and b.rows_quarantined == 0, b.quarantine
    x, y = _observations(study_dir, "keldmar_plankton"), _observations(study_dir, "keldmar_plankton_provider")
    assert len(x) == len(y) > 0
    pd.testing.assert_series_equal(x["event_start"], y["event_start"])
    # positions written to 1/1000 of a minute: 0.001' = 1/60000 degree
    np.testing.assert_allclose(y["lat"], x["lat"], atol=1 / 60000)
    np.testing.assert_allclose(y["lon"], x["lon"], atol=1 / 60000)
    np.testing.assert_allclose(y["value"], x["value"], rtol=1e-12)
    np.testing.assert_allclose(y["density"], x["density"], rtol=1e-12)


def test_provider_format_mistakes_are_named(study_dir: Path) -> None:
    _provider_copy(study_dir)
    (study_dir / "tows_provider.csv").write_text((study_dir / "tows_provider.csv").read_text()
                                                 .replace("43°00.000'N", "43.0", 1))
    result = run_cli("--study", str(study_dir), "check", "plankton_provider",
                     "--events", str(study_dir / "tows_provider.csv"), "--records", str(study_dir / "counts_provider.csv"))
    assert result.exit_code == 1
    assert ("tows_provider.csv row 1: [bad_type] lat (column 'LAT'): '43.0' is not a position in degrees minutes "
            "(expected e.g. 41°50.159'N)") in result.stdout


@pytest.mark.parametrize(("section", "match"), [
    ('[formats]\nsplit_fraction = "degrees_minutes"\n', r"formats\.split_fraction: 'degrees_minutes' does not apply to split_fraction; expected one of decimal, percent"),
    ('[formats]\nlat = "dms"\n', r"formats\.lat: 'dms' is not a format; expected one of decimal, degrees_minutes"),
    ('[formats]\nlatt = "degrees_minutes"\n', r"formats\.latt: 'latt' is not a field of the plankton adapter; did you mean 'lat'\?"),
])
def test_bad_format_options_are_config_errors(study_dir: Path, section: str, match: str) -> None:
    _provider_copy(study_dir)
    path = study_dir / "profiles" / "plankton_decimal.toml"
    path.write_text(path.read_text() + "\n" + section)
    study = load_study(study_dir)
    with pytest.raises(ConfigError, match=match):
        run(study, "plankton_decimal", {"events": study_dir / "tows.csv", "records": study_dir / "counts.csv"},
            write=False)


def test_two_columns_only_for_a_date_time_field(study_dir: Path) -> None:
    _provider_copy(study_dir)
    path = study_dir / "profiles" / "plankton_provider.toml"
    path.write_text(path.read_text().replace('event_id = "TOW"', 'event_id = ["TOW", "DATE"]', 1))
    with pytest.raises(ConfigError, match=r"columns\.events\.event_id: two columns \(date, time\) can be joined "
                                          r"for a date-time field only"):
        run(load_study(study_dir), "plankton_provider", {"events": study_dir / "tows_provider.csv",
                                                         "records": study_dir / "counts_provider.csv"}, write=False)


def test_effort_profiles_refuse_formats(study_dir: Path) -> None:
    path = study_dir / "profiles" / "effort_pings.toml"
    path.write_text(path.read_text() + '\n[formats]\nlat = "degrees_minutes"\n')
    result = run_cli("--study", str(study_dir), "check", "effort_pings", "x.csv")
    assert result.exit_code == 2
    assert "formats.lat: [formats] and date and time in two columns are read for trawl, plankton, transect and " \
           "opportunistic files only" in result.stderr


# --------------------------------------------------------------------------- swapped positions
def test_swapped_positions_are_told_once_per_file_with_a_count(study_dir: Path) -> None:
    hauls = study_dir / "hauls_messy.csv"
    result = run_cli("--study", str(study_dir), "check", "trawl_agency", "--events", str(hauls),
                     "--records", str(study_dir / "catch_messy.csv"), "--all")
    lines = [ln for ln in result.stdout.splitlines() if "swapped" in ln]
    # one haul of the fixture has its latitude and longitude swapped: its start and end positions
    assert lines == ["hauls_messy.csv: 2 positions lie outside the study domain but would lie inside it with "
                     "latitude and longitude swapped; check which columns the profile maps to the latitude and "
                     "longitude fields"]


def _pings(lat: list[float], lon: list[float], sog: list[float]) -> str:
    times = pd.date_range("2021-06-01T08:00:00Z", periods=len(lat), freq="30min")
    rows = [f"ALPHA-1,{t:%Y-%m-%dT%H:%M:%SZ},{la},{lo},{s},OTB" for t, la, lo, s in zip(times, lat, lon, sog, strict=True)]
    return "vessel,time_utc,lat,lon,sog,gear\n" + "\n".join(rows) + "\n"


def test_port_pings_are_not_taken_for_swapped_coordinates(study_dir: Path) -> None:
    fishing = ([42.9 + 0.01 * i for i in range(6)], [-152.2] * 6, [3.0] * 6)
    # a vessel at anchor in a harbour north of the domain (the Keldmar Sea is 42-45 N, 154-150 W)
    port = ([46.1] * 20, [-149.2] * 20, [0.0] * 20)
    (study_dir / "port.csv").write_text(_pings(fishing[0] + port[0], fishing[1] + port[1], fishing[2] + port[2]))
    swapped = (fishing[1][:3], fishing[0][:3], [3.0] * 3)  # latitude and longitude exchanged
    (study_dir / "swapped.csv").write_text(_pings(fishing[0] + swapped[0], fishing[1] + swapped[1],
                                                  fishing[2] + swapped[2]))
    port_run = run_cli("--study", str(study_dir), "check", "effort_pings", str(study_dir / "port.csv"), "--json")
    assert port_run.exit_code == 1  # the port pings are outside the domain: quarantined, but not "swapped"
    doc = json.loads(port_run.stdout)
    assert doc["results"][0]["quarantined_by_reason"] == {"outside_domain": 20}
    assert not [n for n in doc["results"][0]["notes"] if "swapped" in n]
    swap_run = run_cli("--study", str(study_dir), "check", "effort_pings", str(study_dir / "swapped.csv"), "--json")
    notes = [n for n in json.loads(swap_run.stdout)["results"][0]["notes"] if "swapped" in n]
    assert notes == ["swapped.csv: 3 positions lie outside the study domain but would lie inside it with latitude "
                     "and longitude swapped; check which columns the profile maps to the latitude and longitude fields"]
    # one such ping: the sentence in the singular
    (study_dir / "one.csv").write_text(_pings(fishing[0] + swapped[0][:1], fishing[1] + swapped[1][:1],
                                              fishing[2] + [3.0]))
    one_run = run_cli("--study", str(study_dir), "check", "effort_pings", str(study_dir / "one.csv"), "--json")
    notes = [n for n in json.loads(one_run.stdout)["results"][0]["notes"] if "swapped" in n]
    assert notes == ["one.csv: 1 position lies outside the study domain but would lie inside it with latitude "
                     "and longitude swapped; check which columns the profile maps to the latitude and longitude fields"]


def test_demo_provider_ingests_as_sent(tmp_path: Path) -> None:
    from harmonize.demo.sea import write_study
    from harmonize.demo.sources.plankton import generate

    folder = tmp_path / "demo"
    write_study(folder)
    item = next(i for i in generate(folder, np.random.default_rng(7)) if "vossa" in i.profile)
    stations = pd.read_csv(folder / item.inputs["events"], dtype=str)
    sorting = pd.read_csv(folder / item.inputs["records"], dtype=str, keep_default_na=False)
    # the files are as the ship writes them: no outside conversion before the ingest
    assert stations["Latitude"].str.fullmatch(r"\d+°\d\d\.\d{3}'N").all()
    assert {"Date", "Time (UTC)"} <= set(stations.columns)
    assert (sorting["Split"] == "1/4").any()
    result = run(load_study(folder), folder / item.profile, {r: folder / p for r, p in item.inputs.items()})
    assert result.rows_quarantined == 0 and result.rows_read == len(stations) + len(sorting)
    with Store(folder / "store").connect() as con:
        obs = con.execute("SELECT event_id, variable, life_stage, value FROM observations "
                          "WHERE source_id = 'vossa_larvae' AND NOT zero_filled").df()
    quarter = sorting[sorting["Split"] == "1/4"].iloc[0]
    taxon = {"copelix": "Copelix marina", "copelix marina": "Copelix marina", "keld krill": "Thysseia borealis",
             "thysseia borealis": "Thysseia borealis", "nauplia keldica": "Nauplia keldica"}[quarter["Species"].lower()]
    hit = obs[(obs["event_id"] == quarter["Station"]) & (obs["variable"] == taxon)]
    # a quarter split counted n animals: the sample held 4 n (BCO-DMO: count / split)
    assert int(quarter["Counted"]) * 4 in set(hit["value"].round(9))
