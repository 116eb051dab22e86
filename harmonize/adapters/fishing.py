"""Fishing effort, shared by the ping and logbook forms: the ``[fishing]`` settings and gear
rules, the cell code of a position and the events and values of fishing hours per cell-period.

Gear rules: a gear is bottom-contact (tagged "near_bottom") or pelagic (tagged with the
profile's layer) by its FAO ISSCFG code or the profile's ``[fishing.gears]``; each gear has a
fishing speed window (harmonize.adapters.pings). Both forms sum fishing hours per grid cell x
season_year x season x gear x depth layer, with the number of distinct vessels
(:func:`effort_output`).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from harmonize.errors import ConfigError
from harmonize.profile import Profile
from harmonize.study import Study
from harmonize.tagging import NEAR_BOTTOM, Grid, inside_domain, normalise_lon, season_bounds

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


# ---------------------------------------------------------------------------- cells

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


# ---------------------------------------------------------------------------- output

def cell_names(ix: np.ndarray, iy: np.ndarray) -> pd.Series:
    """The cell id of each (ix, iy): "x{ix}_y{iy}" (harmonize.tagging.Grid's names)."""
    return "x" + pd.Series(np.asarray(ix, np.int64)).astype(str) + "_y" + pd.Series(np.asarray(iy, np.int64)).astype(str)


def effort_event_ids(gear: pd.Series, ix: np.ndarray, iy: np.ndarray, season_year: pd.Series, season: pd.Series,
                     depth_layer: pd.Series) -> pd.Series:
    """Event id of a fishing cell-period: gear/cell/season_year-season/layer."""
    return (pd.Series(gear).reset_index(drop=True) + "/" + cell_names(ix, iy) + "/"
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
    cell_id = cell_names(ix, iy)
    start, end = season_bounds(cells["season"], cells["season_year"], study.seasons, study.timezone)
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


__all__ = [
    "DEFAULT_MAX_GAP_H",
    "DEFAULT_MAX_SPEED_KN",
    "DEFAULT_QUARANTINE_ROWS",
    "DEFAULT_SPEED_WINDOW_KN",
    "GEAR_CONTACT",
    "OUTSIDE",
    "FishingSettings",
    "GearRule",
    "cell_names",
    "decode_cells",
    "effort_event_ids",
    "effort_output",
    "encode_cells",
    "fishing_settings",
    "locate",
]
