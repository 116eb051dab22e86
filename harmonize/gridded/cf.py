"""CF conventions: packed values, fill and valid ranges, time axes and calendars, canonical variables.

References
----------
Eaton et al., "NetCDF Climate and Forecast (CF) Metadata Conventions", version 1.11 (2023):
section 2.5.1 (missing data: _FillValue, missing_value, valid_min/valid_max/valid_range),
section 4.3 (vertical coordinates, the ``positive`` attribute), section 4.4 and 4.4.1
(time units "<unit> since <date>" and calendars, e.g. noleap and 360_day) and section 8.1
(packed data: unpacked = packed x scale_factor + add_offset; valid_* attributes are in the
packed type when they have the type of the stored data).
"""

from __future__ import annotations

import re
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

import cftime
import netCDF4
import numpy as np

#: netCDF default fill value of floating-point variables (Unidata netCDF, netcdf.h NC_FILL_FLOAT
#: and NC_FILL_DOUBLE); CF 2.5.1: data equal to it are missing when no _FillValue is given.
NETCDF_DEFAULT_FLOAT_FILL = 9.969209968386869e36

CALENDARS = frozenset({
    "standard", "gregorian", "proleptic_gregorian", "julian", "noleap", "365_day",
    "all_leap", "366_day", "360_day", "none",
})
_SINCE = re.compile(r"^\s*(\w+)\s+since\s+(.+?)\s*$")


class PackingError(ValueError):
    """Packing attributes that are numbers but unpack every value to nonsense (scale_factor = 0)."""


@dataclass(frozen=True)
class CanonicalVariable:
    """A physical variable harmonize knows: CF standard name, canonical unit, plausible range."""

    name: str
    unit: str
    dimension: str
    plausible: tuple[float, float]


# Plausible ranges in the canonical unit. Sea water freezes near -1.9 degC at salinity 35 and
# open-ocean temperatures stay below ~35 degC (common practice); ranges are wide on purpose:
# they catch unit mistakes (kelvin read as degC), not unusual water.
_TEMPERATURE_RANGE = (-5.0, 45.0)
CANONICAL_VARIABLES: dict[str, CanonicalVariable] = {
    v.name: v
    for v in (
        CanonicalVariable("sea_surface_temperature", "degC", "temperature", _TEMPERATURE_RANGE),
        CanonicalVariable("sea_surface_foundation_temperature", "degC", "temperature", _TEMPERATURE_RANGE),
        CanonicalVariable("sea_surface_skin_temperature", "degC", "temperature", _TEMPERATURE_RANGE),
        CanonicalVariable("sea_surface_subskin_temperature", "degC", "temperature", _TEMPERATURE_RANGE),
        CanonicalVariable("sea_water_temperature", "degC", "temperature", _TEMPERATURE_RANGE),
        CanonicalVariable("sea_water_potential_temperature", "degC", "temperature", _TEMPERATURE_RANGE),
        CanonicalVariable("sea_water_temperature_at_sea_floor", "degC", "temperature", _TEMPERATURE_RANGE),
        CanonicalVariable("sea_water_potential_temperature_at_sea_floor", "degC", "temperature",
                          _TEMPERATURE_RANGE),
        # chlorophyll: open ocean 0.01-1, coastal blooms up to ~100 mg m-3 (common practice)
        CanonicalVariable("mass_concentration_of_chlorophyll_a_in_sea_water", "mg m-3", "concentration",
                          (0.0, 1000.0)),
        CanonicalVariable("mass_concentration_of_chlorophyll_in_sea_water", "mg m-3", "concentration",
                          (0.0, 1000.0)),
        CanonicalVariable("sea_ice_area_fraction", "1", "fraction", (0.0, 1.0)),
        CanonicalVariable("sea_water_practical_salinity", "1", "salinity", (0.0, 45.0)),
        CanonicalVariable("sea_water_practical_salinity_at_sea_floor", "1", "salinity", (0.0, 45.0)),
    )
}

# Unit texts (the variables' `units` attributes and a profile's unit / force_unit) are read by
# the one registry, harmonize.units (pint with UDUNITS spellings).


# ------------------------------------------------------------------ packed values
@dataclass(frozen=True)
class Packing:
    """How the stored numbers of one variable decode (CF 2.5.1 and 8.1).

    ``fill_values`` are compared with the stored (packed) numbers; ``valid_packed`` is the
    valid interval in stored numbers, ``valid_unpacked`` the one in unpacked numbers (CF
    8.1: valid_* attributes typed like the stored data are packed, those typed like
    scale_factor are unpacked).
    """

    scale_factor: float
    add_offset: float
    fill_values: tuple[float, ...]
    valid_packed: tuple[float, float]
    valid_unpacked: tuple[float, float]
    unsigned: bool = False

    @classmethod
    def from_attrs(cls, attrs: Mapping[str, Any], dtype: np.dtype) -> Packing:
        """The packing of a variable from its raw attributes and its stored dtype.

        Raises
        ------
        PackingError
            A scale_factor of 0 or a non-finite scale_factor or add_offset.
        ValueError, TypeError
            An attribute that is not a number (e.g. valid_min = "low").
        """
        dtype = np.dtype(dtype)
        unsigned = dtype.kind == "i" and str(attrs.get("_Unsigned", "")).lower() == "true"
        scale = _scalar(attrs.get("scale_factor"), 1.0)
        offset = _scalar(attrs.get("add_offset"), 0.0)
        if scale == 0.0 or not np.isfinite(scale):
            raise PackingError(f"has scale_factor = {scale:g}: every value would unpack to add_offset ({offset:g}); "
                             "correct the packing attributes of the file")
        if not np.isfinite(offset):
            raise PackingError(f"has add_offset = {offset:g}; correct the packing attributes of the file")
        packed_type = attrs.get("scale_factor", attrs.get("add_offset"))
        fills: list[float] = []
        for key in ("_FillValue", "missing_value"):
            if key in attrs:
                fills += [float(_as_stored(v, dtype, unsigned)) for v in np.atleast_1d(attrs[key])]
        if "_FillValue" not in attrs and dtype.kind == "f":
            fills.append(NETCDF_DEFAULT_FLOAT_FILL)
        elif "_FillValue" not in attrs and dtype.kind in "iu" and dtype.itemsize > 1:
            # CF 1.11 section 2.5.1: without _FillValue the netCDF default fill of the type
            # marks missing data (netCDF4.default_fillvals; e.g. -32767 for a short). The
            # library does not assume one for single bytes, nor does harmonize.
            fills.append(float(_as_stored(netCDF4.default_fillvals[dtype.str[1:]], dtype, unsigned)))
        lo, hi = -np.inf, np.inf
        if "valid_range" in attrs:
            rng = np.atleast_1d(attrs["valid_range"])
            lo, hi = float(rng[0]), float(rng[-1])
            ref = rng
        else:
            ref = None
            if "valid_min" in attrs:
                lo = float(np.atleast_1d(attrs["valid_min"])[0])
                ref = np.atleast_1d(attrs["valid_min"])
            if "valid_max" in attrs:
                hi = float(np.atleast_1d(attrs["valid_max"])[0])
                ref = np.atleast_1d(attrs["valid_max"])
        packed_valid, unpacked_valid = (-np.inf, np.inf), (-np.inf, np.inf)
        if ref is not None:
            in_unpacked = (
                packed_type is not None and dtype.kind in "iu"
                and np.asarray(ref).dtype.kind == "f"
            )
            if in_unpacked:
                unpacked_valid = (lo, hi)
            else:
                if unsigned:  # an absent valid_min or valid_max stays unbounded (not cast to the type)
                    lo, hi = (float(_as_stored(v, dtype, True)) if np.isfinite(v) else v for v in (lo, hi))
                packed_valid = (lo, hi)
        return cls(scale, offset, tuple(fills), packed_valid, unpacked_valid, unsigned)

    def reading(self, stored: np.ndarray) -> np.ndarray:
        """The stored numbers as they are meant to be read: a view as unsigned with ``_Unsigned``."""
        raw = np.asarray(stored)
        if self.unsigned:
            raw = raw.view(np.dtype(f"u{raw.dtype.itemsize}"))
        return raw

    def stored_fill_values(self, dtype: np.dtype) -> list[Any]:
        """The fill/missing values as numbers of the stored reading's ``dtype`` (NaN fills left out:
        a NaN is missing whatever the attributes say)."""
        dtype = np.dtype(dtype)
        out = []
        for fv in self.fill_values:
            if np.isnan(fv):
                continue
            out.append(np.asarray(fv).astype(dtype)[()] if dtype.kind in "iu" else fv)
        return out

    def unpack(self, values: np.ndarray) -> np.ndarray:
        """Unpack float64 ``values`` in place (CF 8.1: packed x scale_factor + add_offset) and return them.

        The one place where stored numbers become physical ones: the float decode, the
        integer-domain bounds (:meth:`valid_stored`) and the summing of stored integers
        (:mod:`harmonize.gridded.screen`) all follow it.
        """
        if self.scale_factor != 1.0:
            values *= self.scale_factor
        if self.add_offset != 0.0:
            values += self.add_offset
        return values

    def decode(self, stored: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Unpack stored numbers.

        Returns
        -------
        values, fill, invalid
            float64 unpacked values (NaN where fill or invalid), the mask of fill/missing
            values (and NaN), and the mask of values outside the valid range (not fill).
        """
        raw = self.reading(stored)
        fill = np.zeros(raw.shape, dtype=bool)
        for fv in self.stored_fill_values(raw.dtype):
            fill |= raw == fv
        if raw.dtype.kind == "f":
            fill |= np.isnan(raw)
        values = raw.astype(np.float64)
        invalid = np.zeros(raw.shape, dtype=bool)
        lo, hi = self.valid_packed
        if np.isfinite(lo) or np.isfinite(hi):
            with np.errstate(invalid="ignore"):
                invalid |= (values < lo) | (values > hi)
        self.unpack(values)
        lo, hi = self.valid_unpacked
        if np.isfinite(lo) or np.isfinite(hi):
            with np.errstate(invalid="ignore"):
                invalid |= (values < lo) | (values > hi)
        invalid &= ~fill
        values[fill | invalid] = np.nan
        return values, fill, invalid

    def valid_stored(self, dtype: np.dtype) -> tuple[int, int]:
        """The stored integers of the reading ``dtype`` that :meth:`decode` calls valid, as [lo, hi].

        Exact, not estimated: each bound is found by bisection with the float arithmetic of
        :meth:`decode` itself (comparing the integer as a float64 with valid_packed, then its
        unpacked value with valid_unpacked), so a value on a bound, rounding and a negative
        scale_factor are classified as the decode classifies them. An empty range has lo > hi.
        """
        dtype = np.dtype(dtype)
        info = np.iinfo(dtype)
        lo, hi = integer_interval(lambda r: r.astype(np.float64), *self.valid_packed, int(info.min), int(info.max))
        u_lo, u_hi = integer_interval(lambda r: self.unpack(r.astype(np.float64)), *self.valid_unpacked,
                                      int(info.min), int(info.max), increasing=self.scale_factor > 0)
        return max(lo, u_lo), min(hi, u_hi)

    def describe_fill(self) -> str:
        shown = ", ".join(f"{v:g}" for v in self.fill_values)
        return f"_FillValue/missing_value ({shown})" if shown else "NaN"


def integer_interval(decode: Callable[[np.ndarray], np.ndarray], lo: float, hi: float, first: int, last: int,
                     increasing: bool = True) -> tuple[int, int]:
    """The integers r in [first, last] with lo <= decode(r) <= hi, as [r_lo, r_hi] (r_lo > r_hi: none).

    ``decode`` maps an int64 array to float64 and must be monotone (non-decreasing when
    ``increasing``): an affine map in IEEE arithmetic is, since rounding to nearest keeps
    order. The bounds are found by bisection with ``decode`` itself, so they hold exactly
    for the float arithmetic the caller uses, including values on a bound.
    """
    def at(r: int) -> float:
        return float(decode(np.array([r], np.int64))[0])

    def first_true(test: Callable[[float], bool]) -> int:
        # the least r in [first, last] where test(decode(r)) holds (monotone: false, then true); last + 1 if none
        a, b = first, last + 1
        while a < b:
            mid = (a + b) // 2
            if test(at(mid)):
                b = mid
            else:
                a = mid + 1
        return a

    # kept means "not (v < lo) and not (v > hi)", the negation of the callers' rejection test, so a
    # NaN bound rejects nothing, as the comparisons it replaces
    if increasing:
        return first_true(lambda v: not v < lo), first_true(lambda v: v > hi) - 1
    return first_true(lambda v: not v > hi), first_true(lambda v: v < lo) - 1


def _scalar(value: Any, default: float) -> float:
    if value is None:
        return default
    return float(np.atleast_1d(value)[0])


def _as_stored(value: Any, dtype: np.dtype, unsigned: bool) -> Any:
    """A fill/valid attribute as a stored number; with _Unsigned, as the unsigned reading."""
    if not unsigned:
        return value
    return np.asarray(value).astype(dtype).view(np.dtype(f"u{dtype.itemsize}")).item()


# ------------------------------------------------------------------ time
@dataclass(frozen=True)
class TimeAxis:
    """Decoded time steps: calendar year and month of each step (in the file's calendar)."""

    year: np.ndarray
    month: np.ndarray
    valid: np.ndarray
    calendar: str
    units: str


def decode_time(values: np.ndarray, units: str, calendar: str | None) -> TimeAxis:
    """Year and month of CF time values ("days since 2019-01-01", any CF calendar).

    Raises
    ------
    ValueError
        Units that are not "<unit> since <date>", or a calendar CF does not define.
    """
    cal = (calendar or "standard").strip().lower()
    if cal not in CALENDARS or cal == "none":
        raise ValueError(f"calendar '{calendar}' is not a CF calendar; expected one of "
                         f"{', '.join(sorted(CALENDARS - {'none'}))}")
    if not isinstance(units, str) or not _SINCE.match(units):
        raise ValueError(f"time units '{units}' are not of the CF form '<unit> since <date>'")
    vals = np.asarray(values, dtype=np.float64).ravel()
    valid = np.isfinite(vals) & (np.abs(vals) < 1e15)
    year = np.zeros(vals.shape, dtype=np.int64)
    month = np.ones(vals.shape, dtype=np.int64)
    if valid.any():
        try:
            dates = cftime.num2date(vals[valid], units, calendar=cal, only_use_cftime_datetimes=True)
        except (ValueError, TypeError) as exc:
            raise ValueError(f"time values cannot be decoded with units '{units}' ({exc})") from None
        # one Python step per time step (not per value): the time axis is short
        dates = np.atleast_1d(dates)
        year[valid] = np.fromiter((d.year for d in dates), dtype=np.int64, count=dates.size)
        month[valid] = np.fromiter((d.month for d in dates), dtype=np.int64, count=dates.size)
    return TimeAxis(year, month, valid, cal, units)


# ------------------------------------------------------------------ axes
_LAT_UNITS = frozenset({"degrees_north", "degree_north", "degree_N", "degrees_N", "degreeN", "degreesN"})
_LON_UNITS = frozenset({"degrees_east", "degree_east", "degree_E", "degrees_E", "degreeE", "degreesE"})
_LAT_NAMES = ("lat", "latitude", "nav_lat", "lat_rho", "lat_t", "y_lat")
_LON_NAMES = ("lon", "longitude", "nav_lon", "lon_rho", "lon_t", "x_lon")


def is_latitude(name: str, attrs: Mapping[str, Any]) -> bool:
    return (attrs.get("standard_name") == "latitude" or str(attrs.get("units", "")) in _LAT_UNITS
            or name.lower() in _LAT_NAMES)


def is_longitude(name: str, attrs: Mapping[str, Any]) -> bool:
    return (attrs.get("standard_name") == "longitude" or str(attrs.get("units", "")) in _LON_UNITS
            or name.lower() in _LON_NAMES)


def is_time(name: str, attrs: Mapping[str, Any]) -> bool:
    units = attrs.get("units")
    return (str(attrs.get("axis", "")).upper() == "T" or attrs.get("standard_name") == "time"
            or (isinstance(units, str) and bool(_SINCE.match(units)) and name.lower().startswith("time")))


def is_vertical(name: str, attrs: Mapping[str, Any]) -> bool:
    return (str(attrs.get("axis", "")).upper() == "Z" or "positive" in attrs
            or attrs.get("standard_name") in ("depth", "height", "depth_below_sea_surface")
            or name.lower() in ("depth", "deptht", "lev", "z", "level"))


def depth_metres(values: np.ndarray, attrs: Mapping[str, Any]) -> np.ndarray:
    """Depths of a vertical coordinate in metres below the surface (CF 4.3).

    Raises
    ------
    ValueError
        A unit other than metres/centimetres, or a dimensionless (sigma) coordinate.
    """
    units = str(attrs.get("units", "m")).strip()
    factor = {"m": 1.0, "meter": 1.0, "meters": 1.0, "metre": 1.0, "metres": 1.0, "cm": 0.01,
              "centimeters": 0.01}.get(units)
    if factor is None:
        raise ValueError(f"vertical coordinate units '{units}' are not metres; harmonize reads "
                         "depth levels in m (parametric sigma levels are not supported)")
    depth = np.asarray(values, dtype=np.float64) * factor
    if str(attrs.get("positive", "down")).lower() == "up":
        depth = -depth
    return depth
