"""The one unit registry: profile ``[units]`` and CF ``units`` attributes, read by pint.

Every unit text harmonize accepts (a profile's ``[units]`` entry, a NetCDF variable's
``units`` attribute, a gridded profile's ``unit``/``force_unit``) goes through this module.
pint (a maintained unit library) does the parsing and the arithmetic; this module adds

- the definitions marine data need and pint gets wrong or lacks, set explicitly: the
  international fathom, 6 international feet of 0.3048 m = 1.8288 m exactly (International
  Yard and Pound Agreement, 1959; pint's ``fathom`` is 6 US survey feet, 1.8288037 m, as is
  the "fathom (based on U.S. survey foot)" entry of NIST SP 811, from memory), the
  international nautical mile 1852 m and the knot, one nautical mile per hour (NIST SP 811,
  2008 ed., Appendix B.8: "foot = 0.3048 m", "mile, nautical = 1852 m", "knot =
  0.5144444 m/s"); ``fm`` is the fathom, not the femtometre (no survey measures depth in
  femtometres);
- the UDUNITS-2 spellings CF files use that pint reads otherwise or not at all: an integer
  power glued to a name (``m-3``, ``km2``), ``.`` between factors (``mg.m-3``), the
  Celsius and kelvin aliases (``degrees_C``, ``deg_C``, ``degree_C``; ``degrees_K``), and
  ``NM`` for the nautical mile (UDUNITS-2 manual, section "Unit syntax", and its
  udunits2-accepted/-common.xml databases; from memory);
- the canonical unit of each adapter dimension (distances km, lengths m, durations h,
  masses kg, speeds knots, areas m2, volumes m3, temperatures degC, concentrations mg m-3,
  fractions 1).

Practical salinity is a number on the PSS-78 scale, not a unit: CF labels it "1" (earlier
versions of the standard-name table "1e-3"; "psu" and "PSS-78" are common in files), and
every such label means the same number, so ``salinity`` takes the label and keeps the
value (CF Standard Name Table, sea_water_practical_salinity).

A conversion is a (scale, offset) pair computed once per unit text (cached); arrays are
converted with one multiply and one add: ``canonical = value * scale + offset``.
"""

from __future__ import annotations

import logging
import re
from functools import lru_cache

import numpy as np
import pint

# dimension -> (canonical unit as harmonize writes it, the same in pint syntax, examples for messages)
_CANONICAL: dict[str, tuple[str, str, tuple[str, ...]]] = {
    "distance": ("km", "km", ("km", "m", "nmi", "mi", "kilometres")),
    "length": ("m", "m", ("m", "cm", "mm", "km", "ft", "feet", "fathom", "fathoms", "yd")),
    "duration": ("h", "hour", ("h", "hours", "min", "minutes", "s", "d")),
    "mass": ("kg", "kg", ("kg", "g", "grams", "mg", "t", "tonnes", "lb")),
    "speed": ("kn", "knot", ("kn", "knots", "kt", "m/s", "m s-1", "km/h")),
    "area": ("m2", "m**2", ("m2", "cm2", "km2", "ha")),
    "volume": ("m3", "m**3", ("m3", "L", "litres", "cm3")),
    "temperature": ("degC", "degC", ("degC", "degree_Celsius", "K", "kelvin", "degF")),
    "concentration": ("mg m-3", "mg / m**3", ("mg m-3", "mg m**-3", "ug/L", "microgram/L", "kg m-3",
                                               "0.001 kg m-3")),
    "fraction": ("1", "dimensionless", ("1", "%", "percent", "fraction")),
}
DIMENSIONS: tuple[str, ...] = (*_CANONICAL, "salinity")

# Labels of the practical salinity scale (see the module docstring); the value is kept as given.
SALINITY_LABELS: tuple[str, ...] = ("1", "1e-3", "0.001", "psu", "PSU", "pss-78", "PSS-78", "dimensionless")

_DEFINITIONS = (
    # 6 international feet of 0.3048 m (NIST SP 811 (2008) B.8; International Yard and Pound Agreement 1959)
    "fathom = 1.8288 * meter = fm",
    # NIST SP 811 (2008), Appendix B.8: nautical mile = 1852 m; knot = 1 nautical mile per hour
    "nautical_mile = 1852 * meter = nmi = NM",
    "knot = nautical_mile / hour = kn = kt",
    "fraction = 1",
    # UDUNITS-2 spellings of Celsius and kelvin (from memory)
    "@alias degree_Celsius = deg_C = degree_C = degrees_C = degrees_Celsius = degreeC",
    "@alias kelvin = deg_K = degree_K = degrees_K = Kelvin",
)


class UnitError(ValueError):
    """A unit text that is not a unit of the dimension asked for; the message says what is accepted."""


@lru_cache(maxsize=1)
def registry() -> pint.UnitRegistry:
    """The pint registry with harmonize's explicit definitions (built once per process)."""
    # on_redefinition="warn" lets our definitions replace pint's; pint logs each replacement
    # as a warning, which is intended here and would only alarm a user: its logger is muted
    # while the definitions load
    ureg = pint.UnitRegistry(on_redefinition="warn", cache_folder=None)
    pint_log = logging.getLogger("pint.util")
    was_disabled, pint_log.disabled = pint_log.disabled, True
    try:
        for line in _DEFINITIONS:
            ureg.define(line)
    finally:
        pint_log.disabled = was_disabled
    return ureg


# UDUNITS-2 syntax -> pint syntax
_POWER = re.compile(r"(?<![\w.°µμ])([A-Za-z_°µμ]+)(\^|\*\*)?([+-]?\d+)(?![\w.])")
_DOT = re.compile(r"(?<![0-9])[.·]|[.·](?![0-9])")  # a product dot, not a decimal point


def _pint_text(unit: str) -> str:
    text = " ".join(unit.split())
    text = _DOT.sub(" ", text)
    return _POWER.sub(lambda m: f"{m.group(1)}**{m.group(3)}", text)


def _accepted(dimension: str) -> str:
    if dimension == "salinity":
        return "a practical salinity label: " + ", ".join(SALINITY_LABELS)
    canonical, _, examples = _CANONICAL[dimension]
    return (f"a {dimension} unit in UDUNITS or pint spelling, e.g. {', '.join(examples)} "
            f"(harmonize converts to {canonical})")


def conversion(dimension: str, unit: str) -> tuple[float, float]:
    """(scale, offset) taking values in ``unit`` to the canonical unit of ``dimension``.

    ``canonical = value * scale + offset``; the offset is non-zero only for temperatures
    given in kelvin or degF.

    Raises
    ------
    UnitError
        When ``unit`` is not a unit pint reads, or is a unit of another dimension; the
        one-line message names the unit and what is accepted.
    """
    if dimension not in DIMENSIONS:
        raise UnitError(f"'{dimension}' is not a unit dimension harmonize knows; one of {', '.join(DIMENSIONS)}")
    if not isinstance(unit, str) or not unit.strip():
        raise UnitError(f"{unit!r} is not a unit; give {_accepted(dimension)}")
    return _conversion(dimension, " ".join(unit.split()))


@lru_cache(maxsize=512)
def _conversion(dimension: str, text: str) -> tuple[float, float]:
    # computed once per (dimension, unit text): the factor every array of that unit is multiplied by
    unit = text
    if dimension == "salinity":
        if text in SALINITY_LABELS or text.casefold() in {s.casefold() for s in SALINITY_LABELS}:
            return (1.0, 0.0)
        raise UnitError(f"'{unit}' is not {_accepted(dimension)}")
    ureg = registry()
    target = ureg.parse_units(_CANONICAL[dimension][1])
    try:
        parsed = ureg.parse_expression(_pint_text(text))
    except pint.errors.OffsetUnitCalculusError:
        raise UnitError(f"'{unit}' scales a temperature with an offset (degC, K, degF), which has no "
                        f"single meaning; give {_accepted(dimension)}") from None
    except Exception as exc:  # pint raises several classes (undefined name, syntax, tokenizer)
        why = str(exc) or "not parsed"
        raise UnitError(f"'{unit}' is not a unit pint or UDUNITS reads ({why}); give "
                        f"{_accepted(dimension)}") from None
    quantity = parsed if isinstance(parsed, ureg.Quantity) else ureg.Quantity(float(parsed), "dimensionless")
    if quantity.dimensionality != target.dimensionality:
        what = ("a number" if not quantity.dimensionality
                else f"{quantity.units}, a unit of {quantity.dimensionality}")
        raise UnitError(f"'{unit}' is {what}, not a {dimension} unit; give {_accepted(dimension)}")
    if dimension != "temperature":
        return (_significant(quantity.to(target).magnitude), 0.0)
    # temperatures: the scale and the offset from where 0 and 1 of the given unit land
    zero = float(ureg.Quantity(0.0, quantity.units).to(target).magnitude)
    one = float(ureg.Quantity(1.0, quantity.units).to(target).magnitude)
    return (_significant(one - zero), _significant(zero))


def _significant(x: float) -> float:
    # pint's factor arithmetic leaves float noise in the last bits of exact decimal factors
    # (1 ug/L -> 0.9999999999999998 mg m-3, 1 ft -> 0.30479999999999996 m): a factor whose
    # 15-significant-digit form is a shorter decimal is that decimal; any other factor (1/60,
    # 3600/1852) is kept to the last bit as pint computed it
    x = float(x)
    text = f"{x:.15g}"
    digits = re.sub(r"[^0-9]", "", text.split("e")[0]).lstrip("0")
    return float(text) if len(digits) <= 12 else x


def canonical_unit(dimension: str) -> str:
    """The unit text harmonize stores values of ``dimension`` in."""
    return "1" if dimension == "salinity" else _CANONICAL[dimension][0]


def known_units(dimension: str) -> list[str]:
    """Example spellings for a dimension, for messages (any pint or UDUNITS spelling is read)."""
    return list(SALINITY_LABELS) if dimension == "salinity" else list(_CANONICAL[dimension][2])


def accepted(dimension: str) -> str:
    """What a unit of ``dimension`` may be, as a phrase for messages."""
    return _accepted(dimension)


def is_known(dimension: str, unit: str) -> bool:
    """Whether ``unit`` is a unit of ``dimension``."""
    try:
        conversion(dimension, unit)
    except UnitError:
        return False
    return True


def same_unit(dimension: str, a: str, b: str) -> bool:
    """Whether two texts name the same unit of ``dimension`` (the same conversion)."""
    try:
        ca, cb = conversion(dimension, a), conversion(dimension, b)
    except UnitError:
        return False
    return bool(np.isclose(ca[0], cb[0], rtol=1e-12, atol=0.0) and np.isclose(ca[1], cb[1], rtol=0.0, atol=1e-9))


def to_canonical(values: np.ndarray, dimension: str, unit: str) -> np.ndarray:
    """Convert ``values`` given in ``unit`` to the dimension's canonical unit (one multiply-add).

    Raises
    ------
    UnitError
        When the unit is not a unit of the dimension.
    """
    scale, offset = conversion(dimension, unit)
    values = np.asarray(values, dtype=float)
    if offset == 0.0:
        return values * scale if scale != 1.0 else values.copy()
    return values * scale + offset


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
