"""Ship-based seabird strip transects: segments (events) and birds by taxon (records); effort = strip area.

Birds are counted within a strip of fixed width beside the moving ship, 300 m by default;
density = n / (L x w), with L the segment length and w the strip width (Tasker et al. 1984,
Counting seabirds at sea from ships: a review of methods employed and a suggestion for a
standardized approach, The Auk 101:567-577; Gould and Forsell 1989, USFWS Technical Report
25). L is the WGS84 geodesic between the segment's start and end positions (pyproj.Geod,
Karney 2013, Algorithms for geodesics, J. Geodesy 87:43-55), or a given length.

Birds on the water and birds in flight are kept apart (``behavior`` "on_water" /
"in_flight"). Flying birds give a density only when they were counted by snapshot (Tasker
et al. 1984): the profile's ``[strip] flying`` says so ("snapshot", the default); flying
birds counted continuously ("continuous") are stored without effort or density, because
continuous counts measure the flux of birds through the strip, not their density.

Birds are at the sea surface: segments get depth_min_m = depth_max_m = 0, which the
pipeline tags as the study's top depth layer. Season and cell come from the segment's
midpoint (in time and in space). Observer names are personal data: only a salted
pseudonym (harmonize.privacy) reaches the store, also in the raw rows kept in quarantine.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
import pyarrow as pa

from harmonize.adapters.domain import reject_live_outside
from harmonize.adapters.event_record import (
    EventRecordAdapter,
    Opening,
    RecordCheck,
    Track,
    event_times,
    flag_tuples,
)
from harmonize.adapters.registry import register
from harmonize.adapters.zero_filling import (
    STAGE_UNRESOLVED,
    catch_unknown,
    stage_unresolved_events,
    target_years,
    zero_fill,
)
from harmonize.clock import add_hours
from harmonize.config_spec import Table, number, text
from harmonize.contract import fields
from harmonize.errors import ConfigError, ReasonCode
from harmonize.geodesy import KM_PER_NMI
from harmonize.privacy import pseudonymise, study_salt
from harmonize.profile import Profile
from harmonize.reading.fields import resolve_columns
from harmonize.reading.quarantine import Rejections
from harmonize.reading.text import RawTable
from harmonize.study import Study
from harmonize.tagging import tag_season

#: The standard strip width for ship-based seabird counts (Tasker et al. 1984, The Auk 101:567-577).
DEFAULT_STRIP_WIDTH_M = 300.0
#: Survey ships count seabirds while steaming at about 5-15 knots (common practice); a
#: segment implying more than this is a wrong position, length or time.
MAX_SHIP_SPEED_KN = 30.0
ON_WATER, IN_FLIGHT = "on_water", "in_flight"
FLYING_MODES = ("snapshot", "continuous")


def strip_area_km2(length_km: np.ndarray, strip_width_m: np.ndarray) -> np.ndarray:
    """Area of the counting strip, L x w, in km2 (Tasker et al. 1984)."""
    return np.asarray(length_km, float) * np.asarray(strip_width_m, float) / 1000.0


@dataclass(frozen=True)
class StripRules:
    """The profile's ``[strip]`` section: how flying birds were counted, the speed limit."""

    flying: str = "snapshot"
    max_speed_kn: float = MAX_SHIP_SPEED_KN

    @classmethod
    def from_profile(cls, profile: Profile) -> StripRules:
        sec = profile.section("strip")
        flying = sec.get("flying", "snapshot")
        if flying not in FLYING_MODES:
            raise ConfigError(profile.path, "strip.flying",
                              f"{flying!r} is not known; expected \"snapshot\" (flying birds counted in snapshots) "
                              "or \"continuous\" (every flying bird in the strip counted)")
        speed = sec.get("max_speed_kn", MAX_SHIP_SPEED_KN)
        if isinstance(speed, bool) or not isinstance(speed, int | float) or speed <= 0:
            raise ConfigError(profile.path, "strip.max_speed_kn", f"expected a positive number of knots, got {speed!r}")
        return cls(str(flying), float(speed))


@register
class TransectAdapter(EventRecordAdapter):
    kind = "transect"
    description = "Ship-based seabird strip-transect segments and their birds by taxon; effort = strip area (km2)."
    tables = {"events": "transect_events", "records": "transect_records"}
    effort_words = "strip area surveyed"
    effort_label = "strip area"
    default_protocol = "standard_seabird_strip"
    display_order = 30
    joins_date_time = True
    event_word, record_word = "segment", "bird"
    profile_sections = {
        "strip": Table({
            "flying": text("How flying birds were counted.", enum=("snapshot", "continuous"), default="snapshot"),
            "max_speed_kn": number("Faster segments -> implausible_speed.", exclusive_minimum=0, default=30),
        }, "Strip-transect rules."),
    }
    profile_example = """\
[strip]
# flying = "snapshot"         # or "continuous": flying birds then get no density
# max_speed_kn = 30           # faster segments -> implausible_speed
"""

    def profile_rules(self, profile: Profile) -> StripRules:
        return StripRules.from_profile(profile)

    def validate_events(self, opening: Opening, study: Study) -> tuple[pd.DataFrame, dict[str, np.ndarray]]:
        observer_id = pseudonymise(opening.ev["observer"], study_salt(study.root))
        _hide_observers(opening.ev_raw, opening.rc_raw, opening.profile, study)
        return _segments(opening.ev, observer_id, study, opening.rejections, opening.rules)

    def convert(self, opening: Opening, records: RecordCheck, segments: pd.DataFrame, flags: dict[str, np.ndarray],
                study: Study) -> tuple[pd.DataFrame, pd.DataFrame, list[str]]:
        profile = opening.profile
        rc, rc_raw = opening.rc, opening.rc_raw
        taxon, rc_ok, incomplete, unattributed = records.taxon, records.kept, records.incomplete, records.unattributed
        # A quarantined bird row with no readable segment id (a malformed line, an empty id)
        # may belong to any segment: no segment's counts are known complete, no absence is inferred.
        notes = [self.unattributed_note(rc_raw.path.name, unattributed)] if unattributed else []

        # Without an in_flight column the source does not tell flying birds apart: no behavior.
        split = "in_flight" in resolve_columns(rc_raw, fields("transect_records"), profile) or "in_flight" in profile.constants
        flying = rc["in_flight"].fillna(False).to_numpy(bool)
        behavior = pd.Series(np.where(flying, IN_FLIGHT, ON_WATER), dtype="string")
        if not split:
            behavior[:] = pd.NA
        birds = pd.DataFrame({
            "event_id": rc["event_id"][rc_ok],
            "variable": taxon[rc_ok],
            "behavior": behavior[rc_ok],
            "count": rc["count"][rc_ok].to_numpy(float),
            "row": np.flatnonzero(rc_ok) + 1,
        })
        values = _bird_values(birds)
        events_year = target_years(segments[~catch_unknown(segments, incomplete, birds["event_id"])], study)
        events_year = events_year.iloc[:0] if unattributed else events_year
        parts = []
        for b in ((ON_WATER, IN_FLIGHT) if split else (None,)):
            seen = birds if b is None else birds[birds["behavior"] == b]
            z = zero_fill(events_year, seen[["event_id", "variable"]].assign(life_stage=pd.NA),
                          records.blocked, study, profile.protocol, [("count", "1")])
            parts.append(z.assign(behavior=b))
        zeros = pd.concat(parts, ignore_index=True)
        zeros = zeros.assign(variable_kind="taxon", zero_filled=True, flags=[()] * len(zeros),
                             source_record_rows=[()] * len(zeros), n_values=0)
        values = pd.concat([values, zeros], ignore_index=True)
        values["behavior"] = values["behavior"].astype("string")
        values["n_vessels"] = pd.NA
        continuous = (values["behavior"] == IN_FLIGHT).fillna(False).to_numpy() & (opening.rules.flying == "continuous")
        values["no_effort"] = continuous
        if continuous.any():
            values.loc[continuous, "flags"] = pd.Series(
                [(*f, "flying_not_snapshot") for f in values["flags"][continuous]], index=values.index[continuous], dtype=object)
        flags[STAGE_UNRESOLVED] = segments["event_id"].isin(stage_unresolved_events(
            birds.assign(life_stage=pd.Series(pd.NA, index=birds.index, dtype="string")), study,
            profile.protocol)).to_numpy()
        flags["counts_incomplete"] = segments["event_id"].isin(incomplete).to_numpy() | (unattributed > 0)
        segments["flags"] = flag_tuples(flags)
        return segments, values, notes



def _hide_observers(ev_raw: RawTable, rc_raw: RawTable, profile: Profile, study: Study) -> None:
    """Replace observer names in the raw rows (kept in quarantine) by their pseudonyms.

    The events column mapped to ``observer`` is replaced, and so is a column of the same
    name in the records file (some providers repeat the observer on every bird).
    """
    column = resolve_columns(ev_raw, fields("transect_events"), profile).get("observer")
    if column is None:
        return
    salt = study_salt(study.root)
    for table in (ev_raw, rc_raw):
        by_fold = {c.casefold(): c for c in table.frame.columns}
        actual = by_fold.get(column.casefold())
        if actual is not None:
            names = table.frame[actual].astype("string").str.strip().replace("", pd.NA)
            table.frame = table.frame.assign(**{actual: pseudonymise(names, salt).fillna("").astype(object)})


def _segments(
    ev: pd.DataFrame, observer_id: pd.Series, study: Study, rej: Rejections, rules: StripRules
) -> tuple[pd.DataFrame, dict[str, np.ndarray]]:
    """Validate segments and compute length, strip area, midpoint and midpoint time."""
    n = len(ev)
    pos = np.arange(n)
    alive = ~rej.mask("events", n)

    start, end, duration_h, alive = event_times(ev, rej, alive)
    zero_time = alive & (duration_h <= 0)
    rej.add("events", pos[zero_time], ReasonCode.BAD_EFFORT,
            "segment duration is 0: start and end times are equal; check the end time")
    alive &= ~zero_time

    track = Track.of(ev)
    have_end = track.have_end
    length_km = np.where(have_end, track.length_km, ev["length_km"].to_numpy(float))
    no_length = alive & ~np.isfinite(length_km)
    rej.add("events", pos[no_length], ReasonCode.MISSING_VALUE,
            "segment length cannot be computed: give end_lat and end_lon, or length_km")
    alive &= ~no_length
    zero_length = alive & (length_km <= 0)
    rej.add("events", pos[zero_length], ReasonCode.BAD_EFFORT,
            "segment length is 0: start and end positions are the same; check the end position")
    alive &= ~zero_length

    width = ev["strip_width_m"].to_numpy(float)
    width_default = ~np.isfinite(width)
    width = np.where(width_default, DEFAULT_STRIP_WIDTH_M, width)
    area = strip_area_km2(length_km, width)

    with np.errstate(invalid="ignore", divide="ignore"):
        speed_kn = length_km / KM_PER_NMI / duration_h
    fast = alive & np.isfinite(speed_kn) & (speed_kn > rules.max_speed_kn)
    rej.add("events", pos[fast], ReasonCode.IMPLAUSIBLE_SPEED,
            [f"the ship would have steamed at {v:.1f} knots ({d:.3f} km in {h * 60:.0f} min), faster than "
             f"{rules.max_speed_kn:g} knots; check positions, times and units"
             for v, d, h in zip(speed_kn[fast], length_km[fast], duration_h[fast], strict=True)])
    alive &= ~fast

    alive = reject_live_outside(study, track.lon, track.lat, alive, rej, "segment midpoint")

    event_end = end.where(end.notna(), add_hours(start, duration_h))
    midpoint_time = start + (event_end - start).fillna(pd.Timedelta(0)) / 2
    season, season_year = tag_season(midpoint_time, study.seasons, study.timezone)
    segments = pd.DataFrame({
        "event_id": ev["event_id"],
        "event_start": start,
        "event_end": event_end,
        "season": season,
        "season_year": season_year,
        "lat": track.lat,
        "lon": track.lon,
        # birds at the sea surface: a point depth of 0 falls in the study's top layer
        "depth_min_m": 0.0,
        "depth_max_m": 0.0,
        "bottom_depth_m": np.nan,
        "on_bottom": False,
        "effort": area,
        "effort_unit": "km2",
        "source_row": pos + 1,
        "observer_id": observer_id,
        **track.columns(),
    })[alive].reset_index(drop=True)
    return segments, {"length_given": (~have_end)[alive], "strip_width_default": width_default[alive],
                      "speed_unchecked": ~np.isfinite(speed_kn)[alive]}


def _bird_values(birds: pd.DataFrame) -> pd.DataFrame:
    """One count row per segment x taxon x behavior; several rows are summed."""
    keys = ["event_id", "variable", "behavior"]
    table = pa.Table.from_pandas(birds[[*keys, "count", "row"]], preserve_index=False)
    agg = table.group_by(keys, use_threads=False).aggregate(
        [("count", "sum"), ("row", "list"), ("row", "count")]).to_pandas()
    n = agg["row_count"].to_numpy()
    return pd.DataFrame({
        "event_id": agg["event_id"], "variable": agg["variable"], "life_stage": pd.NA,
        "behavior": agg["behavior"].astype("string"), "quantity": "count", "unit": "1",
        "value": agg["count_sum"].astype(float), "variable_kind": "taxon", "zero_filled": False,
        "flags": flag_tuples({"merged_rows": n > 1}), "source_record_rows": agg["row_list"], "n_values": n,
    })
