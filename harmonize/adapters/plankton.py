"""Plankton net tows: tows (events) and counts by taxon and life stage (records); effort = volume filtered.

Volume filtered V = R x k x A: flowmeter revolutions R times the rotor constant k (metres of
water per revolution, from calibration) times the mouth area A (pi d^2 / 4 for a round
mouth); or the volume the provider gives. Counts of a split subsample are raised by the
split fraction, so density (individuals per m3) = count / split / V, and individuals per m2
over the fished range = density x (depth_max - depth_min) (BCO-DMO parameter documentation
for net-tow volume and abundance; the method goes back to UNESCO 1968, Zooplankton sampling,
Monographs on Oceanographic Methodology 2, cited from memory). The tow's depth range is kept on every row so that
exports can compute per-m2 values, and the pipeline tags the depth layer from it.

Implausible tows go to quarantine: a volume that is not positive, a depth range upside
down, a distance through the water that no net covers in the tow's duration
(implausible_speed) and a clogged net as the profile's ``[clogging]`` section defines it.
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
    event_times,
    flag_tuples,
)
from harmonize.adapters.life_stages import normalise_life_stage
from harmonize.adapters.registry import register
from harmonize.adapters.zero_filling import (
    STAGE_UNRESOLVED,
    catch_unknown,
    stage_unresolved_events,
    target_years,
    zero_fill,
)
from harmonize.clock import add_hours
from harmonize.config_spec import Table, Value, number
from harmonize.errors import ConfigError, ReasonCode
from harmonize.profile import Profile
from harmonize.reading.quarantine import Rejections
from harmonize.study import Study
from harmonize.tagging import normalise_lon

#: Fastest plausible speed of a net through the water (m/s). Vertical hauls run at about
#: 0.5-1 m/s and oblique tows at 1.5-3 knots (0.8-1.5 m/s); high-speed samplers reach about
#: 5 knots (2.6 m/s) (common practice). A flowmeter distance faster than this over the tow's
#: duration is a misread counter, a wrong rotor constant or a wrong time.
MAX_NET_SPEED_M_S = 3.0

def mouth_area_m2(diameter_m: np.ndarray) -> np.ndarray:
    """Area of a round net mouth, A = pi d^2 / 4 (m2)."""
    d = np.asarray(diameter_m, dtype=float)
    return np.pi * d * d / 4.0


def volume_filtered_m3(flowmeter_revs: np.ndarray, m_per_rev: np.ndarray, mouth_area: np.ndarray) -> np.ndarray:
    """Volume of water filtered, V = revolutions x metres per revolution x mouth area (m3)."""
    return (np.asarray(flowmeter_revs, dtype=float) * np.asarray(m_per_rev, dtype=float)
            * np.asarray(mouth_area, dtype=float))


def raised_count(count: np.ndarray, split_fraction: np.ndarray) -> np.ndarray:
    """Count of the whole sample from the count of a split: count / split_fraction (blank = 1)."""
    split = np.asarray(split_fraction, dtype=float)
    return np.asarray(count, dtype=float) / np.where(np.isfinite(split), split, 1.0)


def individuals_per_m2(density_per_m3: np.ndarray, depth_min_m: np.ndarray, depth_max_m: np.ndarray) -> np.ndarray:
    """Individuals under one m2 of sea surface over the fished range: density x (depth_max - depth_min)."""
    return np.asarray(density_per_m3, float) * (np.asarray(depth_max_m, float) - np.asarray(depth_min_m, float))


@dataclass(frozen=True)
class TowRules:
    """The profile's rules for implausible and clogged tows (``[tow]`` and ``[clogging]``)."""

    max_speed_m_s: float = MAX_NET_SPEED_M_S
    clogged_values: frozenset[str] = frozenset()
    min_efficiency: float | None = None

    @classmethod
    def from_profile(cls, profile: Profile) -> TowRules:
        """Read ``[tow] max_speed_m_s`` and ``[clogging] status_values, min_efficiency``."""
        tow, clog = profile.section("tow"), profile.section("clogging")
        speed = tow.get("max_speed_m_s", MAX_NET_SPEED_M_S)
        if isinstance(speed, bool) or not isinstance(speed, int | float) or speed <= 0:
            raise ConfigError(profile.path, "tow.max_speed_m_s", f"expected a positive number of m/s, got {speed!r}")
        values = clog.get("status_values", [])
        if not isinstance(values, list) or not all(isinstance(v, str) and v.strip() for v in values):
            raise ConfigError(profile.path, "clogging.status_values",
                              f"expected a list of the net_status notes that mean a clogged net, e.g. [\"clogged\"], got {values!r}")
        eff = clog.get("min_efficiency")
        if eff is not None and (isinstance(eff, bool) or not isinstance(eff, int | float) or not 0 < eff <= 1):
            raise ConfigError(profile.path, "clogging.min_efficiency",
                              f"expected a filtration efficiency between 0 and 1 (e.g. 0.7), got {eff!r}")
        return cls(float(speed), frozenset(v.strip().casefold() for v in values),
                   float(eff) if eff is not None else None)


@register
class PlanktonAdapter(EventRecordAdapter):
    kind = "plankton"
    description = "Plankton net tows and their counts by taxon and life stage; effort = volume filtered (m3)."
    tables = {"events": "plankton_events", "records": "plankton_records"}
    effort_words = "volume of water filtered"
    effort_label = "volume filtered"
    default_protocol = "standard_plankton_net"
    display_order = 20
    joins_date_time = True
    event_word, record_word = "tow", "count"
    profile_sections = {
        "tow": Table({"max_speed_m_s": number("Faster distance through the water -> implausible_speed.",
                                              exclusive_minimum=0, default=3.0)}, "Tow plausibility."),
        "clogging": Table({
            "status_values": Value("array", "net_status notes that mean a clogged net.", items="string"),
            "min_efficiency": number("Lowest filtration efficiency (net / reference flowmeter distance).",
                                     exclusive_minimum=0, maximum=1),
        }, "Clogged-net rules."),
    }
    profile_example = """\
[tow]
# max_speed_m_s = 3.0         # faster distance through the water -> implausible_speed
[clogging]
# status_values = ["clogged"] # net_status notes that mean a clogged net
# min_efficiency = 0.7        # net flowmeter distance / reference flowmeter distance
"""

    def profile_rules(self, profile: Profile) -> TowRules:
        return TowRules.from_profile(profile)

    def validate_events(self, opening: Opening, study: Study) -> tuple[pd.DataFrame, dict[str, np.ndarray]]:
        return _tows(opening.ev, study, opening.rejections, opening.rules)

    def convert(self, opening: Opening, records: RecordCheck, tows: pd.DataFrame, flags: dict[str, np.ndarray],
                study: Study) -> tuple[pd.DataFrame, pd.DataFrame, list[str]]:
        profile = opening.profile
        rc = opening.rc
        taxon, rc_ok, incomplete, unattributed = records.taxon, records.kept, records.incomplete, records.unattributed
        stage = normalise_life_stage(rc["life_stage"])
        # A quarantined count row with no readable tow id (a malformed line, an empty id) may
        # belong to any tow: no tow's counts are known complete, so no absence is inferred.
        notes = [self.unattributed_note(opening.rc_raw.path.name, unattributed)] if unattributed else []

        counts = pd.DataFrame({
            "event_id": rc["event_id"][rc_ok],
            "variable": taxon[rc_ok],
            "life_stage": stage[rc_ok],
            "count": raised_count(rc["count"][rc_ok].to_numpy(float), rc["split_fraction"][rc_ok].to_numpy(float)),
            "observed": rc["count"][rc_ok].to_numpy(float),
            "split": rc["split_fraction"][rc_ok].fillna(1.0),
            "row": np.flatnonzero(rc_ok) + 1,
        })
        values = _count_values(counts)
        zeros = zero_fill(
            target_years(tows[~catch_unknown(tows, incomplete, counts["event_id"])], study)
            .iloc[:0 if unattributed else None],
            counts[["event_id", "variable", "life_stage"]], records.blocked, study, profile.protocol, [("count", "1")],
        )
        zeros = zeros.assign(variable_kind="taxon", zero_filled=True, flags=[()] * len(zeros),
                             source_record_rows=[()] * len(zeros), n_values=0)
        values = pd.concat([values, zeros], ignore_index=True)
        values["n_vessels"] = pd.NA
        flags[STAGE_UNRESOLVED] = tows["event_id"].isin(
            stage_unresolved_events(counts, study, profile.protocol)).to_numpy()
        flags["counts_incomplete"] = tows["event_id"].isin(incomplete).to_numpy() | (unattributed > 0)
        tows["flags"] = flag_tuples(flags)
        return tows, values, notes


def _tows(ev: pd.DataFrame, study: Study, rej: Rejections, rules: TowRules) -> tuple[pd.DataFrame, dict[str, np.ndarray]]:
    """Validate tows and compute mouth area, volume filtered and the tow's depth range."""
    n = len(ev)
    pos = np.arange(n)
    alive = ~rej.mask("events", n)

    start, end, duration_h, alive = event_times(ev, rej, alive, "time", "the tow's start time")

    dmin, dmax = ev["depth_min_m"].to_numpy(float), ev["depth_max_m"].to_numpy(float)
    upside = alive & (dmin > dmax)
    rej.add("events", pos[upside], ReasonCode.OUT_OF_RANGE,
            [f"depth_min_m {a:g} m is deeper than depth_max_m {b:g} m; the two depths may be swapped"
             for a, b in zip(dmin[upside], dmax[upside], strict=True)])
    alive &= ~upside

    given_area = ev["mouth_area_m2"].to_numpy(float)
    area = np.where(np.isfinite(given_area), given_area, mouth_area_m2(ev["mouth_diameter_m"].to_numpy(float)))
    revs, k = ev["flowmeter_revs"].to_numpy(float), ev["m_per_rev"].to_numpy(float)
    metered = np.isfinite(revs) & np.isfinite(k)
    given_volume = ev["volume_m3"].to_numpy(float)
    volume = np.where(metered, volume_filtered_m3(revs, k, area), given_volume)
    volume_given = ~metered & np.isfinite(given_volume)
    no_area = alive & metered & ~np.isfinite(area)
    rej.add("events", pos[no_area], ReasonCode.MISSING_VALUE,
            "the net's mouth size is missing: give mouth_area_m2 or mouth_diameter_m (a column or a [constants] value)")
    alive &= ~no_area
    no_volume = alive & ~np.isfinite(volume)
    rej.add("events", pos[no_volume], ReasonCode.MISSING_VALUE,
            "volume filtered cannot be computed: give flowmeter_revs with m_per_rev (rotor constant), or volume_m3")
    alive &= ~no_volume
    empty = alive & (volume <= 0)
    rej.add("events", pos[empty], ReasonCode.BAD_EFFORT,
            [f"volume filtered is {v:g} m3; a tow must filter a positive volume (check the flowmeter readings)"
             for v in volume[empty]])
    alive &= ~empty

    # distance through the water: from the flowmeter, or from a given volume and the mouth area
    with np.errstate(invalid="ignore", divide="ignore"):
        path_m = np.where(metered, revs * k, volume / area)
        speed = path_m / (duration_h * 3600.0)
    fast = alive & np.isfinite(speed) & (speed > rules.max_speed_m_s)
    rej.add("events", pos[fast], ReasonCode.IMPLAUSIBLE_SPEED,
            [f"the flowmeter gives {p:,.0f} m through the water in {h * 60:.0f} min ({s:.2f} m/s), faster than any "
             f"net is towed (> {rules.max_speed_m_s:g} m/s); check the revolutions, the rotor constant and the times"
             for p, h, s in zip(path_m[fast], duration_h[fast], speed[fast], strict=True)])
    alive &= ~fast

    if rules.clogged_values:
        status = ev["net_status"].str.strip().str.casefold()
        noted = alive & status.isin(rules.clogged_values).fillna(False).to_numpy()
        rej.add("events", pos[noted], ReasonCode.CLOGGED_NET,
                [f"net_status '{s}' marks a clogged net (profile [clogging] status_values); its volume and counts are unreliable"
                 for s in ev["net_status"][noted]])
        alive &= ~noted
    if rules.min_efficiency is not None:
        ref_k = ev["reference_m_per_rev"].to_numpy(float)
        ref_path = ev["reference_revs"].to_numpy(float) * np.where(np.isfinite(ref_k), ref_k, k)
        with np.errstate(invalid="ignore", divide="ignore"):
            efficiency = path_m / ref_path
        low = alive & np.isfinite(efficiency) & (efficiency < rules.min_efficiency)
        rej.add("events", pos[low], ReasonCode.CLOGGED_NET,
                [f"filtration efficiency {e:.2f} (net flowmeter {p:,.0f} m / reference flowmeter {r:,.0f} m) is below "
                 f"{rules.min_efficiency:g} (profile [clogging] min_efficiency): the net was clogging"
                 for e, p, r in zip(efficiency[low], path_m[low], ref_path[low], strict=True)])
        alive &= ~low

    lon, lat = normalise_lon(ev["lon"].to_numpy(float)), ev["lat"].to_numpy(float)
    alive = reject_live_outside(study, lon, lat, alive, rej, "station")

    event_end = end.where(end.notna(), add_hours(start, duration_h))
    tows = pd.DataFrame({
        "event_id": ev["event_id"],
        "event_start": start,
        "event_end": event_end,
        "lat": lat,
        "lon": lon,
        "depth_min_m": dmin,
        "depth_max_m": dmax,
        "bottom_depth_m": ev["bottom_depth_m"].to_numpy(float),
        "on_bottom": False,
        "effort": volume,
        "effort_unit": "m3",
        "source_row": pos + 1,
        "observer_id": pd.NA,
    })[alive].reset_index(drop=True)
    return tows, {"volume_given": volume_given[alive], "speed_unchecked": ~np.isfinite(speed)[alive]}


def _count_values(counts: pd.DataFrame) -> pd.DataFrame:
    """One count row per tow x taxon x life stage: raised counts of several rows are summed."""
    keys = ["event_id", "variable", "life_stage"]
    table = pa.Table.from_pandas(counts[[*keys, "count", "observed", "split", "row"]], preserve_index=False)
    agg = table.group_by(keys, use_threads=False).aggregate(
        [("count", "sum"), ("observed", "sum"), ("split", "min"), ("split", "max"), ("row", "list"),
         ("row", "count")]).to_pandas()
    n, min_split, max_split = agg["row_count"].to_numpy(), agg["split_min"].to_numpy(float), agg["split_max"].to_numpy(float)
    raised, observed = agg["count_sum"].to_numpy(float), agg["observed_sum"].to_numpy(float)
    mixed = min_split != max_split
    # rows of one split keep it; rows of several splits summed keep the share they add up to
    with np.errstate(invalid="ignore", divide="ignore"):
        fraction = np.where(mixed, observed / raised, min_split)
    return pd.DataFrame({
        "event_id": agg["event_id"], "variable": agg["variable"], "life_stage": agg["life_stage"].astype("string"),
        "quantity": "count", "unit": "1", "value": raised, "variable_kind": "taxon",
        "zero_filled": False, "flags": flag_tuples({"merged_rows": n > 1, "raised_from_subsample": min_split < 1,
                                                    "mixed_subsample_fractions": mixed}),
        "source_record_rows": agg["row_list"], "n_values": n,
        "count_observed": observed, "subsample_fraction": np.where(np.isfinite(fraction), fraction, np.nan),
    })
