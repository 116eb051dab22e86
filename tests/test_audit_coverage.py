"""Coverage fractions on a tiny grid counted by hand; season years; suppression of confidential effort."""

from __future__ import annotations

import json
import re
from pathlib import Path

import pyproj
import pytest
from audit_stores import _frame, copy_fixture_study
from factories import store_frames

from harmonize.audit.run import audit, domain_cells
from harmonize.study import Study, load_study

CELL_M = 25_000.0
IX, IY = range(100, 104), range(180, 182)  # 4 x 2 cells of the EPSG:6933 grid
_TO_LONLAT = pyproj.Transformer.from_crs("EPSG:6933", "EPSG:4326", always_xy=True)


def _lonlat(x_cells: float, y_cells: float) -> tuple[float, float]:
    lon, lat = _TO_LONLAT.transform(x_cells * CELL_M, y_cells * CELL_M)
    return float(lon), float(lat)


def _ring(x0: float, x1: float, y0: float, y1: float) -> list[list[float]]:
    corners = [(x0, y0), (x1, y0), (x1, y1), (x0, y1), (x0, y0)]
    return [list(_lonlat(x, y)) for x, y in corners]


def _feature(ring: list[list[float]], props: dict) -> dict:
    return {"type": "Feature", "properties": props, "geometry": {"type": "Polygon", "coordinates": [ring]}}


@pytest.fixture
def tiny(tmp_path: Path) -> Study:
    """The Keldmar study on a domain whose cells are known by construction.

    EPSG:6933 is a cylindrical equal-area projection: x depends on longitude only and y on
    latitude only, so a longitude-latitude rectangle is a rectangle of the grid. The domain
    runs from 0.2 into cell 100 to 0.8 into cell 103 in x, and from 0.2 into cell 180 to 0.8
    into cell 181 in y: the centres of exactly 4 x 2 = 8 cells lie inside (hand count).
    """
    root = copy_fixture_study(tmp_path / "tiny")
    domain = {"type": "FeatureCollection", "features": [_feature(_ring(100.2, 103.8, 180.2, 181.8), {"name": "tiny"})]}
    strata = {"type": "FeatureCollection", "features": [
        _feature(_ring(100.2, 102.0, 180.2, 181.8), {"stratum": "West"}),
        _feature(_ring(102.0, 103.8, 180.2, 181.8), {"stratum": "East"})]}
    (root / "domain.geojson").write_text(json.dumps(domain), encoding="utf-8")
    (root / "strata.geojson").write_text(json.dumps(strata), encoding="utf-8")
    return load_study(root)


def _centre(ix: int, iy: int) -> tuple[float, float]:
    return _lonlat(ix + 0.5, iy + 0.5)


def _hauls(rows: list[tuple[str, int, int]]) -> tuple:  # type: ignore[type-arg]
    ev = []
    for k, (when, ix, iy) in enumerate(rows):
        lon, lat = _centre(ix, iy)
        ev.append({"event_id": f"h{k}", "event_start": when, "lon": lon, "lat": lat, "depth_layer": "near_bottom"})
    # each catch is stored twice, as a count and as a biomass
    va = [{"event_id": e["event_id"], "variable": "Ostravix keldensis", "value": 3.0} for e in ev]
    va += [{"event_id": e["event_id"], "variable": "Ostravix keldensis", "value": 1.5, "quantity": "biomass",
            "unit": "kg"} for e in ev]
    return _frame(ev, {}), _frame(va, {"variable_kind": "taxon", "quantity": "count", "unit": "1",
                                      "zero_filled": False, "no_effort": False})


def test_domain_cells_match_the_hand_count(tiny: Study) -> None:
    cells = domain_cells(tiny)
    assert sorted(cells["cell_id"]) == sorted(f"x{ix}_y{iy}" for ix in IX for iy in IY)


def test_coverage_fraction_and_season_year(tiny: Study) -> None:
    store_frames(tiny, *_hauls([
        # Meteorological seasons: December belongs to the winter of the following January
        # (WMO practice of DJF seasons, e.g. WMO-No. 1203, 2017, Guidelines on the Calculation
        # of Climate Normals; from memory) -- and the contract's rule 2019-12-15 -> winter 2020.
        ("2019-12-15 09:00", 100, 180),
        ("2020-01-10 09:00", 101, 181),
        ("2020-02-20 09:00", 103, 180),
        ("2020-01-11 09:00", 100, 180),   # a second haul in an already sampled cell
        ("2020-03-01 09:00", 102, 181),   # spring
    ]), source_id="tiny_trawl", kind="trawl")
    result = audit(tiny)
    cov = result.coverage.set_index(["source_kind", "season_year", "season"])
    winter = cov.loc[("trawl", 2020, "winter")]
    # hand count: 4 hauls in 3 of the 8 domain cells; cells 100 and 101 are West, 103 East
    assert (winter["events"], winter["cells_sampled"], winter["strata_sampled"]) == (4, 3, 2)
    assert winter["coverage_fraction"] == pytest.approx(3 / 8)
    spring = cov.loc[("trawl", 2020, "spring")]
    assert (spring["events"], spring["cells_sampled"], spring["coverage_fraction"]) == (1, 1, pytest.approx(1 / 8))
    assert list(result.coverage["season_year"]) == [2020, 2020]
    # 4 and 1 hauls are fewer than the study's min_events = 5
    thin = sorted((f.season, f.details["events"]) for f in result.findings if f.code == "thin_samples")
    assert thin == [("spring", 1), ("winter", 4)]
    # a catch stored as count and biomass is one record, not two
    # one few_encounters finding per taxon, at its best season x layer (winter: 4 of 4 hauls)
    few = sorted((f.season, f.details["encounters"], f.details["samples"])
                 for f in result.findings if f.code == "few_encounters")
    assert few == [("winter", 4, 4)]
    table = result.readiness.table.set_index("season")
    assert (table.loc["spring", "encounters"], table.loc["spring", "samples"]) == (1, 1)


def test_confidential_effort_cells_are_not_named(tiny: Study, tmp_path: Path) -> None:
    store_frames(tiny, *_hauls([("2020-01-10 09:00", 101, 181)]), source_id="tiny_trawl", kind="trawl")
    months = [  # cell, month, distinct vessels
        ((100, 180), 1, 5),
        ((101, 180), 1, 2), ((101, 180), 2, 1),   # always fewer than 3 vessels: suppressed
        ((102, 180), 1, 1), ((102, 180), 2, 4),   # one month publishable: the cell is shown
    ]
    ev, va = [], []
    for k, ((ix, iy), month, vessels) in enumerate(months):
        lon, lat = _centre(ix, iy)
        eid = f"x{ix}_y{iy}_2020-{month:02d}"
        ev.append({"event_id": eid, "event_start": f"2020-{month:02d}-01", "lon": lon, "lat": lat,
                   "cell_id": f"x{ix}_y{iy}", "depth_layer": "surface", "effort": 10.0 + k, "effort_unit": "h"})
        va.append({"event_id": eid, "variable": "fishing_hours", "variable_kind": "effort", "quantity": "measurement",
                   "unit": "h", "value": 10.0 + k, "n_vessels": vessels})
    store_frames(tiny, _frame(ev, {}), _frame(va, {"zero_filled": False, "no_effort": False}),
                 source_id="fleet_logbooks", kind="effort", provider_type="industry")
    result = audit(tiny)
    row = result.coverage.set_index(["source_kind", "season_year", "season"]).loc[("effort", 2020, "winter")]
    # the confidential rows are withheld whole: in no count by period (harmonize.disclosure)
    assert (row["cells_sampled"], row["cells_suppressed"], row["events"]) == (2, 0, 2)
    maps = result.metrics.cell_maps
    assert set(maps.loc[maps["source_kind"] == "effort", "cell_id"]) == {"x100_y180", "x102_y180"}
    assert result.suppression() == {"min_vessels": 3, "cells_suppressed": 1, "cell_years_suppressed": 1,
                                    "events_suppressed": 3}
    text_json = result.write_json(tmp_path / "a.json").read_text(encoding="utf-8")
    text_html = result.write_html(tmp_path / "a.html").read_text(encoding="utf-8")
    for text in (text_json, text_html):
        assert "x101_y180" not in text
    assert '"cells_suppressed": 1' in text_json     # the total, in the confidentiality block
    assert "1 grid cell (1 cell-year) is therefore not shown" in text_html
    # fishing effort is not a survey: no thin_samples or coverage_drop about it
    assert not any(f.source_kind == "effort" for f in result.findings)


def test_counts_are_labelled_apart_and_cells_outside_the_domain_never_count(tiny: Study, tmp_path: Path) -> None:
    # two hauls in the domain, one in cell x99_y180 whose centre lies west of the domain's edge
    store_frames(tiny, *_hauls([("2020-07-10 09:00", 100, 180), ("2020-07-11 09:00", 101, 181),
                                ("2020-07-12 09:00", 99, 180)]), source_id="tiny_trawl", kind="trawl")
    ev, va = [], []
    for ix in IX:  # a gridded field: one cell-period per domain cell
        lon, lat = _centre(ix, 180)
        eid = f"x{ix}_y180_2020-07"
        ev.append({"event_id": eid, "event_start": "2020-07-01", "lon": lon, "lat": lat, "cell_id": f"x{ix}_y180",
                   "depth_layer": "surface", "effort": 625.0, "effort_unit": "km2"})
        va.append({"event_id": eid, "variable": "sea_surface_temperature", "variable_kind": "physical",
                   "quantity": "measurement", "unit": "degC", "value": 12.0})
    store_frames(tiny, _frame(ev, {}), _frame(va, {"zero_filled": False, "no_effort": False}),
                 source_id="sst", kind="gridded", provider_type="remote_sensing")
    result = audit(tiny)
    maps = result.metrics.cell_maps
    assert "x99_y180" not in set(maps["cell_id"])
    assert set(maps.loc[maps["source_kind"] == "trawl", "cell_id"]) == {"x100_y180", "x101_y181"}
    row = result.coverage.set_index(["source_kind", "season_year", "season"]).loc[("trawl", 2020, "summer")]
    assert (row["events"], row["cells_sampled"]) == (3, 2)  # the haul counts as a sample, its cell not as domain
    html = result.write_html(tmp_path / "r.html").read_text(encoding="utf-8")
    # 3 biological samples and 4 gridded cell-periods, never one total of 7
    assert '<b>3</b><span>biological samples</span>' in html
    assert '<b>4</b><span>gridded cell-periods</span>' in html
    assert not re.search(r"<b>7</b><span>[^<]*(samples|events|periods)", html)
