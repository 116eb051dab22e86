"""Commercial fishing effort: vessel position pings or logbook hauls -> fishing hours per cell.

Ping form (VMS/AIS-like position reports). Pings are sorted per vessel by time; a ping is
classified as fishing when its speed over ground lies in the speed window of its gear
(about 2-5 knots for trawling classified 75-90 % of pings correctly: Skaar et al. 2011,
ICES J. Mar. Sci. 68:1615-1620; Mills et al. 2007, ICES J. Mar. Sci. 64:248-255). Each ping
gets half of the interval to the previous ping and half of the interval to the next one,
each half capped at ``max_gap_h / 2`` (common practice: a long gap is not fishing time).
Missing speeds are derived from consecutive positions (distances on the WGS84 ellipsoid).
Fishing hours are summed per grid cell x season_year x season x gear (x depth layer), with
the number of distinct vessels. Ping files are the largest inputs: everything runs in
DuckDB SQL (window functions over vessel and time), streaming with bounded memory; only
the domain test and the grid cell of each position run in numpy, batch by batch.

Rows are numbered as every other reader of harmonize numbers them (``reading.LineReader``):
data rows as a person counts them, the header excluded, blank lines and lines made only of
delimiters not counted. DuckDB's fast CSV reader is used for well-formed files; when it
rejects a line, fails, or meets a row it reads differently (all cells blank, a cell that
starts with a quote it did not take as quoting), the file is read again by the line reader,
streamed block by block into a temporary parquet file that the ping SQL then reads.

Logbook form (one row per haul with start and end time and position): fishing hours =
haul duration, split over the grid cells the straight tow line crosses in the study's
equal-area grid CRS, in proportion to the length in each cell (constant towing speed).

Vessel ids are replaced by salted hashes (harmonize.privacy) before anything is stored;
unhashed ids never reach the store, the quarantine or a message.
"""

from __future__ import annotations

import shutil
import tempfile
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import duckdb
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from harmonize import units
from harmonize.adapters.base import Adapter, AdapterOutput, InputFile, ProgressCallback, finish
from harmonize.adapters.domain import reject_outside_domain, swapped_position_notes
from harmonize.adapters.registry import register
from harmonize.clock import sql_local_problem, sql_offset_text, sql_resolved
from harmonize.config_spec import Map, Table, Value, number, text
from harmonize.contract import FieldSpec, fields
from harmonize.engines import current_engine
from harmonize.errors import ConfigError, InputFileError, ReasonCode, one_line
from harmonize.files import file_sha256
from harmonize.geodesy import M_PER_NMI, distance_sql
from harmonize.privacy import pseudonymise, study_salt
from harmonize.profile import Profile
from harmonize.reading.fields import coerce_fields, resolve_columns
from harmonize.reading.quarantine import Rejections
from harmonize.reading.text import LineReader, RawTable, read_header, read_table
from harmonize.study import Study
from harmonize.tagging import (
    NEAR_BOTTOM,
    Grid,
    inside_domain,
    normalise_lon,
    season_year_offsets,
    tag_season,
)
from harmonize.tagging import season_sql as study_season_sql
from harmonize.tracks import track_sql

#: Default fishing speed window (knots) for bottom trawls: common practice, supported by
#: Skaar et al. 2011 and Mills et al. 2007 (otter trawl 1-6 kn, beam trawl 2-8 kn).
DEFAULT_SPEED_WINDOW_KN = (2.0, 5.0)
#: Default cap on the interval a ping can claim (hours); each half is capped at half of it.
DEFAULT_MAX_GAP_H = 2.0
#: Speeds above this (knots) are not something a fishing vessel does: a bad fix or a unit
#: error (common practice: well above the 10-15 kn cruising speed of fishing vessels).
DEFAULT_MAX_SPEED_KN = 30.0
#: Rejected pings listed one by one in the quarantine per file; beyond that they are
#: counted per reason (the quarantine_summary table).
DEFAULT_QUARANTINE_ROWS = 100_000

#: Gear contact with the sea floor, keyed by FAO ISSCFG code (International Standard
#: Statistical Classification of Fishing Gear, FAO 2016 revision) and a few plain names.
#: Bottom-contact gear is tagged "near_bottom"; pelagic gear gets the profile's layer.
GEAR_CONTACT: dict[str, str] = {
    **dict.fromkeys(
        ["OTB", "OTT", "PTB", "TBB", "TBN", "TBS", "TB", "OT", "DRB", "DRH", "HMD", "SDN", "SSC",
         "SPR", "SB", "SV", "SX", "LLS", "GNS", "GTR", "GTN", "FPO", "FPN", "FYK",
         "BOTTOM_TRAWL", "OTTER_TRAWL", "BEAM_TRAWL", "DREDGE", "DEMERSAL_SEINE", "POTS",
         "SET_LONGLINE", "SET_GILLNET"], "bottom"),
    **dict.fromkeys(
        ["OTM", "PTM", "TM", "PS", "PS1", "PS2", "LA", "LLD", "GND", "LHP", "LHM", "LTL",
         "MIDWATER_TRAWL", "PELAGIC_TRAWL", "PURSE_SEINE", "DRIFTING_LONGLINE", "DRIFTNET",
         "TROLL"], "pelagic"),
}
_NA = ("", "na", "n/a", "nan", "null", "none", "-")
#: Time formats of a profile with ``dayfirst = true`` (day before month).
DAYFIRST_FORMATS = ("%d/%m/%Y %H:%M:%S", "%d/%m/%Y %H:%M", "%d-%m-%Y %H:%M:%S", "%d-%m-%Y %H:%M",
                    "%d.%m.%Y %H:%M:%S", "%d.%m.%Y %H:%M")
# cell code = (ix + _OFF) * _MUL + (iy + _OFF): one BIGINT per grid cell
_OFF = 2**30
_MUL = 2**31
OUTSIDE = -1


@dataclass(frozen=True)
class GearRule:
    """How one gear is classified and tagged."""

    gear: str
    contact: str  # bottom | pelagic
    layer: str
    speed_min_kn: float
    speed_max_kn: float


@dataclass(frozen=True)
class FishingSettings:
    """The profile's ``[fishing]`` section, validated."""

    form: str | None = None
    speed_min_kn: float = DEFAULT_SPEED_WINDOW_KN[0]
    speed_max_kn: float = DEFAULT_SPEED_WINDOW_KN[1]
    max_gap_h: float = DEFAULT_MAX_GAP_H
    max_speed_kn: float = DEFAULT_MAX_SPEED_KN
    pelagic_layer: str | None = None
    quarantine_rows: int = DEFAULT_QUARANTINE_ROWS
    memory_limit: str = "1GB"
    gears: Mapping[str, Mapping[str, Any]] = field(default_factory=dict)
    profile_path: Path = Path("profile.toml")

    def rule(self, gear: str, study: Study) -> GearRule | None:
        """The rule of a gear name (case-insensitive), or None when the gear is unknown."""
        key = gear.strip().upper()
        own = {k.upper(): v for k, v in self.gears.items()}.get(key, {})
        contact = own.get("contact") or GEAR_CONTACT.get(key.replace(" ", "_"))
        if contact is None:
            return None
        if contact == "bottom":
            layer = NEAR_BOTTOM
        else:
            layer = own.get("layer") or self.pelagic_layer
            if layer is None:
                raise ConfigError(
                    self.profile_path, "fishing.pelagic_layer",
                    f"gear '{gear}' fishes in midwater; name its depth layer with pelagic_layer = "
                    f"\"...\" in [fishing] (or layer in [fishing.gears.{key}]); layers: "
                    + ", ".join(d.name for d in study.depth_layers),
                )
        return GearRule(key, contact, layer, float(own.get("speed_min_kn", self.speed_min_kn)),
                        float(own.get("speed_max_kn", self.speed_max_kn)))


def fishing_settings(profile: Profile, study: Study) -> FishingSettings:
    """Read and check the profile's ``[fishing]`` section (ConfigError naming the key)."""
    sec = profile.section("fishing")
    path = profile.path

    def number(key: str, default: float, sec: Mapping[str, Any] = sec, prefix: str = "fishing") -> float:
        value = sec.get(key, default)
        if isinstance(value, bool) or not isinstance(value, int | float) or not value > 0:
            raise ConfigError(path, f"{prefix}.{key}", f"expected a number above 0, got {value!r}")
        return float(value)

    form = sec.get("form")
    if form is not None and form not in ("pings", "logbook"):
        raise ConfigError(path, "fishing.form", f"expected \"pings\" or \"logbook\", got {form!r}")
    layers = {d.name for d in study.depth_layers}
    pelagic = sec.get("pelagic_layer")
    if pelagic is not None and pelagic not in layers:
        raise ConfigError(path, "fishing.pelagic_layer", f"'{pelagic}' is not a depth layer of the study; layers: {', '.join(sorted(layers))}")
    smin, smax = number("speed_min_kn", DEFAULT_SPEED_WINDOW_KN[0]), number("speed_max_kn", DEFAULT_SPEED_WINDOW_KN[1])
    if smin >= smax:
        raise ConfigError(path, "fishing.speed_max_kn", f"must be above speed_min_kn ({smin:g}), got {smax:g}")
    gears = sec.get("gears", {})
    if not isinstance(gears, Mapping):
        raise ConfigError(path, "[fishing.gears]", "expected one table per gear, e.g. [fishing.gears.OTB]")
    for name, rule in gears.items():
        key = f"fishing.gears.{name}"
        if not isinstance(rule, Mapping):
            raise ConfigError(path, key, "expected a table with speed_min_kn, speed_max_kn, contact, layer")
        if rule.get("contact", "bottom") not in ("bottom", "pelagic"):
            raise ConfigError(path, f"{key}.contact", f"expected \"bottom\" or \"pelagic\", got {rule.get('contact')!r}")
        if "layer" in rule and rule["layer"] not in layers:
            raise ConfigError(path, f"{key}.layer", f"'{rule['layer']}' is not a depth layer of the study; layers: {', '.join(sorted(layers))}")
        lo = number("speed_min_kn", smin, rule, key)
        hi = number("speed_max_kn", smax, rule, key)
        if lo >= hi:
            raise ConfigError(path, f"{key}.speed_max_kn", f"must be above speed_min_kn ({lo:g}), got {hi:g}")
    rows = sec.get("quarantine_rows", DEFAULT_QUARANTINE_ROWS)
    if isinstance(rows, bool) or not isinstance(rows, int) or rows < 0:
        raise ConfigError(path, "fishing.quarantine_rows", f"expected a whole number >= 0, got {rows!r}")
    return FishingSettings(
        form=form, speed_min_kn=smin, speed_max_kn=smax, max_gap_h=number("max_gap_h", DEFAULT_MAX_GAP_H),
        max_speed_kn=number("max_speed_kn", DEFAULT_MAX_SPEED_KN), pelagic_layer=pelagic,
        quarantine_rows=rows, memory_limit=str(sec.get("memory_limit", "1GB")), gears=dict(gears),
        profile_path=path,
    )


# ---------------------------------------------------------------------------- geometry

#: Distance (m) between two WGS84 points, as a DuckDB macro (harmonize.geodesy: the same
#: formula and constants as the numpy function; tests check it against GeographicLib).
DISTANCE_MACRO = ("CREATE OR REPLACE TEMP MACRO geo_dist_m(lat1, lon1, lat2, lon2) AS "
                  + distance_sql("lat1", "lon1", "lat2", "lon2") + ";")


def geodesic_distance_m(lat1: np.ndarray, lon1: np.ndarray, lat2: np.ndarray, lon2: np.ndarray) -> np.ndarray:
    """Distances (m) by the SQL formula the ping pipeline uses (run in DuckDB)."""
    con = duckdb.connect()
    try:
        con.execute(DISTANCE_MACRO)
        tab = pa.table({"lat1": np.asarray(lat1, float), "lon1": np.asarray(lon1, float),
                        "lat2": np.asarray(lat2, float), "lon2": np.asarray(lon2, float)})
        con.register("pts", tab)
        out = con.sql("SELECT geo_dist_m(lat1, lon1, lat2, lon2) AS d FROM pts").to_arrow_table()
        return out["d"].to_numpy()
    finally:
        con.close()


def encode_cells(ix: np.ndarray, iy: np.ndarray) -> np.ndarray:
    """One int64 per grid cell (ix, iy)."""
    return (np.asarray(ix, np.int64) + _OFF) * _MUL + (np.asarray(iy, np.int64) + _OFF)


def decode_cells(code: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Inverse of :func:`encode_cells`."""
    code = np.asarray(code, np.int64)
    return code // _MUL - _OFF, code % _MUL - _OFF


def locate(study: Study, grid: Grid, lon: np.ndarray, lat: np.ndarray) -> np.ndarray:
    """Cell code of each point inside the domain, OUTSIDE (-1) for points outside it."""
    inside = inside_domain(study.domain, lon, lat)
    ix, iy = grid.indices(np.where(inside, lon, 0.0), np.where(inside, lat, 0.0))
    return np.where(inside, encode_cells(ix, iy), OUTSIDE)


def split_tows_by_cell(
    grid: Grid, start_lon: np.ndarray, start_lat: np.ndarray, end_lon: np.ndarray, end_lat: np.ndarray
) -> pd.DataFrame:
    """Share of each tow's length in each grid cell it crosses.

    The tow is the straight line from start to end in the grid's (equal-area) CRS; every
    crossing of a cell edge splits it. For tows of a few tens of kilometres the difference
    from the geodesic is metres, far below a cell. Returns a frame with ``tow`` (position
    of the tow), ``ix``, ``iy`` and ``share`` (fractions summing to 1 per tow).
    """
    x0, y0 = grid._to_grid.transform(np.asarray(start_lon, float), np.asarray(start_lat, float))
    x1, y1 = grid._to_grid.transform(np.asarray(end_lon, float), np.asarray(end_lat, float))
    s = grid.cell_size_m
    n = len(x0)
    tows = np.arange(n)
    params = [np.zeros(n), np.ones(n)]
    owners = [tows, tows]
    for a0, a1 in ((x0, x1), (y0, y1)):
        lo = np.floor(np.minimum(a0, a1) / s).astype(np.int64)
        hi = np.floor(np.maximum(a0, a1) / s).astype(np.int64)
        k = hi - lo  # grid lines crossed along this axis
        owner = np.repeat(tows, k)
        line = lo[owner] + 1 + (np.arange(owner.size) - np.repeat(np.cumsum(k) - k, k))
        with np.errstate(divide="ignore", invalid="ignore"):
            t = (line * s - a0[owner]) / (a1[owner] - a0[owner])
        params.append(t)
        owners.append(owner)
    t_all = np.concatenate(params)
    own = np.concatenate(owners)
    order = np.lexsort((t_all, own))
    t_all, own = t_all[order], own[order]
    same = own[1:] == own[:-1]
    t_a, t_b, tow = t_all[:-1][same], t_all[1:][same], own[:-1][same]
    share = t_b - t_a
    mid = (t_a + t_b) / 2
    ix = np.floor((x0[tow] + mid * (x1[tow] - x0[tow])) / s).astype(np.int64)
    iy = np.floor((y0[tow] + mid * (y1[tow] - y0[tow])) / s).astype(np.int64)
    # a tow that starts and ends at one point has all its time in that point's cell
    point = ~np.isfinite(share) | (np.bincount(tow, minlength=n)[tow] == 1)
    share = np.where(point, 1.0, share)
    keep = (share > 0) | point
    out = pd.DataFrame({"tow": tow[keep], "ix": ix[keep], "iy": iy[keep], "share": share[keep]})
    return out.groupby(["tow", "ix", "iy"], as_index=False, sort=True)["share"].sum()


# ---------------------------------------------------------------------------- seasons

def season_sql(study: Study, column: str) -> tuple[str, str]:
    """SQL expressions (season name, season_year) of a UTC TIMESTAMP column, on the study calendar."""
    return study_season_sql(column, study.seasons, study.timezone)


def season_bounds(study: Study, season: pd.Series, season_year: pd.Series) -> tuple[pd.Series, pd.Series]:
    """First instant of each season and the first instant after it (exclusive end)."""
    offsets = season_year_offsets(study.seasons)
    starts, ends = {}, {}
    for name, months in study.seasons.items():
        firsts = sorted((-int(offsets[m]), m) for m in months)  # (year shift, month)
        starts[name] = firsts[0]
        ends[name] = firsts[-1]
    sy = season_year.astype("int64").to_numpy()
    first = np.array([starts[s] for s in season], dtype=np.int64).reshape(-1, 2)
    last = np.array([ends[s] for s in season], dtype=np.int64).reshape(-1, 2)
    start = pd.to_datetime(pd.DataFrame({"year": sy + first[:, 0], "month": first[:, 1], "day": 1}))
    end = pd.to_datetime(pd.DataFrame({"year": sy + last[:, 0], "month": last[:, 1], "day": 1})) + pd.DateOffset(months=1)
    if study.timezone != "UTC":  # local midnights of the study calendar, as UTC instants
        start, end = (t.dt.tz_localize(study.timezone, ambiguous=np.ones(len(t), bool), nonexistent="shift_forward")
                      .dt.tz_convert("UTC").dt.tz_localize(None) for t in (start, end))
    return start.astype("datetime64[us]"), end.astype("datetime64[us]")


# ---------------------------------------------------------------------------- output

def effort_event_ids(gear: pd.Series, ix: np.ndarray, iy: np.ndarray, season_year: pd.Series, season: pd.Series,
                     depth_layer: pd.Series) -> pd.Series:
    """Event id of a fishing cell-period: gear/cell/season_year-season/layer."""
    cell_id = "x" + pd.Series(np.asarray(ix, np.int64)).astype(str) + "_y" + pd.Series(np.asarray(iy, np.int64)).astype(str)
    return (pd.Series(gear).reset_index(drop=True) + "/" + cell_id + "/"
            + pd.Series(season_year).reset_index(drop=True).astype(str) + "-"
            + pd.Series(season).reset_index(drop=True) + "/" + pd.Series(depth_layer).reset_index(drop=True))


def effort_output(
    cells: pd.DataFrame, study: Study, grid: Grid, contact: Mapping[str, str]
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Events and values of aggregated effort.

    ``cells`` has ix, iy, season_year, season, gear, depth_layer, hours, n_vessels,
    n_values and speed_derived (bool).
    """
    keep = cells["hours"] > 0
    if "edge" in cells:
        # a cell an owned edge ping of a ping file lies in keeps its part, 0 hours or not: the
        # store's view adds the hours of the edge pings, joined across files (harmonize.parts)
        keep |= cells["edge"].astype(bool)
    cells = cells[keep.to_numpy()].reset_index(drop=True)
    ix, iy = cells["ix"].to_numpy(np.int64), cells["iy"].to_numpy(np.int64)
    lon, lat = grid.cell_centres_lonlat(ix, iy)
    cell_id = "x" + pd.Series(ix).astype(str) + "_y" + pd.Series(iy).astype(str)
    start, end = season_bounds(study, cells["season"], cells["season_year"])
    event_id = effort_event_ids(cells["gear"], ix, iy, cells["season_year"], cells["season"], cells["depth_layer"])
    n = len(cells)
    events = pd.DataFrame({
        "event_id": event_id, "event_start": start.to_numpy(), "event_end": end.to_numpy(),
        "lat": np.asarray(lat, float), "lon": normalise_lon(lon), "depth_min_m": np.nan, "depth_max_m": np.nan,
        "bottom_depth_m": np.nan, "on_bottom": cells["gear"].map(contact).eq("bottom").to_numpy(),
        "effort": cells["hours"].astype(float), "effort_unit": "h",
        "flags": [["speed_derived"] if d else [] for d in cells["speed_derived"]],
        "source_row": pd.array([pd.NA] * n, dtype="Int64"), "observer_id": None,
        "cell_id": cell_id, "season": cells["season"], "season_year": cells["season_year"].astype("Int32"),
        "depth_layer": cells["depth_layer"], "gear": cells["gear"],
    })
    values = pd.DataFrame({
        "event_id": event_id, "variable": "fishing_hours", "variable_kind": "effort", "life_stage": None,
        "quantity": "measurement", "value": cells["hours"].astype(float), "unit": "h", "zero_filled": False,
        "flags": [[] for _ in range(n)], "source_record_rows": [[] for _ in range(n)],
        "n_values": cells["n_values"].astype("int64"), "n_vessels": cells["n_vessels"].astype("int64"),
        "no_effort": False,
    })
    if "vessel_ids" in cells:
        # the vessels behind each part: n_vessels merges across files (harmonize.parts)
        values["vessel_ids"] = cells["vessel_ids"].to_numpy()
    return events, values


# ---------------------------------------------------------------------------- adapter

@register
class EffortAdapter(Adapter):
    kind = "effort"
    description = ("Commercial fishing effort from vessel position pings or logbook hauls; "
                   "effort = fishing hours (h) per cell, season, gear and depth layer.")
    tables = {"rows": "effort_pings"}
    forms = {"pings": "effort_pings", "logbook": "effort_logbook"}
    is_sample = False
    row_traced = False
    merges_parts = True
    is_fishing_effort = True
    effort_label = "fishing hours"
    events_called = "fishing cell-periods"
    designed = False
    default_provider_type = "industry"
    display_order = 60
    reads_formats = False
    profile_sections = {
        "fishing": Table({
            "form": text("Pings or logbook (guessed from the columns when absent).", enum=("pings", "logbook")),
            "speed_min_kn": number("Lower end of the fishing speed window (knots).", exclusive_minimum=0, default=2.0),
            "speed_max_kn": number("Upper end of the fishing speed window (knots).", exclusive_minimum=0, default=5.0),
            "max_gap_h": number("Each half-interval a ping gets is capped at max_gap_h / 2.", exclusive_minimum=0,
                                default=2.0),
            "max_speed_kn": number("Faster pings -> implausible_speed.", exclusive_minimum=0),
            "pelagic_layer": text("Depth layer of pelagic gears."),
            "quarantine_rows": Value("integer", "How many rejected pings are kept row by row.", minimum=0),
            "memory_limit": text("DuckDB working memory of the ping ingest, e.g. 2GB."),
            "gears": Map(Table({
                "speed_min_kn": number("Lower end of this gear's speed window (knots).", exclusive_minimum=0),
                "speed_max_kn": number("Upper end of this gear's speed window (knots).", exclusive_minimum=0),
                "contact": text("Where the gear fishes.", enum=("bottom", "pelagic")),
                "layer": text("Depth layer of this gear."),
            }), "Per-gear overrides: [fishing.gears.CODE]."),
        }, "Fishing-effort rules."),
    }
    profile_example = """\
[fishing]
# form = "pings"              # pings | logbook (guessed from the columns when absent)
# speed_min_kn = 2.0          # fishing speed window for bottom trawl (common practice)
# speed_max_kn = 5.0
# max_gap_h = 2.0             # a ping gets half of each neighbouring interval, capped
# pelagic_layer = "epipelagic"
"""

    def table_fields(self) -> dict[str, set[str]]:
        """Both forms map onto one ``[columns]`` table: the union of their fields."""
        return {"rows": {f.name for schema in self.forms.values() for f in fields(schema)}}

    def read(
        self,
        inputs: Mapping[str, Path],
        profile: Profile,
        study: Study,
        progress: ProgressCallback | None = None,
    ) -> AdapterOutput:
        settings = fishing_settings(profile, study)
        path = Path(inputs["rows"])
        if not path.is_file():
            raise InputFileError(path, "no such file")
        columns = _file_columns(path, profile)
        form = settings.form or _guess_form(columns, profile)
        if form == "logbook":
            return _read_logbook(path, profile, study, settings, progress)
        return PingReader(path, profile, study, settings, columns, progress).run()


def _guess_form(columns: list[str], profile: Profile) -> str:
    """Logbook when the file (or the profile) has start/end times, pings otherwise."""
    mapped = profile.column_map("rows")
    folded = {c.casefold() for c in columns}
    has = {f for f in ("start_time", "end_time", "time")
           if (f in mapped and mapped[f].casefold() in folded) or f in folded or f in profile.constants}
    return "logbook" if {"start_time", "end_time"} <= has else "pings"


def _csv_source(path: Path, profile: Profile, delimiter: str | None = None, rejects: bool = True) -> str:
    """A DuckDB table expression reading every column of the file as text.

    The delimiter (the line reader's), quote and escape characters are given, not sniffed,
    so that DuckDB splits lines as the line reader does.
    """
    quoted = "'" + str(path).replace("'", "''") + "'"
    if path.suffix.lower() == ".parquet":
        return f"read_parquet({quoted})"
    opts = ["all_varchar = true", "header = true", "quote = '\"'", "escape = '\"'"]
    if rejects:
        opts += ["store_rejects = true", "rejects_table = 'ping_rejects'", "rejects_scan = 'ping_reject_scans'"]
    delimiter = delimiter or profile.delimiter
    if delimiter:
        opts.append("delim = '" + delimiter.replace("'", "''") + "'")
    elif path.suffix.lower() in (".tsv", ".tab"):
        opts.append("delim = '\t'")
    enc = profile.encoding.lower().replace("_", "-")
    if enc in ("latin-1", "latin1", "iso-8859-1"):
        opts.append("encoding = 'latin-1'")
    elif enc in ("utf-16",):
        opts.append("encoding = 'utf-16'")
    return f"read_csv({quoted}, {', '.join(opts)})"


def _file_columns(path: Path, profile: Profile) -> list[str]:
    """The header of the file: as the line reader reads it (text) or the parquet schema."""
    if path.stat().st_size == 0:
        raise InputFileError(path, "the file is empty; expected a header row and data rows")
    if path.suffix.lower() != ".parquet":
        return read_header(path, profile)[0]
    con = duckdb.connect()
    try:
        rel = con.sql(f"SELECT * FROM {_csv_source(path, profile)} LIMIT 0")
        return [c.strip().lstrip("\ufeff") for c in rel.columns]
    except duckdb.Error as exc:
        raise InputFileError(path, f"cannot be read as a table ({str(exc).splitlines()[0]}); "
                             "check the delimiter ([source] delimiter) and the encoding") from None
    finally:
        con.close()


def _sql_text(value: str) -> str:
    return "'" + value.replace("'", "''") + "'"


#: A cell quoted in a message: at most 60 characters (line breaks are escaped afterwards).
CELL_MACRO = "CREATE OR REPLACE TEMP MACRO cell_txt(x) AS CASE WHEN length(x) > 60 THEN left(x, 57) || '...' ELSE x END;"
#: Characters of a whitespace-only cell (as Python's str.strip removes them, ASCII part).
_BLANK_CHARS = " \t\n\r\x0b\x0c"
#: Data rows per block written by the line reader's fallback (bounded memory).
FALLBACK_BLOCK_ROWS = 100_000
#: The raw row of a row that could not be split: its text may identify a vessel.
_WITHHELD = '{"note": "row text withheld: it may identify a vessel"}'


def _ident(name: str) -> str:
    return '"' + name.replace('"', '""') + '"'


class PingReader:
    """The ping pipeline of one file, in DuckDB. See the module docstring for the method.

    Tables: ``p`` typed pings with the first row-level problem; ``q`` adds the hashed
    vessel, the gear rule and the grid cell; ``dups`` holds the pings rejected as duplicates
    (same vessel and time); ``track`` the accepted pings, sorted per vessel by time, with
    neighbours, class and hours.
    """

    def __init__(self, path: Path, profile: Profile, study: Study, settings: FishingSettings,
                 columns: list[str], progress: ProgressCallback | None) -> None:
        self.path, self.profile, self.study, self.settings = path, profile, study, settings
        self.progress = progress or (lambda stage, done, total: None)
        self.specs = {s.name: s for s in fields("effort_pings")}
        self.columns = columns
        self.found = self._resolve(columns)
        #: file column -> SQL expression naming it in the table being read
        self.colref: dict[str, str] = {c: _ident(c) for c in columns}
        self.delimiter: str | None = None
        if path.suffix.lower() != ".parquet":
            self.delimiter = read_header(path, profile)[1]
        self.grid = Grid(study.crs, study.cell_size_km)
        self.notes: list[str] = []

    def _resolve(self, columns: list[str]) -> dict[str, str]:
        empty = RawTable(self.path, "rows", pd.DataFrame(columns=columns), "")
        return resolve_columns(empty, list(self.specs.values()), self.profile)

    # -- SQL building blocks
    def _label(self, name: str) -> str:
        col = self.found.get(name)
        if col is None:
            return f"{name} (constant in {self.profile.path.name})"
        return f"column '{col}'" if col == name else f"{name} (column '{col}')"

    def _raw(self, name: str) -> str:
        """The field's text as read (a constant of the profile, or NULL when absent)."""
        if name in self.found:
            return f"CAST({self.colref[self.found[name]]} AS VARCHAR)"
        if name in self.profile.constants:
            return _sql_text(str(self.profile.constants[name]))
        return "CAST(NULL AS VARCHAR)"

    @staticmethod
    def _is_na(text: str) -> str:
        """SQL: the text is one of the tokens that mean 'no value' (cheap test first)."""
        tokens = ", ".join(_sql_text(t) for t in _NA)
        return f"(length({text}) <= 5 AND lower(trim({text})) IN ({tokens}))"

    def _written_sql(self, text: str) -> str | None:
        """SQL: the wall-clock TIMESTAMP of a time written in the profile's format (``time_format``,
        or the day-first formats), None when the profile names neither."""
        if self.profile.time_format:
            return f"try_strptime({text}, {_sql_text(self.profile.time_format)})"
        if self.profile.dayfirst:
            return f"try_strptime({text}, [{', '.join(map(_sql_text, DAYFIRST_FORMATS))}])"
        return None

    @staticmethod
    def _plain_sql(text: str) -> str:
        """SQL: the time has no offset or zone letter after its date (an ISO wall-clock time)."""
        return (f"(strpos(substr({text}, 11), '+') = 0 AND strpos(substr({text}, 11), '-') = 0 "
                f"AND right({text}, 1) BETWEEN '0' AND '9')")

    def _local_sql(self, text: str) -> str:
        """SQL: the wall-clock TIMESTAMP of a time read in the profile's zone (NULL for a time
        with an offset, and when the profile's zone is UTC, which has no clock changes)."""
        if self.profile.timezone == "UTC":
            return "CAST(NULL AS TIMESTAMP)"
        written = self._written_sql(text)
        if written is not None:
            return written
        return f"CASE WHEN {self._plain_sql(text)} THEN TRY_CAST({text} AS TIMESTAMP) END"

    def _time_sql(self, text: str) -> str:
        """SQL: the UTC TIMESTAMP of a time cell, with harmonize.clock's rule at clock changes
        (a nonexistent local time is NULL; an ambiguous one is NULL unless the profile's
        ``ambiguous_times`` picks the earlier or later instant)."""
        if self.profile.timezone == "UTC":
            return self._instant_sql(text)
        local = self._local_sql(text)
        problem = sql_local_problem(local, self.profile.timezone)
        choice = self.profile.ambiguous_times
        resolved = (f"timezone('UTC', {sql_resolved(local, self.profile.timezone, choice)})" if choice
                    else "CAST(NULL AS TIMESTAMP)")
        return (f"CASE {problem} WHEN 'nonexistent' THEN CAST(NULL AS TIMESTAMP) WHEN 'ambiguous' THEN {resolved} "
                f"ELSE {self._instant_sql(text)} END")

    def _clock_sql(self, text: str) -> str:
        """SQL: 'nonexistent' or 'ambiguous' for a local time at a clock change, else NULL."""
        if self.profile.timezone == "UTC":
            return "CAST(NULL AS VARCHAR)"
        return sql_local_problem(self._local_sql(text), self.profile.timezone)

    def _clock_message_sql(self, kind: str) -> str:
        """SQL: the sentence of :func:`harmonize.clock.clock_change_message` for ping rows."""
        zone = self.profile.timezone
        local = self._local_sql("time_txt")
        z = _sql_text(zone)
        before = sql_offset_text(f"timezone({z}, {local} - INTERVAL 3 HOUR)", zone)
        after = sql_offset_text(f"timezone({z}, {local} + INTERVAL 3 HOUR)", zone)
        label = _sql_text(self._label("time"))
        if kind == "ambiguous":
            return (f"printf('%s holds ''%s'', a local time that happens twice in %s: the clocks went back from %s "
                    f"to %s on %s; give the time with its offset, or set [source] ambiguous_times = \"earlier\" "
                    f"or \"later\" in the profile', {label}, cell_txt(time_txt), {z}, {before}, {after}, "
                    f"strftime({local}, '%Y-%m-%d'))")
        return (f"printf('%s holds ''%s'', a local time that does not exist in %s: the clocks went forward from %s "
                f"to %s on %s and skipped it; check the time and the profile''s [source] timezone', {label}, "
                f"cell_txt(time_txt), {z}, {before}, {after}, strftime({local}, '%Y-%m-%d'))")

    def _instant_sql(self, text: str) -> str:
        tz = _sql_text(self.profile.timezone)
        written = self._written_sql(text)
        if written is not None:
            return f"timezone('UTC', timezone({tz}, {written}))"
        # "...Z" is UTC; a plain time in a UTC profile too: both take the fast TIMESTAMP cast
        # (which would silently drop any other offset). The rest is read as TIMESTAMPTZ:
        # with its offset, or in the session time zone (the profile's).
        fast = f"right({text}, 1) = 'Z'" + (f" OR {self._plain_sql(text)}" if self.profile.timezone == "UTC" else "")
        return (f"CASE WHEN {fast} THEN TRY_CAST({text} AS TIMESTAMP) "
                f"ELSE timezone('UTC', TRY_CAST({text} AS TIMESTAMPTZ)) END")

    def _speed_factor(self) -> float:
        unit = self.profile.units.get("speed_kn")
        if unit is None:
            return 1.0
        try:
            scale, _ = units.conversion("speed", unit)
        except units.UnitError as exc:
            raise ConfigError(self.profile.path, "[units] speed_kn", str(exc)) from None
        return scale

    def _stage1_sql(self, src: str, rownum: str, extra: str) -> str:
        """Typed pings with the first problem of each row (reason, message, raw).

        ``src`` is the table read, ``rownum`` the SQL of the data row number and ``extra``
        the SQL of two more columns: ``nf`` (the number of fields of a row that could not be
        split into the header's columns, else NULL) and ``odd`` (a row the fast reader read
        differently from the line reader).
        """
        s = self.settings
        now = (pd.Timestamp.now("UTC").tz_localize(None) + pd.Timedelta(days=1)).isoformat()
        checks: list[tuple[str, str, str]] = [  # (condition, reason, message SQL)
            ("nf IS NOT NULL", ReasonCode.BAD_TYPE,
             f"printf('row has a different number of fields than the header (%d instead of %d); "
             f"check delimiters and quotes', nf, {len(self.columns)})")]
        missing = {
            "vessel_id": "vessel_id_txt IS NULL OR " + self._is_na("vessel_id_txt"),
            "time": "time_txt IS NULL OR (t IS NULL AND " + self._is_na("time_txt") + ")",
            "lat": "lat_txt IS NULL OR (lat IS NULL AND " + self._is_na("lat_txt") + ")",
            "lon": "lon_txt IS NULL OR (lon_in IS NULL AND " + self._is_na("lon_txt") + ")",
            "gear": "gear_txt IS NULL OR " + self._is_na("gear_txt"),
        }
        for f, cond in missing.items():
            desc = self.specs[f].description.split(";")[0].rstrip(".")
            checks.append((cond, ReasonCode.MISSING_VALUE,
                           _sql_text(f"{self._label(f)} is empty; a {desc[:1].lower()}{desc[1:]} is required")))
        checks.append(("clock = 'nonexistent'", ReasonCode.NONEXISTENT_LOCAL_TIME,
                       self._clock_message_sql("nonexistent") if self.profile.timezone != "UTC" else "NULL"))
        checks.append(("clock = 'ambiguous' AND t IS NULL", ReasonCode.AMBIGUOUS_LOCAL_TIME,
                       self._clock_message_sql("ambiguous") if self.profile.timezone != "UTC" else "NULL"))
        # DuckDB reads 'infinity' and '-inf' as timestamps: not a date-time either
        checks.append(("t IS NULL OR NOT isfinite(t)", ReasonCode.BAD_TIME,
                       f"printf('%s holds ''%s'', which is not a date-time (expected e.g. 2021-06-14T08:30:00Z)', "
                       f"{_sql_text(self._label('time'))}, cell_txt(time_txt))"))
        for f, col in (("lat", "lat"), ("lon", "lon_in"), ("speed_kn", "sog")):
            na = "" if f != "speed_kn" else f" AND NOT {self._is_na('speed_kn_txt')}"
            checks.append((f"{f}_txt IS NOT NULL AND {col} IS NULL{na}", ReasonCode.BAD_TYPE,
                           f"printf('%s holds ''%s'', which is not a number', {_sql_text(self._label(f))}, cell_txt({f}_txt))"))
            checks.append((f"NOT isfinite({col})", ReasonCode.OUT_OF_RANGE,
                           _sql_text(f"{self._label(f)} is not a finite number")))
        checks.append(("lat < -90 OR lat > 90", ReasonCode.OUT_OF_RANGE,
                       f"printf('%s = %s is outside the allowed range (-90 to 90)', "
                       f"{_sql_text(self._label('lat'))}, cell_txt(lat_txt))"))
        checks.append(("lon_in < -180 OR lon_in > 360", ReasonCode.OUT_OF_RANGE,
                       f"printf('%s = %s is outside the allowed range (-180 to 360)', {_sql_text(self._label('lon'))}, cell_txt(lon_txt))"))
        checks.append(("sog < 0", ReasonCode.OUT_OF_RANGE,
                       f"printf('%s = %s is negative; a speed over ground is >= 0', {_sql_text(self._label('speed_kn'))}, cell_txt(speed_kn_txt))"))
        checks.append((f"sog > {s.max_speed_kn!r}", ReasonCode.IMPLAUSIBLE_SPEED,
                       f"printf('%s = %s (%.1f knots) is above %s knots, faster than fishing vessels go; "
                       f"check the value or the unit ([units] speed_kn)', {_sql_text(self._label('speed_kn'))}, "
                       f"cell_txt(speed_kn_txt), sog, {_sql_text(f'{s.max_speed_kn:g}')})"))
        checks.append((f"t > TIMESTAMP '{now}'", ReasonCode.FUTURE_TIME,
                       f"printf('%s = %s lies in the future; check the clock or the time zone ([source] timezone)', "
                       f"{_sql_text(self._label('time'))}, cell_txt(time_txt))"))
        reason = "CASE " + " ".join(f"WHEN {c} THEN '{r}'" for c, r, _ in checks) + " END"
        message = "CASE " + " ".join(f"WHEN reason = '{r}' AND ({c}) THEN {m}" for c, r, m in checks) + " END"
        # the mapped fields of a rejected row, as text (the vessel id is added, hashed, later)
        raw_fields = [(self.found[f], f"{f}_txt") for f in ("time", "lat", "lon", "speed_kn", "gear") if f in self.found]
        raw = "json_object(" + ", ".join(f"{_sql_text(c)}, {e}" for c, e in raw_fields) + ")" if raw_fields else "NULL"
        raw = f"CASE WHEN nf IS NOT NULL THEN {_sql_text(_WITHHELD)} ELSE {raw} END"
        texts = ", ".join(f"{self._raw(f)} AS {f}_txt" for f in self.specs)
        return f"""
            SELECT row, CASE WHEN reason IS NULL OR reason <> '{ReasonCode.MISSING_VALUE}' THEN vessel_id_txt END AS v_raw,
                   t, lat, lon, sog, gear_txt AS gear_raw, reason, odd,
                   CASE WHEN reason IS NOT NULL THEN {message} END AS message,
                   CASE WHEN reason IS NOT NULL THEN {raw} END AS raw
            FROM (
                SELECT *, {reason} AS reason FROM (
                    SELECT *, lon_in - 360.0 * floor((lon_in + 180.0) / 360.0) AS lon FROM (
                        SELECT row, nf, odd, vessel_id_txt, gear_txt, time_txt, lat_txt, lon_txt, speed_kn_txt,
                               {self._time_sql('time_txt')} AS t, {self._clock_sql('time_txt')} AS clock,
                               TRY_CAST(lat_txt AS DOUBLE) AS lat, TRY_CAST(lon_txt AS DOUBLE) AS lon_in,
                               TRY_CAST(speed_kn_txt AS DOUBLE) * {self._speed_factor()!r} AS sog
                        FROM (SELECT CAST({rownum} AS BIGINT) AS row, {texts}, {extra} FROM {src}))))"""

    # -- the pipeline
    def run(self) -> AdapterOutput:
        tmp = Path(tempfile.mkdtemp(prefix="harmonize-pings-"))
        # an in-memory database whose buffer manager spills to the temporary folder beyond
        # memory_limit: the working tables stay in memory while they fit (writing them to an
        # on-disk scratch database cost 3-4x more at 1e7 pings), and memory stays bounded
        con = duckdb.connect()
        try:
            con.execute(f"SET temp_directory = {_sql_text(str(tmp))}")
            con.execute(f"SET memory_limit = {_sql_text(self.settings.memory_limit)}")
            con.execute("SET preserve_insertion_order = true")  # row numbers follow the file
            con.execute(f"SET TimeZone = {_sql_text(self.profile.timezone)}")
            con.execute(DISTANCE_MACRO)
            con.execute(CELL_MACRO)
            return self._run(con, tmp)
        except duckdb.Error as exc:
            raise InputFileError(self.path, f"cannot be read ({str(exc).splitlines()[0]}); "
                                 "check the delimiter, quoting and encoding") from None
        finally:
            con.close()
            shutil.rmtree(tmp, ignore_errors=True)

    def _run(self, con: duckdb.DuckDBPyConnection, tmp: Path) -> AdapterOutput:
        self.progress("reading pings", 0, 5)
        if not self._read_fast(con):
            self._read_lines(con, tmp / "lines.parquet")
        n_rows = con.execute("SELECT count(*) FROM p").fetchall()[0][0]
        if n_rows == 0:
            raise InputFileError(self.path, "the file has a header but no data rows")

        self.progress("vessels and gears", 1, 5)
        contact = self._lookups(con)
        self.progress("domain and grid cells", 2, 5)
        con.register("cells", self._locate(con))
        self.progress("tracks", 3, 5)
        self._checks(con)
        con.unregister("cells")
        # once per file, with a count: positions that would lie inside the domain swapped (not port pings)
        off = con.execute(f"SELECT lat, lon FROM q WHERE reason IN ('{ReasonCode.OUTSIDE_DOMAIN}', "
                          f"'{ReasonCode.OUT_OF_RANGE}') AND lat IS NOT NULL AND lon IS NOT NULL").fetchnumpy()
        self.notes += swapped_position_notes(self.study, [(self.path.name, off["lat"], off["lon"])])
        self.progress("fishing time", 4, 5)
        engine = current_engine()
        if engine.name == "dask":
            cells_df, fishing, derived = self._track_on_dask(con, engine.scheduler)
        else:
            con.execute(self._track_sql())
            cells_df = self._aggregate(con)
            fishing, derived = con.execute(
                "SELECT count(*) FILTER (WHERE fishing), count(*) FILTER (WHERE sog IS NULL) FROM track WHERE NOT spike"
            ).fetchall()[0]
            con.execute("CREATE TEMP TABLE track_edges AS SELECT row, vid, t, lat, lon, sog, smin, smax, code, gear, "
                        "layer, owned, CASE WHEN fishing AND NOT spike AND hours > 0 THEN hours ELSE 0 END AS file_hours "
                        "FROM track WHERE edge")
        edges, edge_cells = self._edges(con)
        events, values = effort_output(cells_df, self.study, self.grid, contact)
        edge_events, edge_values = effort_output(edge_cells, self.study, self.grid, contact)
        quarantine, masked = self._quarantine(con)
        n_bad = len(quarantine) + int(masked["n_values"].sum() if len(masked) else 0)
        files = [InputFile("rows", self.path, file_sha256(self.path), n_rows, n_rows - n_bad, n_bad)]
        self.notes.append(f"{fishing:,} of {n_rows - n_bad:,} accepted pings classified as fishing "
                          f"({derived:,} with a speed derived from positions)")
        self.progress("done", 5, 5)
        return AdapterOutput(events=events, values=values, quarantine=quarantine, files=files,
                             notes=self.notes, masked=masked, track_edges=edges, edge_events=edge_events,
                             edge_values=edge_values)

    def _lookups(self, con: duckdb.DuckDBPyConnection) -> dict[str, str]:
        """Hash the distinct vessel ids and resolve the distinct gears (tables vmap, gmap)."""
        vessels = con.sql("SELECT DISTINCT v_raw FROM p WHERE v_raw IS NOT NULL").to_arrow_table()["v_raw"].to_pandas()
        hashed = pseudonymise(vessels, study_salt(self.study.root), prefix="vessel")
        vid = pd.factorize(hashed)[0].astype(np.int32)
        con.register("vmap", pa.table({"v_raw": pa.array(vessels.astype(str).tolist(), pa.string()),
                                       "vessel": pa.array(hashed.astype(str).tolist(), pa.string()),
                                       "vid": vid}))
        gears = con.sql("SELECT DISTINCT gear_raw FROM p WHERE gear_raw IS NOT NULL").to_arrow_table()["gear_raw"].to_pylist()
        rules = {g: self.settings.rule(g, self.study) for g in gears}
        con.register("gmap", pa.table({
            "gear_raw": pa.array(list(rules), pa.string()),
            "gear": pa.array([r.gear if r else None for r in rules.values()], pa.string()),
            "layer": pa.array([r.layer if r else None for r in rules.values()], pa.string()),
            "smin": pa.array([r.speed_min_kn if r else None for r in rules.values()], pa.float64()),
            "smax": pa.array([r.speed_max_kn if r else None for r in rules.values()], pa.float64()),
        }))
        return {r.gear: r.contact for r in rules.values() if r is not None}

    def _checks(self, con: duckdb.DuckDBPyConnection) -> None:
        """Gear, domain and duplicates (tables q, dups)."""
        unknown_gear = ("printf('gear ''%s'' is not a known gear code; add a [fishing.gears.\"%s\"] table "
                        "with contact = \"bottom\" or \"pelagic\" to the profile', cell_txt(p.gear_raw), cell_txt(upper(trim(p.gear_raw))))")
        outside = "printf('position (%.4f, %.4f) lies outside the study domain', p.lat, p.lon)"
        con.execute(f"""
            CREATE TABLE q AS
            SELECT p.row, vm.vid, p.t, p.lat, p.lon, p.sog, g.gear, g.layer, g.smin, g.smax,
                   c.code, p.raw,
                   CASE WHEN p.reason IS NOT NULL THEN p.reason
                        WHEN g.gear IS NULL THEN '{ReasonCode.UNKNOWN_GEAR}'
                        WHEN c.code = {OUTSIDE} THEN '{ReasonCode.OUTSIDE_DOMAIN}' END AS reason,
                   CASE WHEN p.reason IS NOT NULL THEN p.message
                        WHEN g.gear IS NULL THEN {unknown_gear}
                        WHEN c.code = {OUTSIDE} THEN {outside} END AS message
            FROM (p POSITIONAL JOIN cells c)
            LEFT JOIN vmap vm ON p.v_raw = vm.v_raw
            LEFT JOIN gmap g ON p.gear_raw = g.gear_raw
        """)
        con.execute("DROP TABLE p")
        # Pings in any order are sorted per vessel by time (the track's windows order by vessel,
        # time and row): an ordinary AIS export interleaves vessels and repeats blocks, and a
        # ping is not wrong for arriving out of order. A bad clock shows as an impossible jump.
        # duplicates: the same vessel and time as an earlier row. A cheap count first (a hash
        # aggregate, no sort): most files have none, and then the ordered pass is not needed.
        accepted, keys = con.execute(
            "SELECT count(*), count(DISTINCT (vid, t)) FROM q WHERE reason IS NULL").fetchall()[0]
        if accepted == keys:
            con.execute("CREATE TABLE dups (row BIGINT, r0 BIGINT, same BOOLEAN)")
            return
        con.execute("""
            CREATE TABLE dups AS
            SELECT row, r0, same FROM (
                SELECT row, t, lag(t) OVER w AS t0, lag(row) OVER w AS r0,
                       (lag(lat) OVER w IS NOT DISTINCT FROM lat AND lag(lon) OVER w IS NOT DISTINCT FROM lon
                        AND lag(sog) OVER w IS NOT DISTINCT FROM sog) AS same
                FROM q WHERE reason IS NULL
                WINDOW w AS (PARTITION BY vid ORDER BY t, row))
            WHERE t = t0
        """)

    def _track_sql(self) -> str:
        """The track of the accepted pings (harmonize.tracks: neighbours, position jumps,
        derived speed, fishing class, hours, and whether a ping lies at an edge of its
        vessel's part of this file)."""
        s = self.settings
        pings = ("(SELECT row, vid, code, gear, layer, sog, smin, smax, t, lat, lon "
                 "FROM q ANTI JOIN dups USING (row) WHERE q.reason IS NULL)")
        return f"""
            CREATE TABLE track AS
            SELECT row, vid, t, lat, lon, code, gear, layer, sog, smin, smax, spike, r_p1, r_n1,
                   s_in AS sp_in, s_out AS sp_out, hours, speed, fishing, owned, edge
            FROM ({track_sql(pings, "vid", "t, row", repr(s.max_speed_kn), repr(s.max_gap_h))})
        """

    def _track_on_dask(self, con: duckdb.DuckDBPyConnection, scheduler: str | None) -> tuple[pd.DataFrame, int, int]:
        """The track and fishing-cell steps on Dask (harmonize.engines.dask_engine).

        The accepted pings go to parquet in buckets of whole vessels, under
        ``HARMONIZE_DASK_SCRATCH`` (a folder the workers can read) or a temporary folder; the
        position jumps come back as the table ``track`` the quarantine step reads.
        Returns the cells (as :meth:`_aggregate`), the fishing pings and the derived speeds.
        """
        from harmonize.engines import scratch_parent
        from harmonize.engines.dask_engine import CELL_KEYS, fishing_hours

        scratch = Path(tempfile.mkdtemp(prefix="harmonize-pings-", dir=scratch_parent()))
        try:
            n = con.execute("SELECT count(*) FROM q WHERE reason IS NULL").fetchall()[0][0]
            buckets = max(2, min(512, n // 1_000_000))  # about a million pings per Dask task
            target = _sql_text(str(scratch / "pings"))
            con.execute(f"""
                COPY (SELECT row, vid, t, lat, lon, sog, gear, layer, smin, smax, code, vid % {buckets} AS bucket
                      FROM q ANTI JOIN dups USING (row) WHERE q.reason IS NULL)
                TO {target} (FORMAT parquet, PARTITION_BY (bucket))""")
            folders = sorted(p for p in (scratch / "pings").glob("bucket=*") if p.is_dir())
            files = [sorted(str(f) for f in d.glob("*.parquet")) for d in folders]
            names = [self.study.month_to_season[m] for m in range(1, 13)]
            offsets = season_year_offsets(self.study.seasons)[1:].tolist()
            result = fishing_hours(files, self.settings.max_speed_kn, self.settings.max_gap_h, names, offsets,
                                   scheduler, timezone=self.study.timezone)
        finally:
            shutil.rmtree(scratch, ignore_errors=True)
        con.register("dask_spikes", result.spikes)
        con.execute("CREATE TEMP TABLE track AS SELECT row, r_p1, sp_in, r_n1, sp_out, true AS spike FROM dask_spikes")
        con.unregister("dask_spikes")
        if result.edges is not None and len(result.edges):
            con.register("dask_edges", result.edges)
            con.execute("CREATE TEMP TABLE track_edges AS SELECT * FROM dask_edges")
            con.unregister("dask_edges")
        else:
            con.execute("CREATE TEMP TABLE track_edges AS SELECT row, vid, t, lat, lon, sog, smin, smax, code, gear, "
                        "layer, true AS owned, 0.0 AS file_hours FROM q LIMIT 0")
        cells = result.cells
        if result.vessels is not None and len(cells):
            # the vessels behind each cell (pseudonyms), so n_vessels merges across files
            con.register("dask_cells", cells)
            con.register("dask_vessels", result.vessels)
            keys = ", ".join(CELL_KEYS)
            cells = con.sql(f"""
                SELECT c.*, coalesce(v.vessel_ids, []) AS vessel_ids FROM dask_cells c LEFT JOIN (
                    SELECT {keys}, list_sort(list(DISTINCT m.vessel)) AS vessel_ids FROM dask_vessels d
                    JOIN (SELECT DISTINCT vid, vessel FROM vmap) m USING (vid) GROUP BY ALL) v USING ({keys})
                ORDER BY {keys}""").to_arrow_table().to_pandas()
            con.unregister("dask_cells")
            con.unregister("dask_vessels")
        ix, iy = decode_cells(cells["code"].to_numpy(np.int64))
        return cells.assign(ix=ix, iy=iy).drop(columns="code"), result.n_fishing, result.n_derived

    def _read_fast(self, con: duckdb.DuckDBPyConnection) -> bool:
        """Table ``p`` by DuckDB's CSV reader; False (and no table) when the line reader must read the file.

        DuckDB numbers rejected lines physically but good rows by record, and reads lines
        made only of delimiters as rows: any rejected line, any such row, a cell starting
        with a quote that was not taken as quoting, or a read error sends the file to the
        line reader, which numbers rows as every other reader does.
        """
        if self.path.suffix.lower() == ".parquet":
            src = _csv_source(self.path, self.profile)[:-1] + ", file_row_number = true)"
            sql = self._stage1_sql(src, "file_row_number + 1", "CAST(NULL AS INTEGER) AS nf, false AS odd")
            con.execute(f"CREATE TABLE p AS {sql}")
            return True
        try:
            probe = con.sql(f"SELECT * FROM {_csv_source(self.path, self.profile, self.delimiter, rejects=False)} LIMIT 0")
            names = list(probe.columns)
        except duckdb.Error:
            return False
        if [c.strip().lstrip("\ufeff") for c in names] != self.columns:
            return False  # DuckDB read another header (renamed or split columns)
        self.colref = {c: _ident(d) for c, d in zip(self.columns, names, strict=True)}
        # Cheap tests first (string comparisons): a cell whose first byte is a quote; a first
        # cell that is empty or starts with whitespace (every whitespace byte sorts before '!'),
        # and only then the costly test that every cell is blank.
        blank = " AND ".join(f"coalesce(trim({_ident(d)}, {_sql_text(_BLANK_CHARS)}), '') = ''" for d in names)
        quoted = " OR ".join(f"({_ident(d)} >= '\"' AND {_ident(d)} < '#')" for d in names)
        first = _ident(names[0])
        odd = f"CASE WHEN {quoted} THEN true WHEN {first} IS NULL OR {first} < '!' THEN {blank} ELSE false END"
        sql = self._stage1_sql(_csv_source(self.path, self.profile, self.delimiter), "row_number() OVER ()",
                               f"CAST(NULL AS INTEGER) AS nf, {odd} AS odd")
        try:
            con.execute(f"CREATE TABLE p AS {sql}")
        except duckdb.Error:
            return False
        rejected = con.execute("SELECT count(*) FROM ping_rejects").fetchall()[0][0]
        if rejected or con.execute("SELECT count(*) FROM p WHERE odd").fetchall()[0][0]:
            con.execute("DROP TABLE p")
            return False
        return True

    def _read_lines(self, con: duckdb.DuckDBPyConnection, target: Path) -> None:
        """Table ``p`` from the line reader, streamed block by block through a parquet file.

        Columns are stored by position (``c0``, ``c1`` ...) with the data row number and,
        for a row that cannot be split into the header's columns, its number of fields
        (its cells are left null: the row is quarantined with its text withheld).
        """
        with LineReader(self.path, self.profile) as reader:
            if reader.header != self.columns:
                self.columns = reader.header
                self.found = self._resolve(reader.header)
            names = [f"c{i}" for i in range(reader.width)]
            schema = pa.schema([("row", pa.int64()), ("nf", pa.int32())] + [(n, pa.string()) for n in names])
            with pq.ParquetWriter(str(target), schema, compression="zstd") as writer:
                for block in reader.blocks(FALLBACK_BLOCK_ROWS):
                    n = len(block.rows)
                    bad = np.zeros(n, dtype=bool)
                    nf = np.zeros(n, dtype=np.int32)
                    if block.malformed:
                        at = np.array([m[0] for m in block.malformed], dtype=np.int64) - block.first_row
                        bad[at] = True
                        nf[at] = [m[2] for m in block.malformed]
                    cells = [pa.array(col, pa.string(), mask=bad) for col in zip(*block.rows, strict=True)]
                    rows = pa.array(np.arange(block.first_row, block.first_row + n, dtype=np.int64))
                    writer.write_table(pa.Table.from_arrays([rows, pa.array(nf, mask=~bad), *cells], schema=schema))
        # the first of repeated (empty) names wins, as in the header lookup
        self.colref = {}
        for i, c in enumerate(self.columns):
            self.colref.setdefault(c, names[i])
        sql = self._stage1_sql(f"read_parquet({_sql_text(str(target))})", "row", "nf, false AS odd")
        con.execute(f"CREATE TABLE p AS {sql}")

    def _locate(self, con: duckdb.DuckDBPyConnection) -> pa.Table:
        """Cell code per row (in table order): OUTSIDE outside the domain, null without a position."""
        parts = []
        for batch in con.sql("SELECT lon, lat FROM p").to_arrow_reader(1_000_000):
            lon = batch.column(0).to_numpy(zero_copy_only=False).astype(float)
            lat = batch.column(1).to_numpy(zero_copy_only=False).astype(float)
            ok = np.isfinite(lon) & np.isfinite(lat) & (np.abs(lat) <= 90)
            code = np.full(lon.shape[0], OUTSIDE, dtype=np.int64)
            if ok.any():
                code[ok] = locate(self.study, self.grid, lon[ok], lat[ok])
            parts.append(pa.array(code, mask=~ok))
        return pa.table({"code": pa.chunked_array(parts, pa.int64())})

    def _aggregate(self, con: duckdb.DuckDBPyConnection) -> pd.DataFrame:
        """Fishing hours per cell of the file's pings. The vessels and the speed_derived flag
        of a part are those of its interior pings: the store's view adds those of the owned
        edge pings, joined across the files of the source (harmonize.parts)."""
        season, season_year = season_sql(self.study, "t")
        df = con.sql(f"""
            SELECT code, {season_year} AS season_year, {season} AS season, gear, layer AS depth_layer,
                   sum(hours) AS hours, count(DISTINCT vid) AS n_vessels, count(*) AS n_values,
                   coalesce(bool_or(sog IS NULL) FILTER (WHERE NOT owned), false) AS speed_derived,
                   coalesce(list_sort(list(DISTINCT vessel) FILTER (WHERE NOT owned)), []::VARCHAR[]) AS vessel_ids
            FROM track LEFT JOIN (SELECT DISTINCT vid, vessel FROM vmap) USING (vid)
            WHERE fishing AND NOT spike AND hours > 0
            GROUP BY ALL ORDER BY ALL
        """).to_arrow_table().to_pandas()
        ix, iy = decode_cells(df["code"].to_numpy(np.int64))
        return df.assign(ix=ix, iy=iy).drop(columns="code")

    def _edges(self, con: duckdb.DuckDBPyConnection) -> tuple[pd.DataFrame, pd.DataFrame]:
        """The pings at the edges of each vessel's part of the file, and the cell-periods the
        owned ones lie in (0 hours: the template of their part in the store).

        Reads the table ``track_edges`` (row, vid, t, lat, lon, sog, smin, smax, code, gear,
        layer, owned, file_hours). Returns (edges, cells): edges has the columns the store
        keeps (harmonize.parts.EDGE_COLUMNS but the ids, ``row`` for source_row).
        """
        season, season_year = season_sql(self.study, "t")
        edges = con.sql(f"""
            SELECT m.vessel, e.t, e.lat, e.lon, e.sog, e.smin, e.smax, e.row, e.owned, e.file_hours, e.code,
                   e.gear, e.layer AS depth_layer, {season_year} AS season_year, {season} AS season
            FROM track_edges e JOIN (SELECT DISTINCT vid, vessel FROM vmap) m USING (vid)
            ORDER BY m.vessel, e.t, e.row
        """).to_arrow_table().to_pandas()
        ix, iy = decode_cells(edges["code"].to_numpy(np.int64))
        edges["event_id"] = effort_event_ids(edges["gear"], ix, iy, edges["season_year"], edges["season"],
                                             edges["depth_layer"])
        keys = ["ix", "iy", "season_year", "season", "gear", "depth_layer"]
        owned = edges["owned"].to_numpy(bool)
        cells = (edges[owned].assign(ix=ix[owned], iy=iy[owned])[keys].drop_duplicates()
                 .sort_values(keys, kind="stable").reset_index(drop=True))
        cells = cells.assign(hours=0.0, n_vessels=0, n_values=0, speed_derived=False, edge=True,
                             vessel_ids=[[] for _ in range(len(cells))])
        edges = edges.assign(max_speed_kn=self.settings.max_speed_kn, max_gap_h=self.settings.max_gap_h)
        cols = ["vessel", "t", "lat", "lon", "sog", "smin", "smax", "max_speed_kn", "max_gap_h", "row", "owned",
                "file_hours", "event_id"]
        return edges[cols].reset_index(drop=True), cells

    def _quarantine(self, con: duckdb.DuckDBPyConnection) -> tuple[pd.DataFrame, pd.DataFrame]:
        """Rejected pings one by one (up to the limit), the rest counted per reason."""
        s = self.settings
        limit = s.quarantine_rows
        iso = "'%Y-%m-%dT%H:%M:%SZ'"
        con.execute(f"""
            CREATE TEMP VIEW rejected AS
            -- one reason per ping (a ping can break several rules): the first in this order
            SELECT row, arg_min(reason, prio) AS reason, arg_min(message, prio) AS message FROM (
            SELECT row, reason, message, 1 AS prio FROM q WHERE reason IS NOT NULL
            UNION ALL
            SELECT row, '{ReasonCode.DUPLICATE_RECORD}',
                   CASE WHEN same THEN printf('exact duplicate of row %d (same vessel, time and position)', r0)
                        ELSE printf('same vessel and time as row %d but another position or speed; only the '
                                    'first is kept', r0) END, 3 FROM dups
            UNION ALL
            SELECT row, '{ReasonCode.IMPLAUSIBLE_SPEED}',
                   CASE WHEN r_p1 IS NULL THEN
                        printf('position jump: the first ping of the vessel in this file, leaving it for row %d takes '
                               '%.1f knots, above the %s-knot limit, and the track goes on from there at a plausible '
                               'speed; a bad position fix?', r_n1, sp_out, '{s.max_speed_kn:g}')
                        WHEN r_n1 IS NULL THEN
                        printf('position jump: the last ping of the vessel in this file, reaching it from row %d takes '
                               '%.1f knots, above the %s-knot limit, and the track before it goes at a plausible '
                               'speed; a bad position fix?', r_p1, sp_in, '{s.max_speed_kn:g}')
                        ELSE
                        printf('position jump: reaching this ping from row %d takes %.1f knots and leaving it for row %d '
                               '%.1f knots, above the %s-knot limit; a bad position fix?',
                               r_p1, sp_in, r_n1, sp_out, '{s.max_speed_kn:g}') END, 4 FROM track WHERE spike
            ) GROUP BY row
        """)
        vcol = _sql_text(self.found.get("vessel_id", "vessel_id"))
        typed = [(f, e) for f, e in (("time", f"strftime(q.t, {iso})"), ("lat", "q.lat"), ("lon", "q.lon"),
                                     ("speed_kn", "q.sog"), ("gear", "q.gear")) if f in self.found]
        typed_raw = "json_object(" + ", ".join(f"{_sql_text(self.found[f])}, {e}" for f, e in typed) + ")"
        name = self.path.name
        rows = con.sql(f"""
            SELECT {_sql_text(name)} AS source_file, r.row AS source_row, r.reason AS reason_code, r.message,
                   CAST(json_merge_patch(json_object({vcol}, vmap.vessel), coalesce(q.raw, {typed_raw})) AS VARCHAR) AS raw
            FROM (SELECT * FROM rejected ORDER BY row LIMIT {int(limit)}) r JOIN q USING (row)
            LEFT JOIN (SELECT DISTINCT vid, vessel FROM vmap) vmap ON q.vid = vmap.vid
            ORDER BY r.row
        """).to_arrow_table().to_pandas()
        rows["message"] = rows["message"].map(one_line)  # at most `limit` rows
        keep = rows.iloc[:limit].reset_index(drop=True)
        keep["n_problems"] = 1
        counts = dict(con.execute("SELECT reason, count(*) FROM rejected GROUP BY reason").fetchall())
        listed = keep["reason_code"].value_counts().to_dict()
        masked = [
            {"source_file": name, "reason_code": code, "n_values": int(n - listed.get(code, 0)),
             "message": f"{n - listed.get(code, 0):,} more pings rejected as {code}, beyond the first "
                        f"{limit:,} rejected pings listed one by one; raise [fishing] quarantine_rows to list them"}
            for code, n in sorted(counts.items()) if n - listed.get(code, 0) > 0
        ]
        masked_df = pd.DataFrame(masked, columns=["source_file", "reason_code", "n_values", "message"])
        masked_df["n_values"] = masked_df["n_values"].astype("int64")
        return keep, masked_df


# ---------------------------------------------------------------------------- logbook

def _read_logbook(path: Path, profile: Profile, study: Study, settings: FishingSettings,
                  progress: ProgressCallback | None) -> AdapterOutput:
    """Logbook hauls -> fishing hours split over the cells along each tow."""
    specs: list[FieldSpec] = list(fields("effort_logbook"))
    rej = Rejections()
    raw, bad_lines = read_table(path, profile, "rows")
    ev = coerce_fields(raw, specs, profile, rej, "effort_logbook", bad_lines)
    n = len(ev)
    pos = np.arange(n)
    salt = study_salt(study.root)
    vessel = pseudonymise(ev["vessel_id"], salt, prefix="vessel")
    # the quarantine's raw rows carry the hashed vessel id, never the name
    vcol = resolve_columns(raw, specs, profile).get("vessel_id")
    if vcol is not None:
        raw.frame[vcol] = pseudonymise(raw.frame[vcol], salt, prefix="vessel").fillna("").astype(object)
    if progress:
        progress("validate", 1, 3)

    alive = ~rej.mask("rows", n)
    dup = alive & ev["event_id"].duplicated(keep="first").to_numpy() & ev["event_id"].notna().to_numpy()
    rej.add("rows", pos[dup], ReasonCode.DUPLICATE_RECORD,
            [f"haul '{e}' appears earlier in the file; only its first row counts (when that row is quarantined too, correct it and drop this one)" for e in ev["event_id"][dup]])
    alive &= ~dup
    start, end = ev["start_time"], ev["end_time"]
    hours = ((end - start).dt.total_seconds() / 3600.0).to_numpy(dtype=float, na_value=np.nan)
    backwards = alive & (hours < 0)
    rej.add("rows", pos[backwards], ReasonCode.END_BEFORE_START,
            [f"end_time {e} is before start_time {s}" for s, e in zip(start[backwards], end[backwards], strict=True)])
    zero = alive & (hours == 0)
    rej.add("rows", pos[zero], ReasonCode.BAD_EFFORT, "haul duration is 0: start and end times are equal")
    alive &= ~backwards & ~zero

    gear_rule: dict[str, GearRule | None] = {g: settings.rule(g, study) for g in ev["gear"].dropna().unique()}
    rule_of = ev["gear"].map(lambda g: gear_rule.get(g) if isinstance(g, str) else None)
    unknown = alive & rule_of.isna().to_numpy()
    rej.add("rows", pos[unknown], ReasonCode.UNKNOWN_GEAR,
            [f"gear '{g}' is not a known gear code; add a [fishing.gears.\"{str(g).strip().upper()}\"] table with "
             "contact = \"bottom\" or \"pelagic\" to the profile" for g in ev["gear"][unknown]])
    alive &= ~unknown

    slon, slat = normalise_lon(ev["start_lon"].to_numpy(float)), ev["start_lat"].to_numpy(float)
    elon_in, elat_in = ev["end_lon"].to_numpy(float), ev["end_lat"].to_numpy(float)
    has_end = np.isfinite(elon_in) & np.isfinite(elat_in)
    elon = np.where(has_end, normalise_lon(np.where(has_end, elon_in, 0.0)), slon)
    elat = np.where(has_end, elat_in, slat)
    checked = alive & np.isfinite(slon) & np.isfinite(slat)
    reject_outside_domain(study, slon[checked], slat[checked], pos[checked], "rows", rej, "haul start position")
    alive = ~rej.mask("rows", n)
    checked = alive & has_end
    reject_outside_domain(study, elon[checked], elat[checked], pos[checked], "rows", rej, "haul end position")
    alive = ~rej.mask("rows", n)

    with np.errstate(invalid="ignore", divide="ignore"):
        dist_m = np.where(has_end, geodesic_distance_m(slat, slon, elat, elon), 0.0)
        tow_kn = dist_m / M_PER_NMI / hours
    fast = alive & (tow_kn > settings.max_speed_kn)
    rej.add("rows", pos[fast], ReasonCode.IMPLAUSIBLE_SPEED,
            [f"the haul covers {d / 1000:.1f} km in {h * 60:.0f} min ({v:.1f} knots), above {settings.max_speed_kn:g} "
             "knots; check positions, times and units" for d, h, v in zip(dist_m[fast], hours[fast], tow_kn[fast], strict=True)])
    alive &= ~fast
    if progress:
        progress("split tows", 2, 3)

    grid = Grid(study.crs, study.cell_size_km)
    idx = np.flatnonzero(alive)
    parts = split_tows_by_cell(grid, slon[idx], slat[idx], elon[idx], elat[idx])
    tow = idx[parts["tow"].to_numpy()]
    season, season_year = _season_of(study, start.iloc[tow])
    rules = rule_of.iloc[tow]
    frame = pd.DataFrame({
        "ix": parts["ix"].to_numpy(), "iy": parts["iy"].to_numpy(),
        "season_year": season_year, "season": season,
        "gear": [r.gear for r in rules], "depth_layer": [r.layer for r in rules],
        "hours": parts["share"].to_numpy() * hours[tow], "vessel": vessel.iloc[tow].to_numpy(),
        "tow": tow,
    })
    keys = ["ix", "iy", "season_year", "season", "gear", "depth_layer"]
    cells = frame.groupby(keys, as_index=False, sort=True).agg(
        hours=("hours", "sum"), n_vessels=("vessel", "nunique"), n_values=("tow", "nunique"),
        vessel_ids=("vessel", lambda v: sorted(set(v))))
    cells["speed_derived"] = False
    contact = {r.gear: r.contact for r in gear_rule.values() if r is not None}
    events, values = effort_output(cells, study, grid, contact)
    notes = []
    if (alive & ~has_end).any():
        notes.append(f"{int((alive & ~has_end).sum())} hauls have no end position: all their hours went to the start cell")
    if progress:
        progress("done", 3, 3)
    return finish([raw], rej, events, values, notes)


def _season_of(study: Study, times: pd.Series) -> tuple[np.ndarray, np.ndarray]:
    season, season_year = tag_season(times, study.seasons, study.timezone)
    return season.to_numpy(dtype=object), season_year.to_numpy(dtype=np.int64)


__all__ = [
    "DEFAULT_MAX_GAP_H",
    "DEFAULT_SPEED_WINDOW_KN",
    "GEAR_CONTACT",
    "EffortAdapter",
    "FishingSettings",
    "decode_cells",
    "effort_output",
    "encode_cells",
    "fishing_settings",
    "geodesic_distance_m",
    "split_tows_by_cell",
]
