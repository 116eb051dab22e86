"""Pixel areas of gridded data, checked against the CF sphere formula, GeographicLib and pyproj.Geod."""

from __future__ import annotations

import numpy as np
import pyproj
import pytest
from geographiclib.geodesic import Geodesic

from harmonize.gridded.area import (
    band_area_km2,
    corners_from_centres,
    edges_from_centres,
    quad_area_km2,
    regular_pixel_area_km2,
    sphere_band_area_km2,
)

GEOD = pyproj.Geod(ellps="WGS84")


def _geod_band_km2(lat1: float, lat2: float, lon1: float, lon2: float, n: int = 4000) -> float:
    """Area between two parallels with pyproj.Geod (Karney 2013): parallels densified so the
    geodesic edges follow them."""
    lons = np.concatenate([np.linspace(lon1, lon2, n), np.linspace(lon2, lon1, n)])
    lats = np.concatenate([np.full(n, lat1), np.full(n, lat2)])
    return abs(GEOD.polygon_area_perimeter(lons, lats)[0]) / 1e6


def test_sphere_formula_worked_value() -> None:
    # CF conventions 1.11, chapter 7 (cell measures): A = R^2 dlon (sin lat2 - sin lat1). Worked
    # value for a 1 x 1 degree cell from 0 to 1 N with R = 6371.0088 km (IUGG mean radius):
    # 12,363.718 km2 (../shared/NOTES.md, arithmetic from the formula).
    assert sphere_band_area_km2(0.0, 1.0, 1.0) == pytest.approx(12363.718, abs=1e-3)


def test_ellipsoid_band_matches_geographiclib_value() -> None:
    # WGS84 area between the parallels 0 and 1 N over 1 degree of longitude: 12,308.464 km2
    # computed with GeographicLib (Karney 2013, J. Geodesy 87:43-55; ../shared/NOTES.md).
    assert band_area_km2(0.0, 1.0, 1.0) == pytest.approx(12308.464, abs=1e-3)


@pytest.mark.parametrize(("lat1", "lat2"), [(42.0, 42.25), (60.0, 61.0), (-70.5, -70.0), (89.0, 90.0)])
def test_ellipsoid_band_matches_pyproj_geod(lat1: float, lat2: float) -> None:
    # pyproj.Geod.polygon_area_perimeter (GeographicLib algorithms, Karney 2013) on the densified band.
    ours = float(band_area_km2(lat1, lat2, 0.5))
    assert ours == pytest.approx(_geod_band_km2(lat1, lat2, 10.0, 10.5), rel=1e-6)


def test_four_corner_geodesic_polygon_differs_as_expected() -> None:
    # GeographicLib PolygonArea with 4 corners: the top edge is a geodesic, not the parallel, so
    # the area is 12,308.778 km2 (NOTES.md) against 12,308.464 km2 for the parallel band.
    poly = Geodesic.WGS84.Polygon()
    for lat, lon in ((0, 0), (0, 1), (1, 1), (1, 0)):
        poly.AddPoint(lat, lon)
    _, _, area_m2 = poly.Compute(False, True)
    assert abs(area_m2) / 1e6 == pytest.approx(12308.778, abs=1e-3)
    assert band_area_km2(0.0, 1.0, 1.0) < abs(area_m2) / 1e6


def test_regular_grid_with_descending_latitude_and_0_360_longitude() -> None:
    lat_e = edges_from_centres(np.array([43.125, 42.875, 42.625]))  # north to south
    lon_e = edges_from_centres(np.array([359.875, 0.125]))  # across the 0/360 seam
    area = regular_pixel_area_km2(lat_e[:-1], lat_e[1:], lon_e[:-1], lon_e[1:])
    assert area.shape == (3, 2)
    for j in range(3):
        lo, hi = sorted((lat_e[j], lat_e[j + 1]))
        assert area[j, 0] == pytest.approx(_geod_band_km2(lo, hi, -0.25, 0.0), rel=1e-6)
        assert area[j, 1] == pytest.approx(area[j, 0], rel=1e-12)


def test_curvilinear_quads_match_geodesic_polygons() -> None:
    # A rotated grid: each pixel's quadrilateral area against pyproj.Geod on the same 4 corners
    # (geodesic edges; over 10 km the difference from straight edges in an equal-area plane is
    # far below 0.1 %).
    i, j = np.meshgrid(np.arange(6.0), np.arange(5.0))
    lon = -153.0 + 0.1 * i + 0.03 * j
    lat = 42.5 + 0.08 * j - 0.02 * i
    c_lon, c_lat = corners_from_centres(lon, lat)
    ours = quad_area_km2(c_lon, c_lat)
    for jj in range(5):
        for ii in range(6):
            lons = [c_lon[jj, ii], c_lon[jj, ii + 1], c_lon[jj + 1, ii + 1], c_lon[jj + 1, ii]]
            lats = [c_lat[jj, ii], c_lat[jj, ii + 1], c_lat[jj + 1, ii + 1], c_lat[jj + 1, ii]]
            ref = abs(GEOD.polygon_area_perimeter(lons, lats)[0]) / 1e6
            assert ours[jj, ii] == pytest.approx(ref, rel=1e-4)
    # the quads tile the grid: the inner corners are the means of the 4 neighbouring centres
    assert c_lon[1, 1] == pytest.approx(lon[:2, :2].mean())
    assert c_lat[1, 1] == pytest.approx(lat[:2, :2].mean())


def test_corners_across_the_antimeridian() -> None:
    lon, lat = np.meshgrid([179.95, -179.95], [10.05, 10.15])
    c_lon, c_lat = corners_from_centres(lon, lat)
    area = quad_area_km2(c_lon, c_lat)
    expected = _geod_band_km2(10.0, 10.1, 179.9, 180.0)
    np.testing.assert_allclose(area[0], expected, rtol=1e-3)
