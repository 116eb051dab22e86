"""The geodesy module's numpy and SQL forms agree, and agree with pyproj and GeographicLib."""

from __future__ import annotations

import duckdb
import numpy as np
import pyproj
import pytest
from geographiclib.geodesic import Geodesic

from harmonize.geodesy import closed_form, distance_m, distance_sql


def _sql(exprs: list[str], **columns: np.ndarray) -> list[np.ndarray]:
    con = duckdb.connect()
    try:
        con.register("p", {k: np.asarray(v, float) for k, v in columns.items()})
        out = con.sql("SELECT " + ", ".join(f"{e} AS c{i}" for i, e in enumerate(exprs)) + " FROM p").fetchnumpy()
        return [out[f"c{i}"] for i in range(len(exprs))]
    finally:
        con.close()


def test_cylindrical_equal_area_matches_pyproj() -> None:
    """EPSG:6933 (EASE-Grid 2.0, Lambert cylindrical equal-area, standard parallel 30 N) in
    closed form: within 1e-6 m of PROJ, in numpy and in SQL."""
    form = closed_form("EPSG:6933")
    assert form is not None and form.lat_ts == 30.0
    rng = np.random.default_rng(3)
    lon, lat = rng.uniform(-180, 180, 20_000), rng.uniform(-85, 85, 20_000)
    x0, y0 = pyproj.Transformer.from_crs("EPSG:4326", "EPSG:6933", always_xy=True).transform(lon, lat)
    x, y = form.forward(lon, lat)
    np.testing.assert_allclose(x, x0, rtol=0, atol=1e-6)
    np.testing.assert_allclose(y, y0, rtol=0, atol=1e-6)
    xs, ys = _sql(list(form.sql("lon", "lat")), lon=lon, lat=lat)
    np.testing.assert_allclose(xs, x0, rtol=0, atol=1e-6)
    np.testing.assert_allclose(ys, y0, rtol=0, atol=1e-6)


def test_other_projections_have_no_closed_form_here() -> None:
    assert closed_form("EPSG:3035") is None  # Lambert azimuthal equal-area (Europe)
    assert closed_form("EPSG:4326") is None


@pytest.mark.parametrize("azimuth", [0.0, 37.0, 90.0, 200.0])
def test_distance_numpy_and_sql_agree_with_the_geodesic(azimuth: float) -> None:
    """A 3 km step (GeographicLib direct problem, Karney 2013): both forms within 2e-5."""
    g = Geodesic.WGS84.Direct(43.2, -151.5, azimuth, 3000.0)
    args = (np.array([43.2]), np.array([-151.5]), np.array([g["lat2"]]), np.array([g["lon2"]]))
    assert distance_m(*args)[0] == pytest.approx(3000.0, rel=2e-5)
    (sql,) = _sql([distance_sql("a", "b", "c", "d")], a=args[0], b=args[1], c=args[2], d=args[3])
    assert sql[0] == pytest.approx(distance_m(*args)[0], rel=1e-12)
