"""Distances on the WGS84 ellipsoid between nearby points: one formula, in numpy and as SQL text.

The ping tracks (harmonize.adapters.effort, the Dask engine and the store's view that joins
tracks across files) measure the few-kilometre links between consecutive pings with the
flat-earth formula on the ellipsoid's meridional (M) and prime-vertical (N) radii of
curvature at the mean latitude (Snyder 1987, "Map Projections - A Working Manual", USGS
Professional Paper 1395, eqs. 4-18 and 4-20, from memory). For such steps it agrees with the
geodesic (Karney 2013, J. Geodesy 87:43-55) to better than 1e-5 relative; tests check it
against GeographicLib. The SQL text is generated here from the same constants as the numpy
function, so that both engines and the view compute the same number.
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass
from typing import Any

import numpy as np

#: WGS84 semi-major axis (m) and flattening (NIMA TR8350.2, 2000).
WGS84_A = 6378137.0
WGS84_F = 1 / 298.257223563
#: First eccentricity squared.
E2 = WGS84_F * (2 - WGS84_F)
#: Metres per international nautical mile: exact (BIPM SI Brochure, 9th ed. 2019, Table 8).
M_PER_NMI = 1852.0
KM_PER_NMI = M_PER_NMI / 1000.0


def distance_m(lat1: np.ndarray, lon1: np.ndarray, lat2: np.ndarray, lon2: np.ndarray) -> np.ndarray:
    """Distance (m) between WGS84 points (degrees); NaN in, NaN out."""
    mid = np.radians((np.asarray(lat1, float) + lat2) / 2)
    w = 1 - E2 * np.sin(mid) ** 2
    dlon = np.fmod(np.asarray(lon2, float) - lon1 + 540.0, 360.0) - 180.0
    north = WGS84_A * (1 - E2) / w**1.5 * np.radians(np.asarray(lat2, float) - lat1)
    east = WGS84_A / np.sqrt(w) * np.cos(mid) * np.radians(dlon)
    return np.sqrt(north**2 + east**2)


def distance_sql(lat1: str, lon1: str, lat2: str, lon2: str) -> str:
    """The SQL expression (DuckDB) of :func:`distance_m` for four column expressions.

    Longitudes are expected in [-180, 360) so that the wrapped difference is taken on a
    positive number (DuckDB's ``%`` on doubles keeps the sign of the dividend, as ``fmod``).
    """
    mid = f"radians(({lat1} + {lat2}) / 2)"
    w = f"(1 - {E2!r} * pow(sin({mid}), 2))"
    return (f"sqrt(pow({WGS84_A!r} * (1 - {E2!r}) / pow({w}, 1.5) * radians({lat2} - {lat1}), 2)"
            f" + pow({WGS84_A!r} / sqrt({w}) * cos({mid})"
            f" * radians((({lon2} - {lon1} + 540.0) % 360.0) - 180.0), 2))")


@dataclass(frozen=True)
class CylindricalEqualArea:
    """Lambert cylindrical equal-area projection on an ellipsoid, in closed form.

    x = a k0 (lon - lon0) + x0, y = a q / (2 k0) + y0, with k0 = cos(phi_s) / sqrt(1 - e2
    sin^2 phi_s) and q = (1 - e2) [sin phi / (1 - e2 sin^2 phi) - 1 / (2e) ln((1 - e sin
    phi) / (1 + e sin phi))] (Snyder 1987, USGS Professional Paper 1395, chapter 10, from
    memory; the tests check it against pyproj). EPSG:6933 (EASE-Grid 2.0 global) is one,
    with phi_s = 30 degrees. :func:`closed_form` finds it in a CRS; the numpy and SQL forms
    below are the same formula.
    """

    a: float
    e2: float
    lat_ts: float
    lon0: float = 0.0
    x0: float = 0.0
    y0: float = 0.0

    @property
    def k0(self) -> float:
        s = math.sin(math.radians(self.lat_ts))
        return math.cos(math.radians(self.lat_ts)) / math.sqrt(1 - self.e2 * s * s)

    def forward(self, lon: np.ndarray, lat: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Projected (x, y) metres of WGS84 degrees (longitudes wrapped to [-180, 180) about lon0)."""
        e = math.sqrt(self.e2)
        dlon = np.mod(np.asarray(lon, float) - self.lon0 + 180.0, 360.0) - 180.0
        s = np.sin(np.radians(np.asarray(lat, float)))
        q = (1 - self.e2) * (s / (1 - self.e2 * s * s) - np.log((1 - e * s) / (1 + e * s)) / (2 * e))
        return self.a * self.k0 * np.radians(dlon) + self.x0, self.a * q / (2 * self.k0) + self.y0

    def sql(self, lon: str, lat: str) -> tuple[str, str]:
        """The SQL expressions (DuckDB) of :meth:`forward` for two column expressions."""
        e = math.sqrt(self.e2)
        dlon = f"((({lon}) - {self.lon0!r} + 180.0 - 360.0 * floor((({lon}) - {self.lon0!r} + 180.0) / 360.0)) - 180.0)"
        s = f"sin(radians({lat}))"
        q = (f"({1 - self.e2!r} * ({s} / (1 - {self.e2!r} * {s} * {s}) "
             f"- ln((1 - {e!r} * {s}) / (1 + {e!r} * {s})) / {2 * e!r}))")
        return (f"({self.a * self.k0!r} * radians({dlon}) + {self.x0!r})",
                f"({self.a / (2 * self.k0)!r} * {q} + {self.y0!r})")


def closed_form(crs: object) -> CylindricalEqualArea | None:
    """The closed form of a projected CRS (a pyproj CRS or anything it reads), None when it has none here."""
    import pyproj

    crs = pyproj.CRS.from_user_input(crs)
    op = crs.coordinate_operation
    if op is None or op.method_name != "Lambert Cylindrical Equal Area":
        return None
    params = {p.name: (p.value, p.unit_name) for p in op.params}
    if any(unit not in ("degree", "metre") for _, unit in params.values()) or crs.axis_info[0].unit_name != "metre":
        return None
    ell = crs.ellipsoid
    f = 1 / ell.inverse_flattening if ell.inverse_flattening else 0.0
    if f == 0.0:
        return None
    return CylindricalEqualArea(
        a=ell.semi_major_metre, e2=f * (2 - f), lat_ts=params["Latitude of 1st standard parallel"][0],
        lon0=params.get("Longitude of natural origin", (0.0, ""))[0],
        x0=params.get("False easting", (0.0, ""))[0], y0=params.get("False northing", (0.0, ""))[0])


@functools.cache
def _wgs84_geod() -> Any:
    import pyproj

    return pyproj.Geod(ellps="WGS84")


def track_geometry(
    start_lon: np.ndarray, start_lat: np.ndarray, end_lon: np.ndarray, end_lat: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Geodesic length (km) on WGS84 of each start-end line (a tow, a transect segment) and
    its geodesic midpoint (lon in [-180, 180), lat), by pyproj.Geod (Karney 2013)."""
    from harmonize.tagging import normalise_lon

    geod = _wgs84_geod()
    az, _, dist_m = geod.inv(start_lon, start_lat, end_lon, end_lat)
    mid_lon, mid_lat, _ = geod.fwd(start_lon, start_lat, az, np.asarray(dist_m) / 2.0)
    return np.asarray(dist_m) / 1000.0, normalise_lon(mid_lon), np.asarray(mid_lat)


__all__ = ["E2", "KM_PER_NMI", "M_PER_NMI", "WGS84_A", "WGS84_F", "CylindricalEqualArea", "closed_form",
           "distance_m", "distance_sql", "track_geometry"]
