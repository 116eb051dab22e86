"""Incomplete periods: a season year the data do not cover to its end is marked and left out of drops."""

from __future__ import annotations

import re
from pathlib import Path

import pandas as pd
import pytest
from audit_stores import _frame, copy_fixture_study
from factories import store_frames

from harmonize.audit.periods import incomplete_periods
from harmonize.audit.run import audit, domain_cells
from harmonize.study import load_study

WINTER_MONTHS = ((-1, 12), (0, 1), (0, 2))  # (year offset, month): December belongs to the next winter
SEASONS = {"winter": (12, 1, 2), "spring": (3, 4, 5), "summer": (6, 7, 8), "autumn": (9, 10, 11)}


@pytest.fixture(scope="module")
def result(tmp_path_factory: pytest.TempPathFactory):  # type: ignore[no-untyped-def]
    """A monthly gridded field over 30 cells, winters 2019-2022 whole, then December 2022 alone.

    Its December 2022 covers 10 cells only (a third of the usual), so without the incomplete
    rule winter 2023 would be a coverage_drop. A summer trawl survey ends each year around
    mid-August, 2023 included: its last summer is complete.
    """
    study = load_study(copy_fixture_study(tmp_path_factory.mktemp("periods") / "study"))
    cells = domain_cells(study).reset_index(drop=True).iloc[:30]
    ev, va = [], []
    for season_year in range(2019, 2024):
        months = WINTER_MONTHS if season_year < 2023 else WINTER_MONTHS[:1]
        for dy, month in months:
            n = 30 if season_year < 2023 else 10
            for c in cells.iloc[:n].itertuples(index=False):
                eid = f"{c.cell_id}_{season_year + dy}-{month:02d}"
                ev.append({"event_id": eid, "event_start": f"{season_year + dy}-{month:02d}-01", "lat": c.lat,
                           "lon": c.lon, "cell_id": c.cell_id, "depth_layer": "surface", "effort": 625.0})
                va.append({"event_id": eid, "variable": "sea_surface_temperature", "value": 5.0,
                           "variable_kind": "physical", "quantity": "measurement", "unit": "degC"})
    store_frames(study, _frame(ev, {"effort_unit": "km2"}),
                 _frame(va, {"zero_filled": False, "no_effort": False}), source_id="sat_sst", kind="gridded",
                 provider_type="remote_sensing")
    ev, va = [], []
    for year in range(2019, 2024):
        for k, c in enumerate(cells.iloc[:8].itertuples(index=False)):
            eid = f"t{year}{k}"
            day = 10 + k + (year % 3)  # the cruise ends between 17 and 19 August
            ev.append({"event_id": eid, "event_start": f"{year}-08-{day:02d} 08:00", "lat": c.lat, "lon": c.lon,
                       "depth_layer": "near_bottom"})
            va.append({"event_id": eid, "variable": "Ostravix keldensis", "value": 2.0,
                       "variable_kind": "taxon", "quantity": "count", "unit": "1"})
    store_frames(study, _frame(ev, {"effort": 0.05, "effort_unit": "km2"}),
                 _frame(va, {"zero_filled": False, "no_effort": False}), source_id="shelf_trawl", kind="trawl")
    return audit(study)


def test_the_cut_winter_is_marked_incomplete(result) -> None:  # type: ignore[no-untyped-def]
    p = result.metrics.periods
    assert [tuple(r) for r in p[["source_id", "season_year", "season", "status"]].itertuples(index=False)] == [
        ("sat_sst", 2023, "winter", "cut")]
    cov = result.coverage.set_index(["source_kind", "season_year", "season"])
    assert not cov.loc[("gridded", 2023, "winter"), "complete"]
    assert cov.loc[("gridded", 2022, "winter"), "complete"]
    # the trawl's last summer ends in August like every other: complete
    assert cov.loc[("trawl", 2023, "summer"), "complete"]


def test_an_incomplete_season_fires_no_drop(result) -> None:  # type: ignore[no-untyped-def]
    cov = result.coverage.set_index(["source_kind", "season_year", "season"])
    # 10 of the 30 cells is below 0.5 x the earlier median: a drop, were the season complete
    assert cov.loc[("gridded", 2023, "winter"), "cells_sampled"] == 10
    assert not [f for f in result.findings if f.code in ("coverage_drop", "thin_samples", "no_samples")
                and f.season_year == 2023]


def test_report_shows_the_incomplete_year_apart(result, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    html = result.write_html(tmp_path / "r.html").read_text(encoding="utf-8")
    assert "2019-2022 (2023 incomplete)" in html
    assert "winter 2023: incomplete" in html
    # the trend line of winter joins 2019-2022 only: four points
    lines = re.findall(r'<polyline points="([^"]+)"', html)
    assert any(len(pts.split()) == 4 for pts in lines)


def test_months_not_reached_after_the_data_end() -> None:
    # a source sampled every season until its data stop in the spring of 2021
    last = pd.DataFrame({
        "source_kind": "plankton", "source_id": "net",
        "season_year": [2020, 2020, 2020, 2020, 2021, 2021],
        "season": ["winter", "spring", "summer", "autumn", "winter", "spring"],
        "last_start": pd.to_datetime(["2020-02-10", "2020-05-12", "2020-08-01", "2020-11-03", "2021-02-11",
                                      "2021-03-20"], utc=True),
    })
    got = incomplete_periods(last, SEASONS)
    # spring 2021 ends in March (earlier springs ran to May); summer and autumn were not reached
    assert list(zip(got["season"], got["status"], strict=True)) == [
        ("spring", "cut"), ("summer", "not reached"), ("autumn", "not reached")]
