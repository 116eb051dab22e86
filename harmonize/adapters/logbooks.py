"""Logbook hauls -> fishing hours per cell.

One row per haul with start and end time and position: fishing hours = haul duration, split
over the grid cells the straight tow line crosses in the study's equal-area grid CRS, in
proportion to the length in each cell (constant towing speed). A haul faster than
``max_speed_kn`` between its positions (distance on the WGS84 ellipsoid, harmonize.geodesy) is
quarantined as implausible_speed. Vessel ids are replaced by salted hashes
(harmonize.privacy) before anything is stored.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from harmonize.adapters.base import AdapterOutput, ProgressCallback, finish
from harmonize.adapters.domain import reject_outside_domain
from harmonize.adapters.fishing import FishingSettings, GearRule, effort_output
from harmonize.contract import FieldSpec, fields
from harmonize.errors import ReasonCode
from harmonize.geodesy import M_PER_NMI, distance_m
from harmonize.privacy import pseudonymise, study_salt
from harmonize.profile import Profile
from harmonize.reading.fields import coerce_fields, resolve_columns
from harmonize.reading.quarantine import Rejections, reject_repeated_ids
from harmonize.reading.text import read_table
from harmonize.study import Study
from harmonize.tagging import Grid, normalise_lon, tag_season


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


def read_logbook(path: Path, profile: Profile, study: Study, settings: FishingSettings,
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
    dup = reject_repeated_ids(rej, "rows", ev["event_id"], "haul", within=alive)
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
        dist_m = np.where(has_end, distance_m(slat, slon, elat, elon), 0.0)
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
    season, season_year = tag_season(start.iloc[tow], study.seasons, study.timezone)
    rules = rule_of.iloc[tow]
    frame = pd.DataFrame({
        "ix": parts["ix"].to_numpy(), "iy": parts["iy"].to_numpy(),
        "season_year": season_year.to_numpy(dtype=np.int64), "season": season.to_numpy(dtype=object),
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


__all__ = ["read_logbook", "split_tows_by_cell"]
