"""Pixel areas of gridded data: lat/lon rectangles on the WGS84 ellipsoid, curvilinear quads.

A pixel bounded by two parallels and two meridians has the area

    A = (a^2 / 2) * dlon * (q(lat2) - q(lat1))          (WGS84 ellipsoid)

with q the authalic function of Snyder (1987, "Map Projections - A Working Manual", USGS
Professional Paper 1395, eq. 3-12); on a sphere of radius R it reduces to
R^2 * dlon * (sin lat2 - sin lat1) (CF conventions 1.11, chapter 7, cell_measures). A
curvilinear pixel is the quadrilateral of its corners, measured in a Lambert azimuthal
equal-area projection centred on the data (Snyder 1987, chapter 24), where plane areas
are true areas.
"""

from __future__ import annotations

import numpy as np
import pyproj

from harmonize import geodesy

#: WGS84 semi-major axis (m) and flattening (NIMA TR8350.2, 3rd ed. 2000, table 3.1).
WGS84_A_M = geodesy.WGS84_A
WGS84_F = geodesy.WGS84_F
#: Mean Earth radius R1 of IUGG (Moritz 2000, "Geodetic Reference System 1980", J. Geodesy 74).
EARTH_MEAN_RADIUS_KM = 6371.0088


def _authalic_q(lat_deg: np.ndarray) -> np.ndarray:
    """Snyder (1987) eq. 3-12: q = (1 - e^2) [sin p / (1 - e^2 sin^2 p) - ln((1 - e sin p)/(1 + e sin p)) / (2e)]."""
    e2 = WGS84_F * (2 - WGS84_F)
    e = np.sqrt(e2)
    s = np.sin(np.radians(np.asarray(lat_deg, dtype=np.float64)))
    return (1 - e2) * (s / (1 - e2 * s * s) - np.log((1 - e * s) / (1 + e * s)) / (2 * e))


def band_area_km2(lat1_deg: np.ndarray, lat2_deg: np.ndarray, dlon_deg: np.ndarray) -> np.ndarray:
    """Area (km2) on WGS84 between two parallels and two meridians ``dlon_deg`` apart."""
    a_km = WGS84_A_M / 1000.0
    dq = np.abs(_authalic_q(lat2_deg) - _authalic_q(lat1_deg))
    return 0.5 * a_km * a_km * np.radians(np.abs(np.asarray(dlon_deg, float))) * dq


def sphere_band_area_km2(lat1_deg: np.ndarray, lat2_deg: np.ndarray, dlon_deg: np.ndarray,
                         radius_km: float = EARTH_MEAN_RADIUS_KM) -> np.ndarray:
    """Area (km2) on a sphere: R^2 * dlon * |sin lat2 - sin lat1| (CF conventions, chapter 7)."""
    ds = np.abs(np.sin(np.radians(lat2_deg)) - np.sin(np.radians(lat1_deg)))
    return radius_km * radius_km * np.radians(np.abs(np.asarray(dlon_deg, float))) * ds


def edges_from_centres(centres: np.ndarray) -> np.ndarray:
    """n + 1 cell edges of a monotonic 1-D axis: midpoints, the ends half a step outside."""
    c = np.asarray(centres, dtype=np.float64)
    if c.size == 1:
        return np.array([c[0] - 0.5, c[0] + 0.5])
    mid = (c[:-1] + c[1:]) / 2
    return np.concatenate([[c[0] - (mid[0] - c[0])], mid, [c[-1] + (c[-1] - mid[-1])]])


def axis_bounds(centres: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Lower and upper edge of each pixel of a monotonic 1-D axis that may hold NaN centres.

    Each pixel reaches half way to each neighbour; where a neighbour is missing (the end of
    the axis, or a NaN centre) it reaches as far on that side as on the other, so a NaN
    centre costs its own row only. A pixel with no finite neighbour gets NaN edges. For an
    axis without NaN this gives the edges of :func:`edges_from_centres`.
    """
    c = np.asarray(centres, dtype=np.float64)
    half = np.full(c.size + 1, np.nan)  # half step between centre i-1 and i, at index i
    if c.size > 1:
        half[1:-1] = (c[1:] - c[:-1]) / 2
    before, after = half[:-1], half[1:]
    before = np.where(np.isfinite(before), before, after)
    after = np.where(np.isfinite(after), after, before)
    return c - before, c + after


def regular_pixel_area_km2(lat_lo: np.ndarray, lat_hi: np.ndarray, lon_lo: np.ndarray,
                           lon_hi: np.ndarray) -> np.ndarray:
    """(ny, nx) pixel areas of a regular lat/lon grid from each row's and column's bounds.

    Latitudes are clipped to [-90, 90]; longitude widths are taken modulo 360, so bounds
    given as 359.9 .. 0.1 measure 0.2 degrees.
    """
    lat_lo = np.clip(np.asarray(lat_lo, float), -90.0, 90.0)
    lat_hi = np.clip(np.asarray(lat_hi, float), -90.0, 90.0)
    dlon = np.abs(np.asarray(lon_hi, float) - np.asarray(lon_lo, float)) % 360.0
    dlon = np.where(dlon > 180.0, 360.0 - dlon, dlon)
    return band_area_km2(lat_lo, lat_hi, 1.0)[:, None] * dlon[None, :]


def corners_from_centres(lon: np.ndarray, lat: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(ny+1, nx+1) corner positions of a curvilinear grid: means of the 4 neighbouring centres.

    Edges are extrapolated linearly. Longitudes are unwrapped around each row's first
    pixel so that grids across the antimeridian average correctly.
    """
    lat = np.asarray(lat, float)
    lon = np.asarray(lon, float)
    lon = lon[:, :1] + ((lon - lon[:, :1] + 180.0) % 360.0 - 180.0)
    out = []
    for field in (lon, lat):
        # pad by linear extrapolation, then average 2x2 blocks
        p = np.empty((field.shape[0] + 2, field.shape[1] + 2))
        p[1:-1, 1:-1] = field
        p[0, 1:-1] = 2 * field[0] - field[min(1, field.shape[0] - 1)]
        p[-1, 1:-1] = 2 * field[-1] - field[max(-2, -field.shape[0])]
        p[:, 0] = 2 * p[:, 1] - p[:, min(2, p.shape[1] - 2)]
        p[:, -1] = 2 * p[:, -2] - p[:, max(-3, -(p.shape[1] - 1))]
        out.append((p[:-1, :-1] + p[1:, :-1] + p[:-1, 1:] + p[1:, 1:]) / 4)
    return out[0], out[1]


def quad_area_km2(corner_lon: np.ndarray, corner_lat: np.ndarray) -> np.ndarray:
    """(ny, nx) areas of the quadrilaterals spanned by (ny+1, nx+1) corner positions.

    The corners are projected to a Lambert azimuthal equal-area projection on WGS84
    centred on the grid, and each quad's area is the shoelace area of its 4 corners.
    """
    lon = np.asarray(corner_lon, float)
    lat = np.asarray(corner_lat, float)
    ok = np.isfinite(lon) & np.isfinite(lat)
    lon0 = float(np.degrees(np.angle(np.nanmean(np.exp(1j * np.radians(lon[ok]))))))
    lat0 = float(np.nanmean(lat[ok]))
    laea = pyproj.Transformer.from_crs(
        "EPSG:4326", pyproj.CRS.from_proj4(f"+proj=laea +lat_0={lat0} +lon_0={lon0} +ellps=WGS84 +units=m"),
        always_xy=True,
    )
    x, y = laea.transform(lon, lat)
    x, y = np.asarray(x) / 1000.0, np.asarray(y) / 1000.0
    # corners in order (j,i), (j,i+1), (j+1,i+1), (j+1,i)
    xs = (x[:-1, :-1], x[:-1, 1:], x[1:, 1:], x[1:, :-1])
    ys = (y[:-1, :-1], y[:-1, 1:], y[1:, 1:], y[1:, :-1])
    twice = sum(xs[k] * ys[(k + 1) % 4] - xs[(k + 1) % 4] * ys[k] for k in range(4))
    return np.abs(twice) / 2.0
