"""Space: the study grid in an equal-area CRS, the domain test and strata."""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pandas as pd
import pyproj
import shapely


def normalise_lon(lon: np.ndarray) -> np.ndarray:
    """Longitudes into [-180, 180)."""
    lon = np.asarray(lon, dtype=float)
    return np.mod(lon + 180.0, 360.0) - 180.0


class Grid:
    """A regular grid of square cells of ``cell_size_km`` in a projected CRS.

    Cell (ix, iy) covers x in [ix*s, (ix+1)*s) and y in [iy*s, (iy+1)*s) metres, and is
    named "x{ix}_y{iy}". With an equal-area CRS every cell has the same true area.
    """

    def __init__(self, crs: str, cell_size_km: float) -> None:
        self.crs = pyproj.CRS.from_user_input(crs)
        self.cell_size_m = float(cell_size_km) * 1000.0
        self._to_grid = pyproj.Transformer.from_crs("EPSG:4326", self.crs, always_xy=True)
        self._to_lonlat = pyproj.Transformer.from_crs(self.crs, "EPSG:4326", always_xy=True)

    def indices(self, lon: np.ndarray, lat: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Integer cell indices (ix, iy) of WGS84 points; -2**62 where not projectable."""
        x, y = self._to_grid.transform(np.asarray(lon, float), np.asarray(lat, float))
        ok = np.isfinite(x) & np.isfinite(y)
        ix = np.where(ok, np.floor(np.where(ok, x, 0) / self.cell_size_m), -(2**62)).astype(np.int64)
        iy = np.where(ok, np.floor(np.where(ok, y, 0) / self.cell_size_m), -(2**62)).astype(np.int64)
        return ix, iy

    def cell_ids(self, lon: np.ndarray, lat: np.ndarray) -> pd.Series:
        """Cell id of each point ("x{ix}_y{iy}"), null where the point cannot be projected."""
        ix, iy = self.indices(lon, lat)
        ok = ix != -(2**62)
        sx = pd.Series(ix).astype("string")
        sy = pd.Series(iy).astype("string")
        ids = ("x" + sx + "_y" + sy).where(ok)
        return ids.astype("string")

    @staticmethod
    def parse(cell_ids: Sequence[str] | pd.Series) -> tuple[np.ndarray, np.ndarray]:
        """Inverse of :meth:`cell_ids`: (ix, iy) arrays."""
        parts = pd.Series(cell_ids, dtype="string").str.extract(r"^x(-?\d+)_y(-?\d+)$")
        return parts[0].astype("int64").to_numpy(), parts[1].astype("int64").to_numpy()

    def cell_polygons(self, ix: np.ndarray, iy: np.ndarray) -> np.ndarray:
        """Cell squares in the grid CRS (shapely polygons, metres)."""
        s = self.cell_size_m
        return shapely.box(ix * s, iy * s, (ix + 1) * s, (iy + 1) * s)

    def cell_polygons_lonlat(self, ix: np.ndarray, iy: np.ndarray, densify: int = 8) -> np.ndarray:
        """Cell outlines in WGS84, with ``densify`` points per side so curved edges stay true."""
        boxes = shapely.segmentize(self.cell_polygons(ix, iy), self.cell_size_m / densify)
        return shapely.transform(boxes, lambda xy: np.column_stack(self._to_lonlat.transform(xy[:, 0], xy[:, 1])))

    def cell_centres_xy(self, ix: np.ndarray, iy: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Cell centres in the grid CRS (metres)."""
        s = self.cell_size_m
        return (np.asarray(ix, float) + 0.5) * s, (np.asarray(iy, float) + 0.5) * s

    def cell_centres_lonlat(self, ix: np.ndarray, iy: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Cell centres in WGS84 (the centre of :meth:`cell_centres_xy`, unprojected)."""
        return self._to_lonlat.transform(*self.cell_centres_xy(ix, iy))

    def cells_covering(self, geometry: shapely.Geometry) -> pd.DataFrame:
        """Cells whose centre lies in ``geometry`` (WGS84): the study's domain cells.

        The centre is tested with :func:`inside_domain`, the test every record passes, so a
        domain edge is a straight line in longitude/latitude (RFC 7946 section 3.1.1) for
        cells as for records; testing in the projected grid would bend each edge and count
        other cells. Returns a frame with cell_id, ix, iy, lon, lat (cell centre).
        """
        # candidate cells: the projected box of the outline densified in lon/lat (an edge
        # straight in lon/lat is a curve in the grid CRS and may bulge past its vertices)
        dense = shapely.segmentize(geometry, 0.05)
        projected = shapely.transform(
            dense, lambda xy: np.column_stack(self._to_grid.transform(xy[:, 0], xy[:, 1]))
        )
        xmin, ymin, xmax, ymax = projected.bounds
        s = self.cell_size_m
        ixs = np.arange(np.floor(xmin / s) - 1, np.floor(xmax / s) + 2, dtype=np.int64)
        iys = np.arange(np.floor(ymin / s) - 1, np.floor(ymax / s) + 2, dtype=np.int64)
        gx, gy = np.meshgrid(ixs, iys)
        gx, gy = gx.ravel(), gy.ravel()
        lon, lat = self.cell_centres_lonlat(gx, gy)
        inside = inside_domain(geometry, normalise_lon(lon), np.asarray(lat, float))
        gx, gy = gx[inside], gy[inside]
        lon, lat = normalise_lon(np.asarray(lon)[inside]), np.asarray(lat)[inside]
        ids = ("x" + pd.Series(gx).astype("string") + "_y" + pd.Series(gy).astype("string"))
        return pd.DataFrame({"cell_id": ids.astype(str), "ix": gx, "iy": gy, "lon": lon, "lat": lat})


def inside_domain(domain: shapely.Geometry, lon: np.ndarray, lat: np.ndarray) -> np.ndarray:
    """Boolean mask of WGS84 points inside (or on the edge of) the domain polygon(s).

    The one domain test of harmonize (records of every kind, gridded pixels, the audit's
    domain cells): the polygon's edges are straight lines in longitude/latitude, as GeoJSON
    defines them (RFC 7946 section 3.1.1).
    """
    lon = np.asarray(lon, float)
    lat = np.asarray(lat, float)
    ok = np.isfinite(lon) & np.isfinite(lat)
    result = np.zeros(lon.shape[0], dtype=bool)
    shapely.prepare(domain)
    result[ok] = shapely.intersects_xy(domain, lon[ok], lat[ok])
    return result


def assign_strata(
    strata: Sequence[tuple[str, shapely.Geometry]], lon: np.ndarray, lat: np.ndarray
) -> np.ndarray:
    """Name of the first stratum holding each point (None where none does).

    One prepared-polygon test per stratum, limited to the points in its bounding box:
    much faster than an STRtree of points for the few large polygons strata are.
    """
    lon = np.asarray(lon, float)
    lat = np.asarray(lat, float)
    out = np.full(lon.shape[0], None, dtype=object)
    todo = np.isfinite(lon) & np.isfinite(lat)
    for name, geom in strata:
        xmin, ymin, xmax, ymax = geom.bounds
        cand = np.flatnonzero(todo & (lon >= xmin) & (lon <= xmax) & (lat >= ymin) & (lat <= ymax))
        if cand.size == 0:
            continue
        shapely.prepare(geom)
        hit = cand[shapely.intersects_xy(geom, lon[cand], lat[cand])]
        out[hit] = name
        todo[hit] = False
    return out
