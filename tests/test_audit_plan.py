"""harmonize plan: where added samples go (proportional allocation, maximin spread), and bad arguments."""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pyproj
import pytest
import shapely
from factories import store_frames
from hypothesis import given
from hypothesis import strategies as st

from harmonize.audit.plan import plan_samples, propose
from harmonize.errors import HarmonizeError
from harmonize.study import load_study

BIN = Path(sys.executable).parent / "harmonize"
CRS = "EPSG:6933"
CELL_M = 25_000.0
#: Columns of 25 km cells per stratum (west to east) and rows of the domain: areas 2 : 6 : 8.
COLUMNS = {"Skerra Narrows": 2, "Vossa Bank": 6, "Thorne Deep": 8}
ROWS = 8
IX0, IY0 = -594, 200  # a grid-aligned corner near 154 W, 42.6 N in EPSG:6933


def _lonlat(ix: float, iy: float) -> tuple[float, float]:
    lon, lat = pyproj.Transformer.from_crs(CRS, "EPSG:4326", always_xy=True).transform(ix * CELL_M, iy * CELL_M)
    return float(lon), float(lat)


def _rect(ix0: float, ix1: float) -> dict:
    (w, s), (e, n) = _lonlat(ix0, IY0), _lonlat(ix1, IY0 + ROWS)
    return {"type": "Polygon", "coordinates": [[[w, s], [e, s], [e, n], [w, n], [w, s]]]}


@pytest.fixture
def aligned_study(study_dir: Path) -> Path:
    """The fixture study with a domain and three strata whose edges lie on cell edges.

    A cylindrical equal-area CRS maps meridians and parallels to straight lines, so these
    lon/lat rectangles are exactly unions of grid cells: each stratum's area share is then
    its polygon area share, computed below without the code under test.
    """
    return _align(study_dir)


@pytest.fixture(scope="module")
def one_haul_study(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The aligned study with one haul, built once for the tests that only read it."""
    folder = tmp_path_factory.mktemp("plan") / "study"
    shutil.copytree(Path(__file__).resolve().parent.parent / "fixtures" / "keldmar", folder)
    _hauls(_align(folder), [(IX0, IY0)])
    return folder


def _align(study_dir: Path) -> Path:
    total = sum(COLUMNS.values())
    (study_dir / "domain.geojson").write_text(json.dumps({"type": "FeatureCollection", "features": [
        {"type": "Feature", "properties": {"name": "test"}, "geometry": _rect(IX0, IX0 + total)}]}))
    feats, ix = [], IX0
    for name, width in COLUMNS.items():
        feats.append({"type": "Feature", "properties": {"stratum": name}, "geometry": _rect(ix, ix + width)})
        ix += width
    (study_dir / "strata.geojson").write_text(json.dumps({"type": "FeatureCollection", "features": feats}))
    return study_dir


def _area_shares(study_dir: Path) -> dict[str, float]:
    """Stratum area shares from the polygons themselves (shapely area in the equal-area CRS)."""
    to_xy = pyproj.Transformer.from_crs("EPSG:4326", CRS, always_xy=True)
    feats = json.loads((study_dir / "strata.geojson").read_text())["features"]
    areas = {}
    for f in feats:
        ring = np.array(f["geometry"]["coordinates"][0])
        x, y = to_xy.transform(ring[:, 0], ring[:, 1])
        areas[f["properties"]["stratum"]] = shapely.Polygon(np.column_stack([x, y])).area
    total = sum(areas.values())
    return {k: v / total for k, v in areas.items()}


def _hauls(study_dir: Path, where: list[tuple[float, float]], year: int = 2021, season_day: str = "07-10",
           source_id: str = "survey") -> None:
    """One trawl haul (two catch rows) at each (ix, iy) cell centre."""
    study = load_study(study_dir)
    ev = pd.DataFrame([{"event_id": f"H{k}", "event_start": f"{year}-{season_day} 08:00",
                        "lon": _lonlat(ix + 0.5, iy + 0.5)[0], "lat": _lonlat(ix + 0.5, iy + 0.5)[1],
                        "depth_layer": "near_bottom", "bottom_depth_m": 50.0 + 10 * (ix - IX0)}
                       for k, (ix, iy) in enumerate(where)])
    va = pd.DataFrame([{"event_id": e, "variable": t, "value": 1.0} for e in ev["event_id"]
                       for t in ("Ostravix keldensis", "Lumbrena pallida")])
    store_frames(study, ev, va, source_id=source_id, kind="trawl", protocol="keldmar_bottom_trawl")


def test_an_empty_stratum_is_filled_first(aligned_study: Path) -> None:
    # 12 hauls in Vossa Bank (columns 2-7), none in the other two strata
    _hauls(aligned_study, [(IX0 + 2 + k % 6, IY0 + k // 6) for k in range(12)])
    shares = _area_shares(aligned_study)
    plan = plan_samples(load_study(aligned_study), "trawl", 10, seasons=["summer"])
    assert plan.request.season_year == 2021
    first = plan.stations["stratum"].tolist()
    # Vossa Bank holds 12 of 12 sampled cells for a share of 6/16: it gets nothing until the
    # others reach their share of the total (16/16 of 22 cells would be 8.25 for Thorne Deep)
    assert "Vossa Bank" not in first
    assert first[0] == "Thorne Deep"  # the largest deficit: the largest empty stratum
    before = plan.strata.set_index("stratum")["cells_sampled_before"]
    assert before.to_dict() == {"Skerra Narrows": 0, "Thorne Deep": 0, "Vossa Bank": 12}
    # both empty strata are served, neither ends above its area-proportional share of all
    # 22 sampled cells (2.75 and 11): the over-sampled stratum's excess is shared out
    after = plan.strata.set_index("stratum")["cells_sampled_after"]
    for name in ("Skerra Narrows", "Thorne Deep"):
        assert 1 <= after[name] <= shares[name] * 22
    # proposed cells are unsampled domain cells, each once
    assert plan.stations["cell_id"].is_unique
    assert not set(plan.stations["cell_id"]) & set(_cells_with_hauls(aligned_study))


def _cells_with_hauls(study_dir: Path) -> list[str]:
    import duckdb

    with duckdb.connect(str(study_dir / "store" / "harmonized.duckdb"), read_only=True) as con:
        # the views name their files relative to the store folder (docs/store.md)
        con.execute(f"SET file_search_path = '{study_dir / 'store'}'")
        return [r[0] for r in con.execute("SELECT DISTINCT cell_id FROM observations").fetchall()]


@pytest.mark.parametrize("n", [8, 16, 24, 40])
def test_balanced_study_spreads_samples_in_proportion_to_area(aligned_study: Path, n: int) -> None:
    # existing hauls proportional to area: 1, 3 and 4 cells (2 : 6 : 8)
    cells = [(IX0, IY0)] + [(IX0 + 2 + k, IY0 + 3) for k in range(3)] + [(IX0 + 8 + k, IY0 + 5) for k in range(4)]
    _hauls(aligned_study, cells)
    shares = _area_shares(aligned_study)
    assert shares == pytest.approx({"Skerra Narrows": 2 / 16, "Vossa Bank": 6 / 16, "Thorne Deep": 8 / 16}, rel=1e-6)
    plan = plan_samples(load_study(aligned_study), "trawl", n, seasons=["summer"])
    added = plan.stations["stratum"].value_counts()
    assert int(added.sum()) == n
    for name, share in shares.items():
        assert abs(int(added.get(name, 0)) - share * n) <= 1, (name, added.to_dict())


def test_spread_the_farthest_cell_is_chosen(aligned_study: Path) -> None:
    # one haul in the south-west corner of Thorne Deep: its first added sample goes to the far corner
    _hauls(aligned_study, [(IX0 + 8, IY0)])
    plan = plan_samples(load_study(aligned_study), "trawl", 1, strata=["Thorne Deep"])
    s = plan.stations.iloc[0]
    far = _lonlat(IX0 + 16 - 0.5, IY0 + ROWS - 0.5)
    assert (s["lon"], s["lat"]) == pytest.approx(far, abs=1e-9)
    # its distance to the haul, from GeographicLib's geodesic (Karney 2013), not the code under test
    from geographiclib.geodesic import Geodesic

    start = _lonlat(IX0 + 8.5, IY0 + 0.5)
    expected_km = Geodesic.WGS84.Inverse(start[1], start[0], far[1], far[0])["s12"] / 1000
    assert s["nearest_sample_km"] == pytest.approx(expected_km, rel=1e-9)


def test_same_seed_same_plan_and_constraints(aligned_study: Path) -> None:
    # bottom depths known in every cell of the lower half from a 2019 survey; 2021 sampled six cells
    _hauls(aligned_study, [(IX0 + i, IY0 + j) for i in range(16) for j in range(4)], year=2019, source_id="old")
    _hauls(aligned_study, [(IX0 + 2 + k, IY0 + 1) for k in range(6)])
    study = load_study(aligned_study)
    a = plan_samples(study, "trawl", 12, seed=7)
    b = plan_samples(study, "trawl", 12, seed=7)
    pd.testing.assert_frame_equal(a.stations, b.stations)
    # constraints: only two strata, a depth range, a minimum distance and a kept cell
    keep = f"x{IX0 + 9}_y{IY0 + 2}"
    c = plan_samples(study, "trawl", 6, strata=["Vossa Bank", "Thorne Deep"], depth_range_m=(60.0, 150.0),
                     min_distance_km=60.0, keep=[keep], seed=3)
    assert c.stations["cell_id"].iloc[0] == keep and c.stations["reason"].iloc[0] == "kept"
    assert set(c.stations["stratum"]) <= {"Vossa Bank", "Thorne Deep"}
    assert list(c.strata["stratum"]) == ["Thorne Deep", "Vossa Bank"]
    # depth: only cells whose observed bottom depth is known and inside the range (the hauls' cells)
    chosen = c.stations[c.stations["reason"] != "kept"]
    assert len(chosen) == 5 and chosen["bottom_depth_m"].between(60, 150).all()
    assert (chosen["lat"] < _lonlat(IX0, IY0 + 4)[1]).all()
    lon, lat = c.stations["lon"].to_numpy(), c.stations["lat"].to_numpy()
    from geographiclib.geodesic import Geodesic

    for i in range(len(lon)):
        for j in range(i + 1, len(lon)):
            assert Geodesic.WGS84.Inverse(lat[i], lon[i], lat[j], lon[j])["s12"] >= 60_000


def test_shortfall_is_a_note_not_an_error(aligned_study: Path) -> None:
    _hauls(aligned_study, [(IX0, IY0)])
    plan = plan_samples(load_study(aligned_study), "trawl", 30, strata=["Skerra Narrows"])
    assert len(plan.stations) == 2 * ROWS - 1
    assert plan.notes and plan.notes[-1].startswith(f"only {2 * ROWS - 1} of the 30 samples could be placed")


@pytest.mark.parametrize(("kwargs", "message"), [
    ({"source_kind": "trawl", "n_samples": 0}, "the number of added samples must be a whole number of 1 or more, got 0"),
    ({"source_kind": "effort", "n_samples": 3}, "cannot plan effort samples"),
    ({"source_kind": "plankton", "n_samples": 3}, "the store holds no 'plankton' records; kinds in the store: trawl"),
    ({"source_kind": "trawl", "n_samples": 3, "seasons": ["summr"]}, "unknown season 'summr' for --season; valid: winter, spring, summer, autumn"),
    ({"source_kind": "trawl", "n_samples": 3, "depth_layers": ["deep"]}, "unknown depth layer 'deep' for --layer"),
    ({"source_kind": "trawl", "n_samples": 3, "strata": ["Atlantis"]}, "unknown stratum 'Atlantis' for --stratum; valid: Skerra Narrows, Vossa Bank, Thorne Deep"),
    ({"source_kind": "trawl", "n_samples": 3, "depth_range_m": (200.0, 50.0)}, "the depth range is reversed"),
    ({"source_kind": "trawl", "n_samples": 3, "min_distance_km": -1.0}, "the minimum distance must be 0 km or more"),
    ({"source_kind": "trawl", "n_samples": 3, "keep": ["x1_y1"]}, "cannot keep cell(s) x1_y1: not cells of the study's domain"),
    ({"source_kind": "trawl", "n_samples": 1, "keep": [f"x{IX0}_y{IY0}", f"x{IX0 + 1}_y{IY0}"]}, "2 cells to keep but only 1 samples to add"),
    ({"source_kind": "trawl", "n_samples": 3, "seasons": ["winter"]}, "the store holds no trawl samples in winter"),
])
def test_bad_arguments_are_named(one_haul_study: Path, kwargs: dict, message: str) -> None:
    with pytest.raises(HarmonizeError) as err:
        plan_samples(load_study(one_haul_study), **kwargs)
    assert message in str(err.value)
    assert "\n" not in str(err.value)


@pytest.mark.subprocess
def test_cli_plan_writes_csv_gpkg_json_and_refuses_bad_arguments(aligned_study: Path, tmp_path: Path) -> None:
    _hauls(aligned_study, [(IX0 + 2 + k, IY0) for k in range(4)])
    run = [str(BIN), "--study", str(aligned_study), "plan"]
    out = subprocess.run([*run, "trawl", "5", "--season", "summer", "--layer", "near_bottom", "--csv",
                          str(tmp_path / "p.csv"), "--gpkg", str(tmp_path / "p.gpkg"), "--json", str(tmp_path / "p.json")],
                         capture_output=True, text=True, timeout=120, env={**os.environ, "COLUMNS": "200"})
    assert out.returncode == 0, out.stderr
    assert "cells sampled per stratum, before and after the plan" in out.stdout
    csv = pd.read_csv(tmp_path / "p.csv")
    assert len(csv) == 5 and {"cell_id", "stratum", "lon", "lat"} <= set(csv.columns)
    import pyogrio

    layers = {name for name, _ in pyogrio.list_layers(tmp_path / "p.gpkg")}
    assert {"proposed_stations", "proposed_cells", "coverage_by_stratum"} <= layers
    assert json.loads((tmp_path / "p.json").read_text())["n_samples"] == 5
    for bad, message in ((["trawl", "0"], "must be a whole number of 1 or more"),
                         (["trawl", "3", "--stratum", "Atlantis"], "unknown stratum 'Atlantis'"),
                         (["trawl", "3", "--depth-min", "90", "--depth-max", "10"], "the depth range is reversed")):
        res = subprocess.run([*run, *bad], capture_output=True, text=True, timeout=120)
        assert res.returncode == 2, res.stdout
        assert message in res.stderr and res.stderr.strip().count("\n") == 0


def test_the_report_maps_the_plan(aligned_study: Path) -> None:
    from harmonize.audit.report import render_html
    from harmonize.audit.run import audit

    _hauls(aligned_study, [(IX0 + 2 + k, IY0) for k in range(4)])
    study = load_study(aligned_study)
    result = audit(study)
    result.plan = plan_samples(study, "trawl", 5, seasons=["summer"])
    html = render_html(result)
    assert "Where 5 more samples would help most" in html
    assert html.count('fill="#D55E00"><title>') == 5  # one marker per proposed station
    for cell in result.plan.stations["cell_id"]:
        assert cell in html
    assert result.to_json_dict()["sampling_plan"]["n_samples"] == 5


@given(sizes=st.lists(st.integers(1, 40), min_size=1, max_size=5), n=st.integers(1, 60), seed=st.integers(0, 2**32 - 1))
def test_from_no_samples_every_stratum_ends_within_one_of_its_share(sizes: list[int], n: int, seed: int) -> None:
    """Proportional allocation (Cochran 1977, ch. 5): n_s within 1 of n x (cells of s / all cells)."""
    n = min(n, sum(sizes))
    rows = [{"cell_id": f"s{i}_{k}", "lon": -154.0 + 0.3 * i, "lat": 42.0 + 0.2 * k, "stratum": f"s{i}",
             "sampled": False, "eligible": True, "bottom_depth_m": float("nan")}
            for i, size in enumerate(sizes) for k in range(size)]
    cells = pd.DataFrame(rows)
    stations, notes = propose(cells, n, seed=seed)
    assert len(stations) == n and not notes and stations["cell_id"].is_unique
    counts = stations["stratum"].value_counts()
    for i, size in enumerate(sizes):
        assert abs(int(counts.get(f"s{i}", 0)) - n * size / sum(sizes)) < 1
    # the allocation does not depend on the order of the cells
    shuffled = cells.sample(frac=1.0, random_state=seed % 2**31).reset_index(drop=True)
    again, _ = propose(shuffled, n, seed=seed)
    assert again["stratum"].value_counts().sort_index().equals(counts.sort_index())
