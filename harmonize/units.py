"""Unit conversion of adapter fields to their canonical units.

Factors are exact definitions where one exists: the international nautical mile is
1852 m (BIPM SI Brochure, 9th ed. 2019, Table 8), the international yard 0.9144 m and so
the fathom (2 yd) 1.8288 m and the foot 0.3048 m (International Yard and Pound Agreement,
1959), the avoirdupois pound 0.45359237 kg (same agreement); the knot is one nautical
mile per hour.
"""

from __future__ import annotations

import numpy as np

# dimension -> canonical unit -> {accepted spelling: factor to canonical}
_LINEAR: dict[str, dict[str, float]] = {
    "distance": {  # canonical km
        "km": 1.0, "kilometre": 1.0, "kilometer": 1.0, "m": 1e-3, "metre": 1e-3, "meter": 1e-3,
        "nmi": 1.852, "nautical_mile": 1.852, "NM": 1.852, "mi": 1.609344, "mile": 1.609344,
    },
    "length": {  # canonical m
        "m": 1.0, "metre": 1.0, "meter": 1.0, "cm": 0.01, "mm": 1e-3, "km": 1000.0,
        "ft": 0.3048, "foot": 0.3048, "fathom": 1.8288, "fm": 1.8288, "yd": 0.9144,
    },
    "duration": {  # canonical h
        "h": 1.0, "hour": 1.0, "hr": 1.0, "min": 1 / 60, "minute": 1 / 60, "s": 1 / 3600,
        "second": 1 / 3600, "d": 24.0, "day": 24.0,
    },
    "mass": {  # canonical kg
        "kg": 1.0, "g": 1e-3, "gram": 1e-3, "mg": 1e-6, "t": 1000.0, "tonne": 1000.0,
        "lb": 0.45359237, "pound": 0.45359237,
    },
    "speed": {  # canonical kn
        "kn": 1.0, "knot": 1.0, "kt": 1.0, "m/s": 3600 / 1852, "m s-1": 3600 / 1852,
        "km/h": 1000 / 1852, "km h-1": 1000 / 1852,
    },
    "area": {  # canonical m2
        "m2": 1.0, "cm2": 1e-4, "km2": 1e6,
    },
    "volume": {  # canonical m3
        "m3": 1.0, "l": 1e-3, "L": 1e-3, "litre": 1e-3,
    },
}
_TEMPERATURE = {"degC": (1.0, 0.0), "C": (1.0, 0.0), "celsius": (1.0, 0.0),
                "K": (1.0, -273.15), "kelvin": (1.0, -273.15),
                "degF": (5 / 9, -32 * 5 / 9), "F": (5 / 9, -32 * 5 / 9)}


def known_units(dimension: str) -> list[str]:
    """Accepted spellings for a dimension, for error messages."""
    if dimension == "temperature":
        return list(_TEMPERATURE)
    return list(_LINEAR[dimension])


def is_known(dimension: str, unit: str) -> bool:
    if dimension == "temperature":
        return unit in _TEMPERATURE
    return unit in _LINEAR.get(dimension, {})


def to_canonical(values: np.ndarray, dimension: str, unit: str) -> np.ndarray:
    """Convert ``values`` given in ``unit`` to the dimension's canonical unit.

    Raises
    ------
    KeyError
        When the unit is not known for the dimension.
    """
    values = np.asarray(values, dtype=float)
    if dimension == "temperature":
        scale, offset = _TEMPERATURE[unit]
        return values * scale + offset
    return values * _LINEAR[dimension][unit]


def density_unit_sql(unit: str, effort_unit: str) -> str:
    """DuckDB expression: the unit of ``value / effort`` in UDUNITS-style text, from the
    columns (or expressions) ``unit`` and ``effort_unit``.

    A dimensionless value ("1", a count) over km2 gives "km-2"; kg over km2 "kg km-2"; a count
    over m3 "m-3"; over h "h-1" (a name followed by its integer power, the power 1 written
    for a divisor: the UDUNITS-2 product syntax). An effort unit that is not one name with an
    optional power is written as ``(unit)-1``. Null where either is null.
    """
    name = f"regexp_extract({effort_unit}, '^([A-Za-z]+)([0-9]*)$', 1)"
    power = f"coalesce(nullif(regexp_extract({effort_unit}, '^[A-Za-z]+([0-9]*)$', 1), ''), '1')"
    inverse = (f"CASE WHEN {name} <> '' THEN {name} || '-' || {power} "
               f"ELSE '(' || {effort_unit} || ')-1' END")
    return (f"CASE WHEN {unit} IS NULL OR {effort_unit} IS NULL THEN NULL "
            f"WHEN {unit} = '1' THEN {inverse} ELSE {unit} || ' ' || {inverse} END")
