"""One domain test for records and grid cells (edges straight in lon/lat, RFC 7946 section 3.1.1)."""

from __future__ import annotations

import numpy as np
import pyproj
import shapely
from shapely.geometry import Point, Polygon

from harmonize.tagging import Grid, inside_domain

#: a triangle with two long oblique edges: straight in lon/lat, curved in the equal-area grid
TRIANGLE = Polygon([(-160.0, 40.0), (-140.0, 40.0), (-150.0, 52.0)])


def _reference_cells(crs: str, size_m: float) -> set[str]:
    """Cells whose centre is covered by the triangle, by pyproj and shapely alone."""
    to_grid = pyproj.Transformer.from_crs("EPSG:4326", crs, always_xy=True)
    to_ll = pyproj.Transformer.from_crs(crs, "EPSG:4326", always_xy=True)
    lons = np.linspace(-161, -139, 400)
    lats = np.linspace(39, 53, 400)
    x, y = to_grid.transform(*np.meshgrid(lons, lats))
    ixs = range(int(np.floor(x.min() / size_m)) - 1, int(np.floor(x.max() / size_m)) + 2)
    iys = range(int(np.floor(y.min() / size_m)) - 1, int(np.floor(y.max() / size_m)) + 2)
    out = set()
    for ix in ixs:
        cx = (ix + 0.5) * size_m
        for iy in iys:
            lon, lat = to_ll.transform(cx, (iy + 0.5) * size_m)
            if TRIANGLE.covers(Point(lon, lat)):
                out.add(f"x{ix}_y{iy}")
    return out


def test_domain_cells_use_the_records_test() -> None:
    grid = Grid("EPSG:6933", 25)
    cells = grid.cells_covering(TRIANGLE)
    assert set(cells["cell_id"]) == _reference_cells("EPSG:6933", 25_000.0)
    # a record at each cell centre is inside the domain exactly when its cell is a domain cell
    assert inside_domain(TRIANGLE, cells["lon"].to_numpy(), cells["lat"].to_numpy()).all()


def test_edges_straight_in_the_grid_would_count_other_cells() -> None:
    """The test above can fail: edges straight in the projected grid give another set of cells."""
    grid = Grid("EPSG:6933", 25)
    to_grid = pyproj.Transformer.from_crs("EPSG:4326", "EPSG:6933", always_xy=True)
    projected = shapely.transform(TRIANGLE, lambda xy: np.column_stack(to_grid.transform(xy[:, 0], xy[:, 1])))
    cells = grid.cells_covering(TRIANGLE)
    xmin, ymin, xmax, ymax = projected.bounds
    s = 25_000.0
    gx, gy = np.meshgrid(np.arange(np.floor(xmin / s) - 1, np.floor(xmax / s) + 2),
                         np.arange(np.floor(ymin / s) - 1, np.floor(ymax / s) + 2))
    in_grid = shapely.contains_xy(projected, (gx.ravel() + 0.5) * s, (gy.ravel() + 0.5) * s)
    assert int(in_grid.sum()) != len(cells)
