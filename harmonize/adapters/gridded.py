"""Gridded fields (satellite and ocean-model NetCDF) onto the study grid, in bounded memory.

A file's data variables are decoded following the CF conventions (packing, fill values,
valid ranges, time units and calendars; see :mod:`harmonize.gridded.cf`), converted to
canonical units, and reduced per study grid cell, period (month or season) and depth
layer to an area-weighted mean (:mod:`harmonize.gridded.aggregate`). Each pixel goes to
the cell holding its centre; pixel areas are exact on the WGS84 ellipsoid for lat/lon
grids and equal-area quadrilaterals for curvilinear ones (:mod:`harmonize.gridded.area`).

The file is read in blocks of time steps (and of grid rows when one time step is too big)
within the bounding box of the study domain, so peak memory is set by the block size
(``[aggregate] chunk_mb``), not by the length of the time axis. Every value of a mapped
variable is accounted for: used, or masked with a reason (outside_domain, missing_value
for fill values, out_of_range for values outside valid_min/valid_max or implausible for
the variable, bad_time for undecodable time steps), counted in bulk.
"""

from __future__ import annotations

import math
import time
from collections.abc import Iterator, Mapping
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import netCDF4
import numpy as np
import pandas as pd
import pyproj
import xarray as xr

from harmonize import units
from harmonize.adapters.base import Adapter, AdapterOutput, InputFile, ProgressCallback
from harmonize.adapters.registry import register
from harmonize.clock import EARLIEST_TIME
from harmonize.config_spec import Map, Table, Value, number, text
from harmonize.errors import ConfigError, InputFileError, ReasonCode
from harmonize.files import file_sha256
from harmonize.gridded.aggregate import (
    PERIODS,
    CellPeriodSums,
    Periods,
    PixelPeriodSums,
    assign_periods,
)
from harmonize.gridded.area import (
    axis_bounds,
    corners_from_centres,
    edges_from_centres,
    quad_area_km2,
    regular_pixel_area_km2,
)
from harmonize.gridded.cf import (
    CANONICAL_VARIABLES,
    CanonicalVariable,
    Packing,
    PackingError,
    TimeAxis,
    decode_time,
    depth_metres,
    is_latitude,
    is_longitude,
    is_time,
    is_vertical,
)
from harmonize.gridded.classic import classic_required_size
from harmonize.gridded.screen import FloatScreen, IntegerScreen, screen_for
from harmonize.profile import Profile
from harmonize.study import Study
from harmonize.tagging import NEAR_BOTTOM, Grid, inside_domain, normalise_lon

SURFACE = "surface"
LAYER_MODES = (SURFACE, NEAR_BOTTOM, "by_layer")
DEFAULT_CHUNK_MB = 128
#: Seconds allowed for reading one gridded file ([aggregate] max_seconds_per_file). A 2.7 GB
#: file of 1.4 billion values read in 156 s on 2 cores (docs/sources/gridded.md); ten minutes
#: leaves room for that four times over and still stops a hostile or broken file.
DEFAULT_MAX_SECONDS_PER_FILE = 600.0
#: Pixels of a block whose values the unit sanity check (its median) looks at.
_PLAUSIBLE_SAMPLE_PIXELS = 4096
_HDF5_SIGNATURE = b"\x89HDF\r\n\x1a\n"
HDF5_CHUNK_CACHE_BYTES = 4 * 2**20
_EARLIEST_YEAR = int(EARLIEST_TIME[:4])


# ------------------------------------------------------------------ settings
@dataclass(frozen=True)
class VariableMapping:
    """One [variables] entry: file variable -> canonical variable, optional unit."""

    file_name: str
    target: CanonicalVariable
    unit: str | None = None
    force_unit: bool = False


@dataclass(frozen=True)
class GriddedSettings:
    """The gridded sections of a profile, validated."""

    variables: tuple[VariableMapping, ...]
    period: str = "month"
    layer: str = SURFACE
    chunk_mb: float = DEFAULT_CHUNK_MB
    coordinates: Mapping[str, str] = field(default_factory=dict)
    max_seconds_per_file: float = DEFAULT_MAX_SECONDS_PER_FILE

    @classmethod
    def from_profile(cls, profile: Profile) -> GriddedSettings:
        """Read [variables], [aggregate] and [columns] of a gridded profile.

        Raises
        ------
        ConfigError
            Naming the profile key and what is expected.
        """
        raw = profile.section("variables")
        if not raw:
            raise ConfigError(profile.path, "[variables]",
                              "a gridded profile needs [variables] mapping file variables to CF standard "
                              "names, e.g. analysed_sst = \"sea_surface_temperature\"")
        known = ", ".join(sorted(CANONICAL_VARIABLES))
        mappings = []
        for file_name, spec in raw.items():
            key = f"variables.{file_name}"
            unit, force = None, False
            if isinstance(spec, Mapping):
                name = spec.get("name")
                unit = spec.get("unit", spec.get("force_unit"))
                force = "force_unit" in spec
                if force and "unit" in spec:
                    raise ConfigError(profile.path, key, "give either unit (checked against the file) "
                                      "or force_unit (replaces the file's units attribute), not both")
            else:
                name = spec
            if not isinstance(name, str) or name not in CANONICAL_VARIABLES:
                raise ConfigError(profile.path, key,
                                  f"'{name}' is not a physical variable harmonize knows; use a CF standard "
                                  f"name, one of: {known}")
            target = CANONICAL_VARIABLES[name]
            if unit is not None:
                try:
                    units.conversion(target.dimension, unit)
                except units.UnitError as exc:
                    raise ConfigError(profile.path, key, str(exc)) from None
            mappings.append(VariableMapping(file_name, target, unit, force))
        targets = [m.target.name for m in mappings]
        twice = sorted({t for t in targets if targets.count(t) > 1})
        if twice:
            raise ConfigError(profile.path, "[variables]",
                              f"several file variables map to '{twice[0]}'; use one profile per product")
        agg = profile.section("aggregate")  # its keys are checked by the profile's definition
        period = agg.get("period", "month")
        if period not in PERIODS:
            raise ConfigError(profile.path, "aggregate.period",
                              f"'{period}' is not a period; expected one of {', '.join(PERIODS)}")
        layer = agg.get("layer", SURFACE)
        if layer not in LAYER_MODES:
            raise ConfigError(profile.path, "aggregate.layer",
                              f"'{layer}' is not a layer mode; expected one of {', '.join(LAYER_MODES)}")
        chunk_mb = agg.get("chunk_mb", DEFAULT_CHUNK_MB)
        if isinstance(chunk_mb, bool) or not isinstance(chunk_mb, int | float) or not chunk_mb > 0:
            raise ConfigError(profile.path, "aggregate.chunk_mb", f"expected a number of megabytes above 0, got {chunk_mb!r}")
        seconds = agg.get("max_seconds_per_file", DEFAULT_MAX_SECONDS_PER_FILE)
        if isinstance(seconds, bool) or not isinstance(seconds, int | float) or not 0 < seconds < math.inf:
            raise ConfigError(profile.path, "aggregate.max_seconds_per_file",
                              f"expected a finite number of seconds above 0, got {seconds!r}")
        return cls(tuple(mappings), period, layer, float(chunk_mb), dict(profile.column_map("rows")),
                   float(seconds))


# ------------------------------------------------------------------ file access
@contextmanager
def open_netcdf(path: Path) -> Iterator[xr.Dataset]:
    """The file as a lazily read, undecoded xarray Dataset (values are read block by block).

    Raises
    ------
    InputFileError
        Missing file, not NetCDF, or a file the NetCDF library cannot open.
    """
    path = Path(path)
    if not path.is_file():
        raise InputFileError(path, "no such file")
    with open(path, "rb") as fh:
        head = fh.read(8)
    if not (head[:3] == b"CDF" or head == _HDF5_SIGNATURE):
        raise InputFileError(path, "is not a NetCDF file (it starts with neither the NetCDF 'CDF' nor the "
                             "HDF5 signature); convert the data to NetCDF (CF conventions) first")
    try:
        required = classic_required_size(path)
    except ValueError as exc:
        raise InputFileError(path, f"is not a readable NetCDF classic file ({exc}); download or export it again") from None
    size = path.stat().st_size
    if required is not None and size < required:
        raise InputFileError(path, f"is truncated: its NetCDF header describes {required:,} bytes of data but the file "
                             f"has {size:,}; download or export it again")
    try:
        nc = netCDF4.Dataset(path, "r")
    except Exception as exc:  # noqa: BLE001 - the backends raise many kinds
        raise InputFileError(path, f"cannot be opened as NetCDF ({type(exc).__name__}: {exc}); the file may be "
                             "truncated or corrupt: download or export it again") from None
    try:
        if nc.data_model.startswith("NETCDF4"):
            # Each value is read once, so the HDF5 chunk cache (64 MiB per variable by default
            # in netCDF-C 4.9) only costs memory: a small one for each variable of this file
            # (the library's process-wide default is left alone)
            for var in nc.variables.values():
                var.set_var_chunk_cache(size=HDF5_CHUNK_CACHE_BYTES)
        ds = xr.open_dataset(xr.backends.NetCDF4DataStore(nc), decode_cf=False, mask_and_scale=False,
                             decode_times=False, cache=False)
    except Exception as exc:  # noqa: BLE001 - the backends raise many kinds
        nc.close()
        raise InputFileError(path, f"cannot be opened as NetCDF ({type(exc).__name__}: {exc}); the file may be "
                             "truncated or corrupt: download or export it again") from None
    try:
        _check_declared_size(path, ds, size)
        yield ds
    finally:
        ds.close()


#: Values a file may declare per byte it holds: unwritten HDF5 chunks cost nothing on disk, so a
#: 96 KB file could declare 2.5e10 values and be read as gigabytes of fill values.
MAX_DECLARED_VALUES_PER_BYTE = 1_000
#: Declared values accepted whatever the file's size (a small, very compressible field).
MIN_VALUE_BUDGET = 100_000_000


def _check_declared_size(path: Path, ds: xr.Dataset, size: int) -> None:
    """Refuse, before any value is read, a file whose variables declare far more values than it holds."""
    budget = max(MIN_VALUE_BUDGET, MAX_DECLARED_VALUES_PER_BYTE * size)
    for name, var in ds.data_vars.items():
        declared = math.prod(int(n) for n in var.shape)  # Python integers: no overflow
        if declared > budget:
            raise InputFileError(path, f"variable '{name}' declares {declared:,} values ({' x '.join(map(str, var.shape))}) "
                                 f"in a file of {size:,} bytes, more than {budget:,}: it is mostly unwritten or "
                                 "damaged; export the data again")


# ------------------------------------------------------------------ geometry
@dataclass
class PixelGeometry:
    """Where a grid's pixels fall: the bounding window read, pixel areas and study cells."""

    y_dim: str
    x_dim: str
    window: tuple[int, int, int, int]  # y0, y1, x0, x1 in the file's index space
    n_pixels_total: int
    inside_flat: np.ndarray  # flat index (in the window) of pixels inside the domain
    pixel_cell: np.ndarray  # compact cell index of each inside pixel
    area_km2: np.ndarray  # area of each inside pixel
    cells: pd.DataFrame  # cell_id, lon, lat (centre) per compact index
    extent: str  # the file's lon/lat extent, for messages

    @property
    def n_inside(self) -> int:
        return int(self.inside_flat.size)

    @property
    def window_shape(self) -> tuple[int, int]:
        y0, y1, x0, x1 = self.window
        return y1 - y0, x1 - x0


def _bounds_of(ds: xr.Dataset, name: str) -> np.ndarray | None:
    bname = ds[name].attrs.get("bounds")
    if isinstance(bname, str) and bname in ds.variables:
        return np.asarray(ds[bname].values, dtype=np.float64)
    return None


def _extent(lon: np.ndarray, lat: np.ndarray) -> str:
    lon, lat = lon[np.isfinite(lon)], lat[np.isfinite(lat)]
    if lon.size == 0 or lat.size == 0:
        return "no finite coordinates"
    return f"lon {lon.min():.2f} to {lon.max():.2f}, lat {lat.min():.2f} to {lat.max():.2f}"


def regular_geometry(ds: xr.Dataset, lat_name: str, lon_name: str, study: Study, grid: Grid) -> PixelGeometry:
    """Geometry of a grid with 1-D latitude and longitude axes (either order and direction)."""
    lat = np.asarray(ds[lat_name].values, dtype=np.float64)
    lon = np.asarray(ds[lon_name].values, dtype=np.float64)
    lat_b, lon_b = _bounds_of(ds, lat_name), _bounds_of(ds, lon_name)
    lat_lo, lat_hi = (lat_b[:, 0], lat_b[:, 1]) if lat_b is not None else axis_bounds(lat)
    lon_lo, lon_hi = (lon_b[:, 0], lon_b[:, 1]) if lon_b is not None else axis_bounds(lon)
    xmin, ymin, xmax, ymax = study.domain.bounds
    pad_y = float(np.nanmax(np.abs(lat_hi - lat_lo))) if lat.size else 0.0
    pad_x = float(np.nanmax(np.abs(lon_hi - lon_lo))) if lon.size else 0.0
    lon_n = normalise_lon(lon)
    rows = np.flatnonzero((lat >= ymin - pad_y) & (lat <= ymax + pad_y))
    cols = np.flatnonzero((lon_n >= xmin - pad_x) & (lon_n <= xmax + pad_x))
    extent = _extent(lon, lat)
    if rows.size == 0 or cols.size == 0:
        return _empty_geometry(lat_name, lon_name, lat.size * lon.size, extent)
    y0, y1, x0, x1 = int(rows.min()), int(rows.max()) + 1, int(cols.min()), int(cols.max()) + 1
    sub_lon, sub_lat = np.meshgrid(lon[x0:x1], lat[y0:y1])
    area = regular_pixel_area_km2(lat_lo[y0:y1], lat_hi[y0:y1], lon_lo[x0:x1], lon_hi[x0:x1])
    dims = (ds[lat_name].dims[0], ds[lon_name].dims[0])
    return _finish_geometry(dims, (y0, y1, x0, x1), lat.size * lon.size, sub_lon, sub_lat, area, study, grid, extent)


def curvilinear_geometry(lon2: np.ndarray, lat2: np.ndarray, dims: tuple[str, str], study: Study,
                         grid: Grid, corners: tuple[np.ndarray, np.ndarray] | None = None) -> PixelGeometry:
    """Geometry of a grid with 2-D longitude and latitude fields (dims = (y, x))."""
    lon2 = np.asarray(lon2, np.float64)
    lat2 = np.asarray(lat2, np.float64)
    extent = _extent(lon2, lat2)
    xmin, ymin, xmax, ymax = study.domain.bounds
    lon_n = normalise_lon(lon2)
    # a pixel may reach into the domain from outside its box: pad by the largest pixel step
    step = np.nanmax(np.abs(np.diff(lat2, axis=0))) if lat2.shape[0] > 1 else 1.0
    step = max(step, np.nanmax(np.abs(np.diff(lat2, axis=1))) if lat2.shape[1] > 1 else 0.0)
    pad = float(step) if np.isfinite(step) else 1.0
    with np.errstate(invalid="ignore"):
        near = (lat2 >= ymin - pad) & (lat2 <= ymax + pad) & (lon_n >= xmin - 2 * pad) & (lon_n <= xmax + 2 * pad)
    rows, cols = np.flatnonzero(near.any(axis=1)), np.flatnonzero(near.any(axis=0))
    if rows.size == 0:
        return _empty_geometry(*dims, lon2.size, extent)
    y0, y1, x0, x1 = int(rows.min()), int(rows.max()) + 1, int(cols.min()), int(cols.max()) + 1
    if corners is not None:
        c_lon, c_lat = corners[0][y0:y1 + 1, x0:x1 + 1], corners[1][y0:y1 + 1, x0:x1 + 1]
    else:
        # corners from the centres of a window one pixel wider, so inner edges are true midpoints
        ya, yb, xa, xb = max(y0 - 1, 0), min(y1 + 1, lat2.shape[0]), max(x0 - 1, 0), min(x1 + 1, lat2.shape[1])
        c_lon, c_lat = corners_from_centres(lon2[ya:yb, xa:xb], lat2[ya:yb, xa:xb])
        c_lon, c_lat = (c[y0 - ya:y0 - ya + (y1 - y0) + 1, x0 - xa:x0 - xa + (x1 - x0) + 1] for c in (c_lon, c_lat))
    area = quad_area_km2(c_lon, c_lat)
    return _finish_geometry(dims, (y0, y1, x0, x1), lon2.size, lon2[y0:y1, x0:x1], lat2[y0:y1, x0:x1],
                            area, study, grid, extent)


def _empty_geometry(y_dim: str, x_dim: str, n_total: int, extent: str) -> PixelGeometry:
    return PixelGeometry(y_dim, x_dim, (0, 0, 0, 0), int(n_total), np.array([], np.int64),
                         np.array([], np.int64), np.array([]), pd.DataFrame({"cell_id": [], "lon": [], "lat": []}),
                         extent)


def unique_pairs(ix: np.ndarray, iy: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``np.unique(np.stack([ix, iy], axis=1), axis=0, return_inverse=True)``, by one int64 key.

    The key (ix - min) x span_y + (iy - min) sorts as the rows do (ix first), so the result
    is the same; a row-wise unique sorts structured rows and took seconds for a grid's
    pixels. Falls back to it where the key would overflow.
    """
    ix, iy = np.asarray(ix, np.int64), np.asarray(iy, np.int64)
    if ix.size == 0:
        return np.empty((0, 2), np.int64), np.empty(0, np.int64)
    x0, y0 = int(ix.min()), int(iy.min())
    span_x, span_y = int(ix.max()) - x0 + 1, int(iy.max()) - y0 + 1
    if span_x * span_y >= 2**62:
        uniq, inverse = np.unique(np.stack([ix, iy], axis=1), axis=0, return_inverse=True)
        return uniq, inverse.ravel()
    keys, inverse = np.unique((ix - x0) * span_y + (iy - y0), return_inverse=True)
    return np.stack([keys // span_y + x0, keys % span_y + y0], axis=1), inverse.ravel()


def _finish_geometry(dims: tuple[str, str], window: tuple[int, int, int, int], n_total: int,
                     lon: np.ndarray, lat: np.ndarray, area: np.ndarray, study: Study, grid: Grid,
                     extent: str) -> PixelGeometry:
    lon_f, lat_f = normalise_lon(lon.ravel()), lat.ravel()
    inside = inside_domain(study.domain, lon_f, lat_f) & np.isfinite(area.ravel()) & (area.ravel() > 0)
    inside_flat = np.flatnonzero(inside)
    ix, iy = grid.indices(lon_f[inside_flat], lat_f[inside_flat])
    uniq, compact = unique_pairs(ix, iy)
    c_lon, c_lat = grid.cell_centres_lonlat(uniq[:, 0], uniq[:, 1]) if len(uniq) else (np.array([]), np.array([]))
    ids = "x" + pd.Series(uniq[:, 0]).astype("string") + "_y" + pd.Series(uniq[:, 1]).astype("string")
    cells = pd.DataFrame({"cell_id": ids.astype(str), "lon": normalise_lon(np.asarray(c_lon)), "lat": np.asarray(c_lat)})
    return PixelGeometry(dims[0], dims[1], window, int(n_total), inside_flat, compact.ravel().astype(np.int64),
                         area.ravel()[inside_flat], cells, extent)


# ------------------------------------------------------------------ one variable
@dataclass
class VariablePlan:
    """How one mapped variable is read: its axes, packing, units, geometry and layers."""

    mapping: VariableMapping
    t_dim: str
    z_dim: str | None
    fixed: dict[str, int]
    time: TimeAxis
    periods: Periods
    geometry: PixelGeometry
    packing: Packing
    file_unit: str
    scale: float
    offset: float
    level_layer: np.ndarray  # (Z,) study-layer index per level, -1 below the deepest layer
    level_weight: np.ndarray  # (Z,) level thickness in m (1 for 2-D fields)
    layer_names: list[str]
    layer_weight: np.ndarray  # total level weight of each layer
    layer_depths: list[tuple[float | None, float | None]]
    early: np.ndarray  # (T,) steps dated before the earliest date (bad times)
    time_notes: list[str]

    @property
    def n_levels(self) -> int:
        return int(self.level_layer.size)

    @property
    def n_values(self) -> int:
        return self.geometry.n_pixels_total * int(self.time.year.size) * self.n_levels


def _coordinate_role(ds: xr.Dataset, names: Mapping[str, str], role: str, path: Path, profile: Profile) -> str | None:
    name = names.get(role)
    if name is None:
        return None
    if name not in ds.variables:
        raise InputFileError(path, f"coordinate '{name}', which [columns] {role} of {profile.path.name} names, "
                             f"is not in the file; variables are: {', '.join(map(str, ds.variables))}")
    return name


def plan_variable(ds: xr.Dataset, mapping: VariableMapping, settings: GriddedSettings, study: Study,
                  grid: Grid, path: Path, profile: Profile, geometries: dict[tuple, PixelGeometry]) -> VariablePlan:
    """Find the axes of one variable and everything needed to read it block by block.

    Raises
    ------
    InputFileError
        The variable is missing, has no time axis, no usable coordinates, unknown units
        or extra dimensions, or its depth axis does not suit the profile's layer mode.
    """
    name = mapping.file_name
    if name not in ds.variables:
        data_vars = ", ".join(map(str, ds.data_vars)) or "none"
        raise InputFileError(path, f"variable '{name}', mapped in [variables] of {profile.path.name}, is not "
                             f"in the file; its data variables are: {data_vars}")
    var = ds[name]
    dims = list(var.dims)
    coords = settings.coordinates

    # time
    t_name = _coordinate_role(ds, coords, "time", path, profile)
    if t_name is None:
        t_name = next((d for d in dims if d in ds.variables and is_time(str(d), ds[d].attrs)), None)
    if t_name is None or ds[t_name].ndim != 1 or ds[t_name].dims[0] not in dims:
        raise InputFileError(path, f"variable '{name}' has no time axis (no dimension with a CF time coordinate, "
                             "units '<unit> since <date>'); name it with [columns] time = \"...\" in "
                             f"{profile.path.name}, or add a time dimension to the file")
    t_dim = ds[t_name].dims[0]
    if ds.sizes[t_dim] == 0:
        raise InputFileError(path, f"the time axis '{t_dim}' of '{name}' has no steps: the file holds no values "
                             "to read")
    time, at, time_notes = _time_steps(ds, t_name, name, path)
    # the earliest-date rule of the tabular sources (harmonize.clock.EARLIEST_TIME): older steps are bad times
    early = at.valid & (at.year < _EARLIEST_YEAR)
    periods = assign_periods(at.year, at.month, at.valid & ~early, settings.period, study.seasons)

    # vertical
    z_name = _coordinate_role(ds, coords, "depth", path, profile)
    if z_name is None:
        z_name = next((d for d in dims if d != t_dim and d in ds.variables and ds[d].ndim == 1
                       and is_vertical(str(d), ds[d].attrs)), None)
    z_dim = ds[z_name].dims[0] if z_name is not None and ds[z_name].dims[0] in dims else None
    if z_dim is not None and ds.sizes[z_dim] > 1 and settings.layer != "by_layer":
        raise InputFileError(path, f"variable '{name}' has {ds.sizes[z_dim]} depth levels ('{z_dim}') but "
                             f"{profile.path.name} asks for layer = \"{settings.layer}\"; set [aggregate] "
                             "layer = \"by_layer\" to reduce it per study depth layer, or map a 2-D field")
    if settings.layer == "by_layer" and z_dim is None:
        raise InputFileError(path, f"variable '{name}' has no depth axis, but {profile.path.name} asks for "
                             "layer = \"by_layer\"; use layer = \"surface\" or \"near_bottom\" for 2-D fields")

    # horizontal
    geometry, y_dim, x_dim = _horizontal(ds, name, dims, t_dim, z_dim, coords, study, grid, path, profile, geometries)
    fixed: dict[str, int] = {}
    for d in dims:
        if d in (t_dim, y_dim, x_dim) or (d == z_dim and settings.layer == "by_layer"):
            continue
        if ds.sizes[d] != 1:
            raise InputFileError(path, f"variable '{name}' has an extra dimension '{d}' of size {ds.sizes[d]}; "
                                 "harmonize reads (time, [depth], y, x) fields; select one value of it first")
        fixed[d] = 0
    if settings.layer == "by_layer":
        assert z_dim is not None
        level_layer, level_weight, names, layer_weight, depths = _levels(ds, z_name, study, path, name)
        fixed.pop(z_dim, None)
    else:
        level_layer, level_weight = np.zeros(1, np.int64), np.ones(1)
        names, layer_weight, depths = [settings.layer], np.ones(1), [(None, None)]
        z_dim = None

    # units
    target = mapping.target
    file_unit = var.attrs.get("units")
    file_unit = str(file_unit).strip() if file_unit is not None and str(file_unit).strip() else None
    if mapping.force_unit:
        unit = mapping.unit
    elif file_unit is None:
        if mapping.unit is None:
            raise InputFileError(path, f"variable '{name}' has no units attribute; give its unit in "
                                 f"{profile.path.name}, e.g. {name} = {{ name = \"{target.name}\", unit = \"...\" }}")
        unit = mapping.unit
    else:
        try:
            units.conversion(target.dimension, file_unit)
        except units.UnitError as exc:
            raise InputFileError(path, f"variable '{name}': units {exc}; correct the file, "
                                 f"or set force_unit in [variables] of {profile.path.name}") from None
        if mapping.unit is not None and not units.same_unit(target.dimension, file_unit, mapping.unit):
            raise InputFileError(path, f"variable '{name}' has units '{file_unit}' but {profile.path.name} says "
                                 f"'{mapping.unit}'; check which is right (use force_unit to override the file)")
        unit = file_unit
    assert unit is not None
    scale, offset = units.conversion(target.dimension, unit)
    try:
        packing = Packing.from_attrs(var.attrs, var.dtype)
    except PackingError as exc:  # scale_factor = 0: every value would be the offset
        raise InputFileError(path, f"variable '{name}' {exc}") from None
    except (TypeError, ValueError) as exc:  # e.g. valid_min = "low"
        raise InputFileError(path, f"variable '{name}' has a packing or valid-range attribute that is not a "
                             f"number ({exc}); correct the file's _FillValue, scale_factor, add_offset and "
                             "valid_min / valid_max / valid_range") from None
    return VariablePlan(mapping, t_dim, z_dim, fixed, time, periods, geometry, packing, unit, scale, offset,
                        level_layer, level_weight, names, layer_weight, depths, early, time_notes)


def _time_steps(ds: xr.Dataset, t_name: str, name: str, path: Path) -> tuple[TimeAxis, TimeAxis, list[str]]:
    """The decoded time stamps, the time that places each step in a period, and notes.

    With CF time bounds (CF 1.11 section 7.1: the bounds variable named by the coordinate's
    ``bounds`` attribute, in the coordinate's units and calendar), a step belongs to the
    period holding the midpoint of its bounds: a monthly mean stamped at the end of its month
    (upper bound) stays in its own month. A step whose bounds straddle two periods goes whole
    to the period of its midpoint. Without bounds, the stamp places the step.
    """
    t_attrs = ds[t_name].attrs
    units, calendar = t_attrs.get("units"), t_attrs.get("calendar")
    stamps = np.asarray(ds[t_name].values, np.float64)
    try:
        time = decode_time(stamps, units, calendar)
    except ValueError as exc:
        raise InputFileError(path, f"time coordinate '{t_name}' of '{name}': {exc}") from None
    bname = t_attrs.get("bounds")
    if not (isinstance(bname, str) and bname in ds.variables):
        return time, time, []
    bounds = np.asarray(ds[bname].values, np.float64)
    if bounds.shape != (stamps.size, 2):
        raise InputFileError(path, f"time bounds '{bname}' of '{t_name}' have shape {bounds.shape}, expected "
                             f"({stamps.size}, 2) (CF 7.1: one lower and one upper bound per time step); "
                             "correct the file or remove its bounds attribute")
    midpoint = bounds.mean(axis=1)
    try:
        at = decode_time(midpoint, units, calendar)
    except ValueError as exc:
        raise InputFileError(path, f"time bounds '{bname}' of '{name}': {exc}") from None
    at = TimeAxis(at.year, at.month, at.valid & time.valid, at.calendar, at.units)
    notes = [f"'{name}': time steps placed in periods by the midpoint of their bounds '{bname}' (CF 1.11 section 7.1)"]
    upper = at.valid & (stamps == bounds.max(axis=1))
    if upper.any():
        notes.append(f"'{name}': {int(upper.sum())} of {stamps.size} time stamps equal the upper bound of their "
                     "interval (stamped at its end); each step counts in the period of its midpoint, not of its stamp")
    return time, at, notes


def _horizontal(ds: xr.Dataset, name: str, dims: list, t_dim: str, z_dim: str | None, coords: Mapping[str, str],
                study: Study, grid: Grid, path: Path, profile: Profile,
                cache: dict[tuple, PixelGeometry]) -> tuple[PixelGeometry, str, str]:
    var = ds[name]
    lat_name = _coordinate_role(ds, coords, "lat", path, profile)
    lon_name = _coordinate_role(ds, coords, "lon", path, profile)
    space = [d for d in dims if d not in (t_dim, z_dim)]
    if lat_name is None or lon_name is None:
        one_d = [d for d in space if d in ds.variables and ds[d].ndim == 1]
        lat_name = lat_name or next((d for d in one_d if is_latitude(str(d), ds[d].attrs)), None)
        lon_name = lon_name or next((d for d in one_d if is_longitude(str(d), ds[d].attrs)), None)
    if lat_name is None or lon_name is None:
        listed = str(var.attrs.get("coordinates", "")).split()
        candidates = listed + [str(v) for v in ds.variables if str(v) not in listed]
        two_d = [c for c in candidates if c in ds.variables and ds[c].ndim == 2 and set(ds[c].dims) <= set(space)]
        lat_name = lat_name or next((c for c in two_d if is_latitude(c, ds[c].attrs)), None)
        lon_name = lon_name or next((c for c in two_d if is_longitude(c, ds[c].attrs)), None)
    if lat_name is not None and lon_name is not None:
        lat_v, lon_v = ds[lat_name], ds[lon_name]
        if lat_v.ndim == 1 and lon_v.ndim == 1 and lat_v.dims[0] in dims and lon_v.dims[0] in dims:
            key = ("regular", lat_name, lon_name)
            if key not in cache:
                for axis in (lat_name, lon_name):
                    _check_axis(ds, axis, path)
                cache[key] = regular_geometry(ds, lat_name, lon_name, study, grid)
            return cache[key], lat_v.dims[0], lon_v.dims[0]
        if lat_v.ndim == 2 and lat_v.dims == lon_v.dims and set(lat_v.dims) <= set(dims):
            key = ("curvilinear", lat_name, lon_name)
            y_dim, x_dim = lat_v.dims
            if key not in cache:
                corners = None
                lat_b, lon_b = _bounds_of(ds, lat_name), _bounds_of(ds, lon_name)
                if lat_b is not None and lon_b is not None and lat_b.ndim == 3 and lat_b.shape[-1] == 4:
                    corners = (_corners_from_bounds(lon_b), _corners_from_bounds(lat_b))
                cache[key] = curvilinear_geometry(lon_v.values, lat_v.values, (y_dim, x_dim), study, grid, corners)
            return cache[key], y_dim, x_dim
    projected = _projected(ds, name, space)
    if projected is not None:
        (y_dim, x_dim), lon2, lat2 = projected
        key = ("projected", y_dim, x_dim)
        if key not in cache:
            cache[key] = curvilinear_geometry(lon2, lat2, (y_dim, x_dim), study, grid)
        return cache[key], y_dim, x_dim
    raise InputFileError(path, f"variable '{name}' has no usable horizontal coordinates: no latitude/longitude "
                         "(1-D axes or 2-D fields with CF units degrees_north/degrees_east) and no projected x/y "
                         f"axes with a grid_mapping; name them with [columns] lat and lon in {profile.path.name}")


def _check_axis(ds: xr.Dataset, name: str, path: Path) -> None:
    """Refuse a 1-D coordinate axis whose pixel sizes cannot be known.

    Pixel edges lie half way between neighbouring centres, which needs the finite centres
    to run one way (strictly increasing or decreasing) and, for a single centre, CF bounds
    (CF 1.11 section 7.1); anything else would give wrong areas and cells without a word.
    """
    values = np.asarray(ds[name].values, np.float64)
    finite = values[np.isfinite(values)]
    step = np.diff(finite)
    if finite.size > 1 and not ((step > 0).all() or (step < 0).all()):
        bad = np.flatnonzero((np.sign(step) != np.sign(step[0])) | (step == 0))
        i = int(bad[0]) + 1
        raise InputFileError(path, f"coordinate axis '{name}' is not monotonic ({finite[i]:g} follows {finite[i - 1]:g} "
                             f"at finite position {i + 1} of {finite.size}); pixel edges cannot be placed: sort the "
                             "file along this axis (e.g. with xarray's sortby) or remove repeated values")
    if values.size == 1 and _bounds_of(ds, name) is None:
        raise InputFileError(path, f"coordinate axis '{name}' has a single value ({values[0]:g}) and no bounds, so "
                             "its pixel size is unknown; add CF bounds (a bounds attribute naming a (1, 2) variable)")


def _corners_from_bounds(b: np.ndarray) -> np.ndarray:
    """(ny+1, nx+1) corners from CF (ny, nx, 4) vertex bounds (counter-clockwise from lower left)."""
    ny, nx, _ = b.shape
    out = np.empty((ny + 1, nx + 1))
    out[:-1, :-1] = b[:, :, 0]
    out[:-1, -1] = b[:, -1, 1]
    out[-1, :-1] = b[-1, :, 3]
    out[-1, -1] = b[-1, -1, 2]
    return out


def _projected(ds: xr.Dataset, name: str, space: list) -> tuple[tuple[str, str], np.ndarray, np.ndarray] | None:
    """lon/lat of a projected grid (x/y axes plus a CF grid_mapping), or None."""
    gm = ds[name].attrs.get("grid_mapping")
    if not isinstance(gm, str) or gm not in ds.variables or len(space) != 2:
        return None
    axes = {}
    for d in space:
        if d not in ds.variables:
            return None
        attrs = ds[d].attrs
        sn, ax = attrs.get("standard_name", ""), str(attrs.get("axis", "")).upper()
        if sn == "projection_x_coordinate" or ax == "X":
            axes["x"] = d
        elif sn == "projection_y_coordinate" or ax == "Y":
            axes["y"] = d
    if set(axes) != {"x", "y"}:
        return None
    try:
        crs = pyproj.CRS.from_cf(dict(ds[gm].attrs))
    except pyproj.exceptions.CRSError:
        return None
    factor = {"km": 1000.0}.get(str(ds[axes["x"]].attrs.get("units", "m")), 1.0)
    xx, yy = np.meshgrid(ds[axes["x"]].values * factor, ds[axes["y"]].values * factor)
    to_ll = pyproj.Transformer.from_crs(crs, "EPSG:4326", always_xy=True)
    lon, lat = to_ll.transform(xx, yy)
    return (axes["y"], axes["x"]), np.asarray(lon), np.asarray(lat)


def _levels(ds: xr.Dataset, z_name: str | None, study: Study, path: Path,
            name: str) -> tuple[np.ndarray, np.ndarray, list[str], np.ndarray, list[tuple[float | None, float | None]]]:
    """Study layer and thickness (m) of each depth level (point depth d: top <= d < bottom)."""
    assert z_name is not None
    try:
        depth = depth_metres(ds[z_name].values, ds[z_name].attrs)
    except ValueError as exc:
        raise InputFileError(path, f"depth axis '{z_name}' of '{name}': {exc}") from None
    bounds = _bounds_of(ds, z_name)
    if bounds is not None and bounds.shape == (depth.size, 2):
        b = np.sort(depth_metres(bounds, ds[z_name].attrs), axis=1)
        thickness = b[:, 1] - b[:, 0]
    else:
        order = np.argsort(depth)
        edges = edges_from_centres(depth[order])
        edges[0] = max(edges[0], 0.0)
        thickness = np.empty_like(depth)
        thickness[order] = np.diff(edges)
    tops = np.array([lay.top_m for lay in study.depth_layers])
    bottoms = np.array([lay.bottom_m for lay in study.depth_layers])
    idx = np.searchsorted(bottoms, depth, side="right")
    layer = np.where((idx < len(bottoms)) & (depth >= tops[0]), idx, -1).astype(np.int64)
    names = [lay.name for lay in study.depth_layers]
    weight = np.bincount(layer[layer >= 0], weights=thickness[layer >= 0], minlength=len(names))
    depths = [(lay.top_m, lay.bottom_m) for lay in study.depth_layers]
    return layer, np.maximum(thickness, 0.0), names, weight, depths


# ------------------------------------------------------------------ reading blocks
@dataclass
class MaskCounts:
    """Values of one variable by fate."""

    used: int = 0
    outside: int = 0
    below: int = 0
    bad_time: int = 0
    early: int = 0
    fill: int = 0
    invalid: int = 0
    implausible: int = 0

    @property
    def masked(self) -> int:
        return self.outside + self.below + self.bad_time + self.early + self.fill + self.invalid + self.implausible


def _blocks(plan: VariablePlan, chunk_mb: float, bytes_per_value: int) -> list[tuple[int, int, int, int]]:
    """(t0, t1, row0, row1) blocks of the window that fit the memory budget (``bytes_per_value``: working
    bytes of the screen per grid value, :attr:`harmonize.gridded.screen.FloatScreen.bytes_per_value`)."""
    ny, nx = plan.geometry.window_shape
    n_t = int(plan.time.year.size)
    budget = chunk_mb * 2**20
    per_row = max(nx * plan.n_levels * bytes_per_value, 1)
    rows = int(min(ny, max(1, budget // per_row)))
    steps = int(min(n_t, max(1, budget // (per_row * rows))))
    return [(t0, min(t0 + steps, n_t), r0, min(r0 + rows, ny))
            for t0 in range(0, n_t, steps) for r0 in range(0, ny, rows)]


class ReadBudget:
    """The time allowed for reading one file, checked between blocks (a block is at most
    ``chunk_mb``; one read of the netCDF library cannot be stopped half-way)."""

    def __init__(self, seconds: float, path: Path) -> None:
        self.seconds = seconds
        self.path = path
        self.started = time.monotonic()

    def check(self, what: str) -> None:
        """Raise InputFileError when the budget is spent; ``what`` says how far the reading got."""
        spent = time.monotonic() - self.started
        if spent > self.seconds:
            raise InputFileError(
                self.path, f"reading stopped after {spent:.1f} s, over the time budget of {self.seconds:g} s per file "
                f"([aggregate] max_seconds_per_file), {what}; nothing of this file was written: raise the "
                "budget for files this big, or split the file")


def reduce_variable(ds: xr.Dataset, plan: VariablePlan, chunk_mb: float, path: Path,
                    progress: ProgressCallback | None = None,
                    budget: ReadBudget | None = None) -> tuple[pd.DataFrame, MaskCounts]:
    """Read one variable block by block; per-(period, layer, cell) sums and the mask counts.

    Each block's values are masked and summed per pixel along time, period by period
    (:mod:`harmonize.gridded.screen`: on the stored integers for packed data); the per-pixel
    sums of a period go into cells once its last step is read
    (:class:`harmonize.gridded.aggregate.PixelPeriodSums`). With ``budget``, the time spent on
    the file is checked before each block.
    """
    geo = plan.geometry
    counts = MaskCounts()
    n_t = int(plan.time.year.size)
    counts.outside = (geo.n_pixels_total - geo.n_inside) * n_t * plan.n_levels
    sums = CellPeriodSums(len(plan.layer_names), max(len(geo.cells), 1))
    if geo.n_inside == 0:
        return sums.result(), counts
    name = plan.mapping.file_name
    var = ds[name]
    target = plan.mapping.target
    screen = screen_for(plan.packing, var.dtype, target.dimension, plan.file_unit, target.plausible)
    y0, _, x0, x1 = geo.window
    ny, nx = geo.window_shape
    inside_row = geo.inside_flat // nx  # ascending: the inside pixels of a run of rows are a slice
    level_ok = plan.level_layer >= 0
    levels = np.flatnonzero(level_ok)
    lv = slice(None) if levels.size == plan.n_levels else levels  # a slice: no copy of the block
    weight = plan.level_weight[levels, None] * geo.area_km2[None, :]
    # a period is complete after its last time step; its per-pixel sums are held until then,
    # as many periods at a time as the budget allows (each: a count and a sum per level and pixel)
    step_period = plan.periods.step_period
    last_step = np.full(len(plan.periods.table), -1, np.int64)
    np.maximum.at(last_step, step_period[step_period >= 0], np.flatnonzero(step_period >= 0))
    held_bytes = max(levels.size * ny * nx * 16, 1)  # one period: a count and a sum per level and position
    max_open = max(0, int(chunk_mb * 2**20 // held_bytes) - 1)  # one more: the fill and invalid counts
    pixel_sums = PixelPeriodSums(sums, geo.inside_flat, ny * nx, sums.cell_keys(geo.pixel_cell, plan.level_layer[levels]),
                                 weight, np.dtype(np.int64) if isinstance(screen, IntegerScreen) else np.dtype(np.float64),
                                 screen.canonical_sum, max_open)
    in_region = 0
    blocks = _blocks(plan, chunk_mb, screen.bytes_per_value)
    order = [plan.t_dim] + ([plan.z_dim] if plan.z_dim else []) + [geo.y_dim, geo.x_dim]
    for i, (t0, t1, r0, r1) in enumerate(blocks):
        if budget is not None:
            budget.check(f"with {i:,} of {len(blocks):,} blocks of '{name}' read")
        a, b = (int(j) for j in np.searchsorted(inside_row, [r0, r1]))
        if a == b:
            continue
        local = geo.inside_flat[a:b] - r0 * nx
        index = {plan.t_dim: slice(t0, t1), geo.y_dim: slice(y0 + r0, y0 + r1), geo.x_dim: slice(x0, x1),
                 **plan.fixed}
        try:
            stored = var.isel(index).transpose(*order, ...).values
        except Exception as exc:  # noqa: BLE001 - HDF5/netCDF raise many kinds
            raise InputFileError(path, f"reading '{name}' (time steps {t0 + 1}-{t1}) failed ({type(exc).__name__}: "
                                 f"{exc}); the file is corrupt or truncated: download or export it again") from None
        stored = stored.reshape(t1 - t0, plan.n_levels, -1)
        block_period = step_period[t0:t1]
        time_ok = block_period >= 0
        n_pix = local.size
        n_early = int(plan.early[t0:t1].sum())
        counts.early += n_early * plan.n_levels * n_pix
        counts.bad_time += (int((~time_ok).sum()) - n_early) * plan.n_levels * n_pix
        counts.below += int(time_ok.sum()) * int((~level_ok).sum()) * n_pix
        in_region += int(time_ok.sum()) * levels.size * n_pix
        # the unit check first: a block in the wrong unit stops the file before it is summed
        sample = _unit_sample(stored, local, time_ok, level_ok, screen)
        if sample.size:
            _check_plausible(sample, plan, path)
        for period in np.unique(block_period[time_ok]).tolist():
            steps = np.flatnonzero(block_period == period)
            run = slice(int(steps[0]), int(steps[-1]) + 1) if steps[-1] - steps[0] + 1 == steps.size else steps
            part = screen.reduce(stored[run][:, lv])
            pixel_sums.add(period, r0 * nx, part.n, part.total, part.fill, part.invalid)
        if r1 == ny:
            for period in np.flatnonzero((last_step >= t0) & (last_step < t1)).tolist():
                pixel_sums.close(period)
        if progress:
            progress(f"reading {name}", i + 1, len(blocks))
    pixel_sums.close_all()
    counts.used, counts.fill, counts.invalid = pixel_sums.used, pixel_sums.fill, pixel_sums.invalid
    counts.implausible = in_region - pixel_sums.used - pixel_sums.fill - pixel_sums.invalid
    return sums.result(), counts


def _unit_sample(stored: np.ndarray, local: np.ndarray, time_ok: np.ndarray, level_ok: np.ndarray,
                 screen: FloatScreen) -> np.ndarray:
    """The canonical values the unit check of a block looks at: the usable values (not fill, valid,
    at a good time and level) of every k-th inside pixel (about _PLAUSIBLE_SAMPLE_PIXELS of them),
    all steps and levels of the block; every usable value of the block when that sample holds
    none (decoded step by step); empty when the block has no usable value."""
    k = max(1, local.size // _PLAUSIBLE_SAMPLE_PIXELS)
    region = time_ok[:, None, None] & level_ok[None, :, None]
    values, fill, invalid = screen.canonical(stored[:, :, local[::k]])
    sample = values[region & ~fill & ~invalid]
    if sample.size or k == 1:
        return sample
    parts = []
    for t in np.flatnonzero(time_ok).tolist():
        values, fill, invalid = screen.canonical(stored[t:t + 1, :, local])
        parts.append(values[region[t:t + 1] & ~fill & ~invalid])
    return np.concatenate(parts) if parts else sample


def _check_plausible(values: np.ndarray, plan: VariablePlan, path: Path) -> None:
    """Refuse a block whose typical value is impossible in the stated unit (a unit mistake)."""
    target = plan.mapping.target
    lo, hi = target.plausible
    median = float(np.median(values))
    if lo <= median <= hi:
        return
    raw_median = (median - plan.offset) / plan.scale
    hint = ""
    if target.dimension == "temperature" and 250.0 <= raw_median <= 320.0 and plan.offset == 0.0:
        hint = " they look like kelvin"
    elif target.dimension == "temperature" and -5.0 <= raw_median <= 45.0 and plan.offset != 0.0:
        hint = " they look like degC"
    raise InputFileError(path, f"variable '{plan.mapping.file_name}' is labelled '{plan.file_unit}', but its values "
                         f"(median {raw_median:.4g} {plan.file_unit}) are implausible for {target.name} "
                         f"({lo:g} to {hi:g} {target.unit});{hint or ' check the unit'}: correct the units "
                         "attribute, or set force_unit in the profile's [variables]")


# ------------------------------------------------------------------ output
def _events_and_values(plan: VariablePlan, sums: pd.DataFrame) -> tuple[pd.DataFrame, pd.DataFrame]:
    target = plan.mapping.target
    if sums.empty:
        return pd.DataFrame(), pd.DataFrame()
    periods = plan.periods.table
    cells = plan.geometry.cells
    p = sums["period"].to_numpy()
    lay = sums["layer"].to_numpy()
    c = sums["cell"].to_numpy()
    layer_names = np.array(plan.layer_names, dtype=object)
    n_steps = periods["n_steps"].to_numpy()[p]
    # the mergeable parts (harmonize.parts): a period that spans files merges in the store
    steps = n_steps * plan.layer_weight[lay]
    effort = sums["sum_w"].to_numpy() / steps
    mean = sums["sum_wx"].to_numpy() / sums["sum_w"].to_numpy()
    cell_id = cells["cell_id"].to_numpy()[c]
    label = periods["label"].to_numpy()[p]
    event_id = (pd.Series(cell_id, dtype="string") + "/" + pd.Series(label, dtype="string") + "/"
                + pd.Series(layer_names[lay], dtype="string") + "/" + target.name)
    tops = np.array([d[0] if d[0] is not None else np.nan for d in plan.layer_depths], float)
    bottoms = np.array([d[1] if d[1] is not None else np.nan for d in plan.layer_depths], float)
    n = len(sums)
    events = pd.DataFrame({
        "event_id": event_id.astype(str).to_numpy(),
        "event_start": periods["start"].to_numpy()[p],
        "event_end": periods["end"].to_numpy()[p],
        "lat": cells["lat"].to_numpy()[c],
        "lon": cells["lon"].to_numpy()[c],
        "depth_min_m": tops[lay],
        "depth_max_m": bottoms[lay],
        "bottom_depth_m": np.nan,
        "on_bottom": False,
        "effort": effort,
        "effort_unit": "km2",
        "flags": [[] for _ in range(n)],
        "source_row": pd.array([pd.NA] * n, dtype="Int64"),
        "observer_id": None,
        "cell_id": cell_id,
        "depth_layer": layer_names[lay],
    })
    values = pd.DataFrame({
        "event_id": events["event_id"],
        "variable": target.name,
        "variable_kind": "physical",
        "life_stage": None,
        "quantity": "measurement",
        "value": mean,
        "unit": target.unit,
        "zero_filled": False,
        "flags": [[] for _ in range(n)],
        "source_record_rows": [[] for _ in range(n)],
        "n_values": sums["n"].to_numpy(),
        "n_vessels": None,
        "no_effort": False,
        "part_sum": sums["sum_wx"].to_numpy(),
        "part_weight": sums["sum_w"].to_numpy(),
        "part_steps": steps.astype(np.float64),
    })
    return events, values


def _masked_rows(plan: VariablePlan, counts: MaskCounts, file_name: str) -> list[dict[str, Any]]:
    name = plan.mapping.file_name
    target = plan.mapping.target
    lo, hi = target.plausible
    geo = plan.geometry
    rows = [
        (ReasonCode.OUTSIDE_DOMAIN, counts.outside,
         f"'{name}': values of pixels whose centre lies outside the study domain ({geo.n_pixels_total - geo.n_inside:,} "
         f"of {geo.n_pixels_total:,} pixels; the file covers {geo.extent})"),
        (ReasonCode.OUTSIDE_DOMAIN, counts.below,
         f"'{name}': values on depth levels below the deepest study layer"),
        (ReasonCode.BAD_TIME, counts.bad_time,
         f"'{name}': values of time steps whose time cannot be decoded (missing or non-finite time)"),
        (ReasonCode.BAD_TIME, counts.early,
         f"'{name}': values of time steps dated before {EARLIEST_TIME}, the earliest date harmonize accepts "
         "(as for every source); check the time units and reference date"),
        (ReasonCode.MISSING_VALUE, counts.fill,
         f"'{name}': fill values ({plan.packing.describe_fill()}): land, cloud or no data"),
        (ReasonCode.OUT_OF_RANGE, counts.invalid,
         f"'{name}': values outside the file's valid_min/valid_max/valid_range"),
        (ReasonCode.OUT_OF_RANGE, counts.implausible,
         f"'{name}': values outside the plausible range of {target.name} ({lo:g} to {hi:g} {target.unit})"),
    ]
    return [{"source_file": file_name, "reason_code": str(code), "n_values": int(n), "message": msg}
            for code, n, msg in rows if n > 0]


@register
class GriddedAdapter(Adapter):
    kind = "gridded"
    description = ("Gridded satellite or ocean-model NetCDF (CF) -> area-weighted means per study cell, period "
                   "and layer; effort = valid pixel area (km2).")
    tables = {"rows": "gridded_rows"}
    is_sample = False
    row_traced = False
    merges_parts = True
    grid_values = True
    default_provider_type = "remote_sensing"
    sums_effort = False
    events_called = "gridded cell-periods"
    display_order = 50
    reads_formats = False
    profile_sections = {
        "variables": Map(Value("string", any_of=(
            text("CF standard name of the variable."),
            Table({"name": text("CF standard name."),
                   "unit": text("Unit, checked against the file's units attribute."),
                   "force_unit": text("Unit that replaces the file's units attribute.")}),
        )), "File variable = CF standard name."),
        "aggregate": Table({
            "period": text("Aggregation period.", enum=("month", "season"), default="month"),
            "layer": text("Layer mode of 3-D fields.", enum=("surface", "near_bottom", "by_layer"),
                          default="surface"),
            "chunk_mb": number("Block size read at a time (MB).", exclusive_minimum=0),
            "max_seconds_per_file": number(
                "Time budget for reading one file (seconds); a file that takes longer is stopped with a "
                "one-line error and nothing of it is written.", exclusive_minimum=0,
                default=DEFAULT_MAX_SECONDS_PER_FILE),
        }, "How grid values are aggregated."),
    }
    profile_example = """\
[variables]                   # file variable = CF standard name
# analysed_sst = "sea_surface_temperature"
# chlor_a = "mass_concentration_of_chlorophyll_a_in_sea_water"

[aggregate]
# period = "month"            # month | season
# layer = "surface"           # surface | near_bottom | by_layer
"""

    def read(
        self,
        inputs: Mapping[str, Path],
        profile: Profile,
        study: Study,
        progress: ProgressCallback | None = None,
    ) -> AdapterOutput:
        path = Path(inputs["rows"])
        settings = GriddedSettings.from_profile(profile)
        grid = Grid(study.crs, study.cell_size_km)
        sha = file_sha256(path) if path.is_file() else ""
        events, values, masked, notes = [], [], [], []
        total = used = quarantined = 0
        budget = ReadBudget(settings.max_seconds_per_file, path)
        with open_netcdf(path) as ds:
            geometries: dict[tuple, PixelGeometry] = {}
            plans = [plan_variable(ds, m, settings, study, grid, path, profile, geometries)
                     for m in settings.variables]
            for plan in plans:
                budget.check(f"before reading '{plan.mapping.file_name}'")
                sums, counts = reduce_variable(ds, plan, settings.chunk_mb, path, progress, budget)
                name = plan.mapping.file_name
                if counts.used + counts.masked != plan.n_values:
                    raise RuntimeError(f"internal accounting error for '{name}': {counts} vs {plan.n_values} values")
                if plan.geometry.n_inside == 0:
                    raise InputFileError(path, f"no pixel of '{name}' lies inside the study domain (the file covers "
                                         f"{plan.geometry.extent}; the domain spans lon {study.domain.bounds[0]:.2f} to "
                                         f"{study.domain.bounds[2]:.2f}, lat {study.domain.bounds[1]:.2f} to "
                                         f"{study.domain.bounds[3]:.2f}); check that this is the right file")
                if counts.used == 0:
                    raise InputFileError(path, f"every value of '{name}' inside the study domain is a fill value, "
                                         "out of range or at an undecodable time; nothing was written: check the file")
                ev, va = _events_and_values(plan, sums)
                events.append(ev)
                values.append(va)
                masked += _masked_rows(plan, counts, path.name)
                total += plan.n_values
                used += counts.used
                quarantined += counts.masked
                conversion = (f"{plan.file_unit} -> {plan.mapping.target.unit}"
                              if plan.file_unit != plan.mapping.target.unit else plan.file_unit)
                notes.append(f"{name} -> {plan.mapping.target.name} ({conversion}; {plan.time.calendar} calendar; "
                             f"{plan.time.year.size} time steps; {len(ev):,} cell-{settings.period}s): "
                             f"{counts.used:,} of {plan.n_values:,} values used")
                notes += plan.time_notes
        events_df = pd.concat(events, ignore_index=True)
        values_df = pd.concat(values, ignore_index=True)
        masked_df = pd.DataFrame(masked, columns=["source_file", "reason_code", "n_values", "message"])
        empty_q = pd.DataFrame({"source_file": [], "source_row": np.array([], np.int64), "reason_code": [],
                                "message": [], "raw": [], "n_problems": np.array([], np.int64)})
        files = [InputFile("rows", path, sha, total, used, quarantined)]
        return AdapterOutput(events=events_df, values=values_df, quarantine=empty_q, files=files,
                             notes=notes, masked=masked_df)
