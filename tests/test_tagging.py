"""Season, depth-layer, grid and strata tagging, checked against outside references."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pyproj
import pytest
import shapely
from hypothesis import given
from hypothesis import strategies as st

from harmonize.study import METEOROLOGICAL_SEASONS, DepthLayer
from harmonize.tagging import (
    INTEGRATED,
    NEAR_BOTTOM,
    Grid,
    assign_strata,
    inside_domain,
    normalise_lon,
    tag_depth_layer,
    tag_season,
)

# --- seasons -----------------------------------------------------------------------------


def test_meteorological_seasons_follow_wmo_practice() -> None:
    # WMO practice: meteorological seasons are DJF, MAM, JJA, SON (whole months, northern
    # hemisphere names). A December belongs to the winter of the following January.
    times = pd.Series(pd.to_datetime([
        "2019-12-15", "2020-01-10", "2020-02-29", "2020-03-01", "2020-05-31",
        "2020-06-01", "2020-08-31", "2020-09-01", "2020-11-30", "2020-12-01",
    ]))
    season, season_year = tag_season(times, METEOROLOGICAL_SEASONS)
    assert list(season) == ["winter", "winter", "winter", "spring", "spring",
                            "summer", "summer", "autumn", "autumn", "winter"]
    assert list(season_year) == [2020, 2020, 2020, 2020, 2020, 2020, 2020, 2020, 2020, 2021]


def test_wrapping_season_longer_than_three_months() -> None:
    # A wet season November-March: November and December belong to the next year.
    seasons = {"wet": (11, 12, 1, 2, 3), "dry": (4, 5, 6, 7, 8, 9, 10)}
    times = pd.Series(pd.to_datetime(["2019-10-31", "2019-11-01", "2019-12-31", "2020-03-31"]))
    season, season_year = tag_season(times, seasons)
    assert list(season) == ["dry", "wet", "wet", "wet"]
    assert list(season_year) == [2019, 2020, 2020, 2020]


def test_missing_time_gives_null_tags() -> None:
    season, season_year = tag_season(pd.Series([pd.NaT, pd.Timestamp("2020-07-01")]), METEOROLOGICAL_SEASONS)
    assert season.isna().tolist() == [True, False]
    assert season_year.isna().tolist() == [True, False]


@given(st.datetimes(min_value=pd.Timestamp("1900-01-01").to_pydatetime(),
                    max_value=pd.Timestamp("2100-12-31").to_pydatetime()))
def test_season_year_is_year_or_next(t) -> None:  # type: ignore[no-untyped-def]
    season, season_year = tag_season(pd.Series([pd.Timestamp(t)]), METEOROLOGICAL_SEASONS)
    expected = t.year + (1 if t.month == 12 else 0)
    assert season_year.iloc[0] == expected


# --- depth layers --------------------------------------------------------------------------

LAYERS = (DepthLayer("surface", 0, 10), DepthLayer("epipelagic", 10, 200), DepthLayer("mesopelagic", 200, 1000))


@pytest.mark.parametrize(
    ("dmin", "dmax", "bottom", "expected"),
    [
        (5, 5, np.nan, "surface"),          # point depth: top <= d < bottom
        (10, 10, np.nan, "epipelagic"),     # a point on a boundary belongs to the deeper layer
        (0, 10, np.nan, "surface"),         # a range may touch its layer's lower boundary
        (10, 200, np.nan, "epipelagic"),
        (5, 50, np.nan, INTEGRATED),        # spans two layers
        (0, 600, np.nan, INTEGRATED),
        (190, 195, 200, NEAR_BOTTOM),       # whole range within 10 m above the bottom
        (185, 195, 200, "epipelagic"),      # top of the range is 15 m above the bottom
        (1200, 1200, np.nan, None),         # deeper than the deepest layer
        (np.nan, np.nan, np.nan, None),
    ],
)
def test_depth_layer_rules(dmin: float, dmax: float, bottom: float, expected: str | None) -> None:
    got = tag_depth_layer(np.array([dmin]), np.array([dmax]), np.array([bottom]), LAYERS, 10.0)
    assert got[0] == expected


def test_on_bottom_overrides_depth() -> None:
    got = tag_depth_layer(np.array([np.nan]), np.array([np.nan]), None, LAYERS, 10.0, on_bottom=np.array([True]))
    assert got[0] == NEAR_BOTTOM


# --- grid, domain, strata ------------------------------------------------------------------


def test_grid_cells_are_equal_area_by_geodesic_polygon_area() -> None:
    # Every cell of a 25 km grid in an equal-area CRS (EPSG:6933, EASE-Grid 2.0) must have an
    # area of 625 km2 on the WGS84 ellipsoid; checked with pyproj.Geod polygon areas
    # (Karney 2013, "Algorithms for geodesics", J. Geodesy 87:43-55) of the densified cells.
    grid = Grid("EPSG:6933", 25)
    geod = pyproj.Geod(ellps="WGS84")
    ix, iy = grid.indices(np.array([-153.0, -150.5, 10.0, 0.0]), np.array([43.0, 44.7, 60.0, 0.1]))
    polys = grid.cell_polygons_lonlat(ix, iy, densify=200)
    areas_km2 = [abs(geod.geometry_area_perimeter(p)[0]) / 1e6 for p in polys]
    assert areas_km2 == pytest.approx([625.0] * 4, rel=2e-4)


def test_cell_ids_round_trip_and_contain_their_points() -> None:
    grid = Grid("EPSG:6933", 25)
    rng = np.random.default_rng(1)
    lon = rng.uniform(-156, -148, 500)
    lat = rng.uniform(41, 46, 500)
    ids = grid.cell_ids(lon, lat)
    ix, iy = Grid.parse(ids)
    polys = grid.cell_polygons_lonlat(ix, iy, densify=16)
    assert shapely.contains_xy(polys, lon, lat).all() or shapely.intersects_xy(polys, lon, lat).all()


def test_normalise_lon() -> None:
    assert normalise_lon(np.array([180.0, 190.0, -180.0, 359.5, -190.0])).tolist() == [-180.0, -170.0, -180.0, -0.5, 170.0]


def test_domain_and_strata(study) -> None:  # type: ignore[no-untyped-def]
    lon = np.array([-153.0, -151.0, -160.0, np.nan])
    lat = np.array([43.0, 43.0, 43.0, 43.0])
    assert inside_domain(study.domain, lon, lat).tolist() == [True, True, False, False]
    assert assign_strata(study.strata, lon, lat).tolist() == ["Vossa Bank", "Thorne Deep", None, None]


def test_strata_agree_with_geopandas_sjoin(study) -> None:  # type: ignore[no-untyped-def]
    # Reference: geopandas.sjoin (predicate "within") on the same polygons.
    import geopandas as gpd

    rng = np.random.default_rng(7)
    lon = rng.uniform(-154.2, -149.8, 2000)
    lat = rng.uniform(41.8, 45.2, 2000)
    ours = assign_strata(study.strata, lon, lat)
    pts = gpd.GeoDataFrame(geometry=gpd.points_from_xy(lon, lat), crs="EPSG:4326")
    polys = gpd.GeoDataFrame({"stratum": [n for n, _ in study.strata]},
                             geometry=[g for _, g in study.strata], crs="EPSG:4326")
    joined = gpd.sjoin(pts, polys, how="left", predicate="intersects")
    ref = joined[~joined.index.duplicated(keep="first")]["stratum"].to_numpy()
    ref = np.where(pd.isna(ref), None, ref)
    assert (ours == ref).all()
