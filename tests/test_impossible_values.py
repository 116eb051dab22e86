"""Impossible values are refused: study grid settings, CRS, domain polygons, and numbers outside
each field's documented physical bounds."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pyproj
import pytest

from harmonize import load_study
from harmonize.errors import ConfigError
from harmonize.ingest import run


def _edit(study_dir: Path, old: str, new: str) -> None:
    path = study_dir / "study.toml"
    text = path.read_text()
    assert old in text
    path.write_text(text.replace(old, new))


@pytest.mark.parametrize(
    ("new", "pattern"),
    [
        ("cell_size_km = inf", r"study\.cell_size_km: expected a finite number, got inf"),
        ("cell_size_km = nan", r"study\.cell_size_km: expected a finite number, got nan"),
        # the Keldmar domain is about 330 x 330 km: 50 m cells are about 4.4e7 cells
        ("cell_size_km = 0.05", r"study\.cell_size_km: 0\.05 km makes about [\d,]+ cells over the domain "
                                r"\(\d{3} x \d{3} km\); at most 10,000,000"),
        ("cell_size_km = 5000", r"study\.cell_size_km: 5000 km is larger than the domain"),
    ],
)
def test_grid_settings_must_be_finite_and_reasonable(study_dir: Path, new: str, pattern: str) -> None:
    _edit(study_dir, "cell_size_km = 25", new)
    with pytest.raises(ConfigError, match=pattern) as info:
        load_study(study_dir)
    assert "\n" not in str(info.value)


def test_a_crs_that_is_not_equal_area_is_refused(study_dir: Path) -> None:
    # Web Mercator exaggerates areas by about sec^2(latitude) (Snyder 1987, Map Projections: A
    # Working Manual, USGS PP 1395, ch. 7): 1.87 at 43 N. Checked here with pyproj itself.
    factors = pyproj.Proj("EPSG:3857").get_factors(-152.0, 43.0)
    assert factors.areal_scale == pytest.approx(1 / np.cos(np.radians(43.0)) ** 2, rel=0.01)
    _edit(study_dir, 'crs = "EPSG:6933"', 'crs = "EPSG:3857"')
    # the domain spans 42-45 N: sec^2 from 1.81 to 2.00
    low, high = (f"{1 / np.cos(np.radians(a)) ** 2:.3g}" for a in (42.0, 45.0))
    with pytest.raises(ConfigError, match=r"study\.crs: 'EPSG:3857' is not equal-area over the domain: "
                                          rf"the true area of one grid cell varies by a factor {low} to {high} "):
        load_study(study_dir)
    # an equal-area CRS of the region (Lambert azimuthal equal-area) is accepted
    _edit(study_dir, 'crs = "EPSG:3857"', 'crs = "+proj=laea +lat_0=43.5 +lon_0=-152 +datum=WGS84 +units=m"')
    assert load_study(study_dir).crs.startswith("+proj=laea")


def _domain(study_dir: Path, ring: list[list[float]]) -> None:
    doc = {"type": "FeatureCollection", "features": [
        {"type": "Feature", "properties": {}, "geometry": {"type": "Polygon", "coordinates": [ring]}}]}
    (study_dir / "domain.geojson").write_text(json.dumps(doc))


def test_a_domain_with_nan_or_a_self_intersection_is_refused(study_dir: Path) -> None:
    _domain(study_dir, [[-154.0, 42.0], [-150.0, 42.0], [float("nan"), 45.0], [-154.0, 45.0], [-154.0, 42.0]])
    with pytest.raises(ConfigError, match=r"study\.domain: feature 1 has a coordinate that is not a finite number"):
        load_study(study_dir)
    # a bow tie: the ring crosses itself
    _domain(study_dir, [[-154.0, 42.0], [-150.0, 45.0], [-150.0, 42.0], [-154.0, 45.0], [-154.0, 42.0]])
    with pytest.raises(ConfigError, match=r"study\.domain: feature 1 is not a valid polygon \(Self-intersection"
                                          r"\[-152 43\.5\]\); repair it, e\.g\. with shapely\.make_valid\(\)"):
        load_study(study_dir)


def test_numbers_outside_physical_bounds_are_quarantined(study_dir: Path) -> None:
    # wing spread 1e308 m gave infinite area swept, density and grid totals; 100 km was accepted.
    # Bounds (docs/reliability.md): net width <= 300 m, depths <= 11,000 m (the deepest sounding
    # is about 10.9 km, Challenger Deep; from memory), counts <= 1e9, catch weight <= 1,000 t.
    hauls = (study_dir / "hauls_messy.csv").read_text().splitlines()
    header = hauls[0].split(",")
    wing, depth = header.index("WING_M"), header.index("DEPTH_FM")
    rows = [line.split(",") for line in hauls[1:4]]
    rows[0][wing] = "1e308"
    rows[1][wing] = "100000"
    rows[2][depth] = "7000"  # fathoms: 12,802 m
    bad = study_dir / "hauls_bad.csv"
    bad.write_text("\n".join([hauls[0], *(",".join(r) for r in rows), *hauls[4:]]) + "\n")
    result = run(load_study(study_dir), "trawl_agency", {"events": bad, "records": study_dir / "catch_messy.csv"},
                 write=False)
    q = result.quarantine
    events = q[q["source_file"] == "hauls_bad.csv"].set_index("source_row")
    for row, needle in ((1, "= 1e308 m"), (2, "= 100000 m"), (3, "= 7000 fathom is outside the allowed range (0 to 11000 m)")):
        assert events.loc[row, "reason_code"] == "out_of_range", events.loc[row, "message"]
        assert needle in events.loc[row, "message"], events.loc[row, "message"]
    assert np.isfinite(result.rows_read)


def test_dates_after_2262_or_in_year_1_are_bad_times_not_internal_errors(study_dir: Path) -> None:
    # pandas nanosecond times end on 2262-04-11: a haul in 2300 once ended in OutOfBoundsDatetime.
    hauls = (study_dir / "hauls_messy.csv").read_text()
    hauls = hauls.replace("2020-06-10T08:00:00,2020-06-10T08:30:00", "2300-06-10T08:00:00,2300-06-10T08:30:00")
    hauls = hauls.replace("2020-06-11 09:00,2020-06-11 09:30", "0001-06-11 09:00,0001-06-11 09:30")
    bad = study_dir / "hauls_dates.csv"
    bad.write_text(hauls)
    result = run(load_study(study_dir), "trawl_agency", {"events": bad, "records": study_dir / "catch_messy.csv"},
                 write=False)
    q = result.quarantine
    events = q[q["source_file"] == "hauls_dates.csv"].set_index("source_row")
    assert events.loc[1, "reason_code"] == "bad_time" and "lies in the future" in events.loc[1, "message"]
    assert events.loc[2, "reason_code"] == "bad_time"
    assert result.rows_read == result.rows_accepted + result.rows_quarantined


@pytest.mark.parametrize("text", ["01-01-2021", "2021-01-01", "01/01/2021", "1.1.2021"])
def test_a_date_alone_is_local_whatever_its_separators(text: str) -> None:
    # With timezone = "Pacific/Auckland", "01-01-2021" was read as UTC (its "-2021" taken for an
    # offset) while "2021-01-01" was local. One rule: a date alone carries no offset.
    import types
    from datetime import UTC, datetime
    from zoneinfo import ZoneInfo

    import pandas as pd

    from harmonize.clock import parse_times

    profile = types.SimpleNamespace(time_format=None, dayfirst=True, timezone="Pacific/Auckland", ambiguous_times=None)
    out, bad, *_ = parse_times(pd.Series([text, "2021-01-01T08:00:00+02:00"], dtype="string"), profile)
    local_midnight = datetime(2021, 1, 1, tzinfo=ZoneInfo("Pacific/Auckland")).astimezone(UTC).replace(tzinfo=None)
    assert not bad.any()
    assert out.iloc[0] == pd.Timestamp(local_midnight)  # 2020-12-31 11:00 UTC (NZDT, UTC+13)
    assert out.iloc[1] == pd.Timestamp("2021-01-01 06:00")  # an offset after a time still counts


@pytest.mark.parametrize(("text", "utc"), [
    ("2022-11-06 08:20:25-06", "2022-11-06 14:20:25"),
    ("2022-11-06T08:20-06", "2022-11-06 14:20:00"),
    ("2022-11-06T08:20:25.5+05", "2022-11-06 03:20:25.5"),
])
def test_an_offset_of_whole_hours_after_a_time_is_honoured(text: str, utc: str) -> None:
    # ISO 8601 lets an offset be written as hours alone (+hh), from memory. Such a text among
    # texts without an offset crashed the retry parse ("Mixed timezones detected"), found by
    # tests/test_fuzz_adapters.py; the offset now counts, as +hh:mm does.
    import types

    import pandas as pd

    from harmonize.clock import parse_times

    profile = types.SimpleNamespace(time_format=None, dayfirst=False, timezone="America/Chicago", ambiguous_times=None)
    out, bad, *_ = parse_times(pd.Series([text, "2022-11-06 08:00"], dtype="string"), profile)
    assert not bad.any()
    assert out.iloc[0] == pd.Timestamp(utc)
    assert out.iloc[1] == pd.Timestamp("2022-11-06 14:00")  # CST (UTC-6) after the clocks went back


@pytest.mark.parametrize("odd", ["20221106 082025-06", "2022-11-06 08:20:25 UTC-6"])
def test_an_offset_in_an_unknown_form_is_a_bad_time_not_a_crash(odd: str, study_dir: Path) -> None:
    # an offset the reader does not know as one must not be read in the profile's zone
    # (a silent shift), nor crash the reader: the row is quarantined bad_time
    hauls = (study_dir / "hauls_messy.csv").read_text(encoding="utf-8").splitlines()
    header = hauls[0].split(",")
    col = header.index("START")
    cells = hauls[1].split(",")
    cells[col] = odd
    bad = study_dir / "hauls_odd_offset.csv"
    bad.write_text("\n".join([hauls[0], ",".join(cells), *hauls[2:]]) + "\n", encoding="utf-8")
    result = run(load_study(study_dir), "trawl_agency", {"events": bad, "records": study_dir / "catch_messy.csv"},
                 write=False)
    q = result.quarantine
    row = q[(q["source_file"] == "hauls_odd_offset.csv") & (q["source_row"] == 1)]
    assert row["reason_code"].tolist() == ["bad_time"]
    assert f"holds '{odd}', which is not a date-time" in row["message"].iloc[0]
