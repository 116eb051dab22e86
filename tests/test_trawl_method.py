"""Trawl computations against outside references: geodesics, swept area, units."""

from __future__ import annotations

import numpy as np
import pint
import pytest
from geographiclib.geodesic import Geodesic

from harmonize import units
from harmonize.adapters.trawl import area_swept_km2
from harmonize.geodesy import track_geometry

UREG = pint.UnitRegistry()


def test_tow_distance_matches_geographiclib_test_value() -> None:
    # GeographicLib documentation example (Karney 2013, "Algorithms for geodesics",
    # J. Geodesy 87:43-55): inverse problem (-41.32, 174.81) -> (40.96, -5.50),
    # s12 = 19,959,679.267 m on WGS84.
    km, _, _ = track_geometry(np.array([174.81]), np.array([-41.32]), np.array([-5.50]), np.array([40.96]))
    assert km[0] * 1000 == pytest.approx(19_959_679.267, abs=1e-3)


def test_tow_distances_match_geographiclib_to_1_mm() -> None:
    # Reference: geographiclib.geodesic.Geodesic.WGS84.Inverse (Karney 2013).
    rng = np.random.default_rng(42)
    lon1, lat1 = rng.uniform(-180, 180, 200), rng.uniform(-80, 80, 200)
    lon2, lat2 = lon1 + rng.normal(0, 0.05, 200), np.clip(lat1 + rng.normal(0, 0.05, 200), -89, 89)
    km, mid_lon, mid_lat = track_geometry(lon1, lat1, lon2, lat2)
    ref = np.array([Geodesic.WGS84.Inverse(a, b, c, d)["s12"] for a, b, c, d in zip(lat1, lon1, lat2, lon2, strict=True)])
    assert np.abs(km * 1000 - ref).max() < 1e-3
    # the midpoint lies half way along the geodesic
    half = np.array([Geodesic.WGS84.Inverse(a, b, c, d)["s12"] for a, b, c, d in zip(lat1, lon1, mid_lat, mid_lon, strict=True)])
    assert np.abs(half - ref / 2).max() < 1e-3


def test_one_degree_of_longitude_on_the_equator() -> None:
    # GeographicLib: 1 degree of longitude along the equator = 111,319.491 m on WGS84.
    km, _, _ = track_geometry(np.array([0.0]), np.array([0.0]), np.array([1.0]), np.array([0.0]))
    assert km[0] * 1000 == pytest.approx(111_319.491, abs=1e-3)


def test_area_swept_worked_example() -> None:
    # Swept-area method a = D x hr x X2 (Sparre and Venema 1998, FAO Fisheries Technical Paper
    # 306/1 Rev. 2, section 13.5). Worked example: 3 knots for 0.5 h gives D = 2,778 m;
    # headrope 20 m with X2 = 0.5 gives an effective width of 10 m; a = 27,780 m2.
    distance_km = 3.0 * 1.852 * 0.5  # 1 nmi = 1.852 km exactly (BIPM SI Brochure 2019, Table 8)
    assert distance_km * 1000 == pytest.approx(2778.0)
    assert area_swept_km2(distance_km, 20.0 * 0.5) * 1e6 == pytest.approx(27_780.0)


@pytest.mark.parametrize(
    ("dimension", "unit", "pint_unit", "canonical"),
    [
        ("distance", "nmi", "nautical_mile", "km"),     # 1852 m exactly (BIPM SI Brochure 2019)
        ("distance", "mi", "mile", "km"),
        # pint's "fathom" is 6 US survey feet (1.8288037 m); charts and the issue use the
        # international fathom, 6 international feet = 1.8288 m exactly (1959 agreement).
        ("length", "fathom", "6 * foot", "m"),
        ("length", "ft", "foot", "m"),
        ("duration", "min", "minute", "hour"),
        ("duration", "s", "second", "hour"),
        ("mass", "g", "gram", "kg"),
        ("mass", "lb", "pound", "kg"),
        ("speed", "m/s", "m/s", "knot"),
        ("speed", "km/h", "km/h", "knot"),
    ],
)
def test_unit_factors_agree_with_pint(dimension: str, unit: str, pint_unit: str, canonical: str) -> None:
    # Reference: pint's unit definitions.
    values = np.array([0.0, 1.0, 17.25, 1234.5])
    ours = units.to_canonical(values, dimension, unit)
    ref = (values * UREG(pint_unit)).to(canonical).magnitude
    assert ours == pytest.approx(ref, rel=1e-12)


@pytest.mark.parametrize(("unit", "pint_unit"), [("K", "kelvin"), ("degF", "degF"), ("degC", "degC")])
def test_temperature_conversion_agrees_with_pint(unit: str, pint_unit: str) -> None:
    values = np.array([-2.0, 0.0, 273.15, 300.0])
    ours = units.to_canonical(values, "temperature", unit)
    ref = UREG.Quantity(values, pint_unit).to("degC").magnitude
    assert ours == pytest.approx(ref, abs=1e-9)


def test_exact_definitions() -> None:
    # International nautical mile 1852 m; fathom = 6 ft = 1.8288 m (exact definitions).
    assert units.to_canonical(np.array([1.0]), "distance", "nmi")[0] == 1.852
    assert units.to_canonical(np.array([1.0]), "length", "fathom")[0] == 1.8288
