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

import numpy as np

#: WGS84 semi-major axis (m) and flattening (NIMA TR8350.2, 2000).
WGS84_A = 6378137.0
WGS84_F = 1 / 298.257223563
#: First eccentricity squared.
E2 = WGS84_F * (2 - WGS84_F)
#: Metres per international nautical mile: exact (BIPM SI Brochure, 9th ed. 2019, Table 8).
M_PER_NMI = 1852.0


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


__all__ = ["E2", "M_PER_NMI", "WGS84_A", "WGS84_F", "distance_m", "distance_sql"]
