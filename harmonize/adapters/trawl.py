"""Bottom-trawl surveys: hauls (events) and catch by taxon (records); effort = area swept.

Area swept a = D x w: distance towed times the effective net width (the swept-area method,
Sparre and Venema 1998, FAO Fisheries Technical Paper 306/1 Rev. 2, section 13.5). The
distance is the logged distance when the provider gives one (flag distance_logged; a straight
line between the positions that differs from it by more than 10 % is flagged
distance_disagrees); otherwise the WGS84 geodesic between start and end positions
(:func:`harmonize.geodesy.track_geometry`, Karney 2013); without either, speed x duration.
"""

from __future__ import annotations

from collections.abc import Iterator

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
from harmonize.adapters.life_stages import normalise_life_stage
from harmonize.adapters.registry import register
from harmonize.adapters.value_source import ValueSource
from harmonize.adapters.zero_filling import (
    STAGE_UNRESOLVED,
    catch_unknown,
    stage_unresolved_events,
    target_years,
    zero_fill,
)
from harmonize.clock import add_hours
from harmonize.contract import fields
from harmonize.errors import ReasonCode
from harmonize.geodesy import KM_PER_NMI
from harmonize.membership import codes_in, distinct_present, is_in
from harmonize.memory import release_free_memory
from harmonize.reading.fields import resolve_columns
from harmonize.reading.quarantine import Rejections
from harmonize.study import Study

#: Towing speeds outside this window (knots) are not a survey tow. Standard survey tows run
#: at 3-4 knots (common practice); the window is wide on purpose.
TOW_SPEED_KN = (0.5, 8.0)
#: A straight start-end line that differs from the logged distance by more than this share of
#: the logged distance is flagged: a tow that turned, a wrong position or a wrong log (common
#: practice; survey tows are run straight, so a few percent is usual).
DISTANCE_TOLERANCE = 0.10
DISTANCE_LOGGED, DISTANCE_DISAGREES = "distance_logged", "distance_disagrees"


def area_swept_km2(distance_km: np.ndarray, net_width_m: np.ndarray) -> np.ndarray:
    """Swept area a = D x w, in km2 (Sparre and Venema 1998, section 13.5).

    Values too large for a float give inf (no warning): the plausibility checks quarantine
    the distance or width behind them."""
    with np.errstate(over="ignore"):
        return np.asarray(distance_km, float) * np.asarray(net_width_m, float) / 1000.0


@register
class TrawlAdapter(EventRecordAdapter):
    kind = "trawl"
    description = "Bottom-trawl hauls and their catch by taxon; effort = area swept (km2)."
    tables = {"events": "trawl_events", "records": "trawl_records"}
    effort_words = "area swept by the net"
    effort_label = "area swept"
    default_protocol = "standard_bottom_trawl"
    reads_in_blocks = ("records",)  # a catch file may hold millions of rows
    display_order = 10
    joins_date_time = True
    event_word, record_word = "haul", "catch"
    records_called, incomplete_flag = "catch", "catch_incomplete"
    profile_starter = """\
#:schema ../schemas/profile-trawl.schema.json
# A profile maps one provider's files onto the trawl adapter's fields.
# Fields not listed under [columns.*] are looked for under their own names.

[source]
id = "my_trawl_survey"        # unique in the study
kind = "trawl"
provider_type = "agency"      # agency | volunteer | industry | model | remote_sensing
protocol = "standard_bottom_trawl"   # key into targets.csv: which taxa a haul always records
timezone = "UTC"              # zone of times written without an offset

[columns.events]              # hauls: adapter field = your column name
event_id = "haul_id"
start_time = "start_time"
end_time = "end_time"
start_lat = "start_lat"
start_lon = "start_lon"
end_lat = "end_lat"
end_lon = "end_lon"
net_width_m = "net_width_m"
bottom_depth_m = "bottom_depth_m"

[columns.records]             # catch rows
event_id = "haul_id"
taxon = "species"
weight = "weight_kg"
count = "number"

[units]                       # provider units, when not the defaults (km, m, h, kg, knots, degC)
# bottom_depth_m = "fathom"
# weight = "g"

[constants]                   # a value for every row when the files lack it
# net_width_m = 17.0

[formats]                     # how your files write a field, when not as decimal numbers
# start_lat = "degrees_minutes"          # 41°50.159'N, 41 50.159 N, -41 50.159
# start_lon = "degrees_minutes_seconds"  # 153°02'30"W, 153 02 30 W
# date and time in two columns: in [columns.events] write start_time = ["DATE", "TIME"]
"""

    def validate_events(self, opening: Opening, study: Study) -> tuple[pd.DataFrame, dict[str, np.ndarray]]:
        return self._hauls(opening.ev, study, opening.rejections)

    def reject_records(self, rc: pd.DataFrame, alive: np.ndarray, rejections: Rejections) -> None:
        no_quantity = alive & rc["weight"].isna().to_numpy() & rc["count"].isna().to_numpy()
        rejections.add("records", np.flatnonzero(no_quantity), ReasonCode.MISSING_VALUE,
                       "catch row has neither a weight nor a count")

    def convert(self, opening: Opening, records: RecordCheck, hauls: pd.DataFrame, flags: dict[str, np.ndarray],
                study: Study) -> tuple[pd.DataFrame, pd.DataFrame, list[str]]:
        profile = opening.profile
        ev_raw, rc_raw, rc, rej = opening.ev_raw, opening.rc_raw, opening.rc, opening.rejections
        taxon, rc_ok, blocked, unattributed = records.taxon, records.kept, records.blocked, records.unattributed
        records.taxon = None  # the catch rows' taxa are copied below: free them once used
        # a quarantined catch row of a live haul leaves that haul's catch incomplete
        incomplete = set(records.incomplete)
        # A quarantined catch row with no readable haul id (a malformed line, an empty id)
        # may belong to any haul: no haul's catch is known complete, so no absence is inferred.
        notes = []
        if unattributed:
            incomplete = set(hauls["event_id"])
            notes.append(self.unattributed_note(rc_raw.path.name, unattributed))

        # the catch rows that stay, with haul, taxon and life stage as integer codes
        # (taken by position from codes and numpy arrays: a masked pandas Series would copy
        # an index of the table's length for each column)
        kept_at = np.flatnonzero(rc_ok)
        catch = pd.DataFrame({
            "event_id": _take_categorical(rc["event_id"], kept_at),
            "variable": _present_categories(pd.Series(_take_categorical(taxon, kept_at))),
            "life_stage": _folded_categorical(pd.Series(_take_categorical(rc["life_stage"], kept_at))),
            "weight": rc["weight"].to_numpy(float)[kept_at],
            "count": rc["count"].to_numpy(float)[kept_at],
            "row": (kept_at + 1).astype(np.int32 if len(rc_ok) < 2**31 else np.int64),  # 1-based file rows
        }, copy=False)  # (a copy would consolidate the float columns: ~20 bytes per row more at the peak)
        del kept_at
        # the typed catch table is not needed once its kept rows are coded: free it
        del taxon, rc
        opening.rc = None  # type: ignore[assignment]
        release_free_memory()
        if unattributed:
            # a haul none of whose catch rows could be read has no known catch at all (not
            # even "nothing caught"): it is quarantined rather than stored without its catch
            unknown_catch = ~is_in(hauls["event_id"], distinct_present(catch["event_id"]))
            rej.add("events", hauls["source_row"].to_numpy()[unknown_catch] - 1, ReasonCode.MISSING_VALUE,
                    f"none of this haul's catch rows could be read, and {unattributed} catch row(s) in "
                    f"{rc_raw.path.name} have no readable haul id, so its catch is unknown; fix the catch "
                    "file and ingest again with --replace")
            flags = {name: mask[~unknown_catch] for name, mask in flags.items()}
            hauls = hauls[~unknown_catch].reset_index(drop=True)
        # every rejection is known: only the rejected rows' text is needed (for the quarantine)
        for table in (ev_raw, rc_raw):
            table.keep_only(rej.mask(table.role, table.n_rows))
        haul_ids = pd.Index(hauls["event_id"])
        # (``cat.set_categories`` over a million haul ids held several per-row copies at once)
        catch["event_id"] = pd.Categorical.from_codes(codes_in(catch["event_id"], haul_ids).astype(np.int32),
                                                      categories=haul_ids)
        # the protocol records the quantities the catch file has a column for
        provided = resolve_columns(rc_raw, fields("trawl_records"), profile)
        quantities = [(q, u) for q, u, col in (("biomass", "kg", "weight"), ("count", "1", "count"))
                      if col in provided or col in profile.constants]
        zero_events = target_years(hauls[~catch_unknown(hauls, list(incomplete), catch["event_id"])], study) \
            .iloc[:0 if unattributed else None]
        unresolved = set(stage_unresolved_events(catch, study, profile.protocol))
        values = TrawlValues(catch, haul_ids, hauls["bottom_temperature"].to_numpy(dtype=float, na_value=np.nan),
                             zero_events,
                             blocked, study, profile.protocol, quantities)
        del catch

        # one tuple per distinct combination of flags, shared by the hauls that have it
        hauls["flags"] = flag_tuples({**flags, STAGE_UNRESOLVED: is_in(hauls["event_id"], list(unresolved)),
                                      "catch_incomplete": is_in(hauls["event_id"], list(incomplete))})
        n_disagree = int(flags[DISTANCE_DISAGREES].sum())
        if n_disagree:
            notes.append(f"{ev_raw.path.name}: {n_disagree} haul(s) have a logged distance and a straight "
                         f"start-end line that differ by more than {DISTANCE_TOLERANCE:.0%}; the logged distance "
                         f"is used (flag {DISTANCE_DISAGREES}): check their positions and logs")
        return hauls.drop(columns=["bottom_temperature"]), values, notes

    @staticmethod
    def _hauls(ev: pd.DataFrame, study: Study, rej: Rejections) -> tuple[pd.DataFrame, dict[str, np.ndarray]]:
        """Validate hauls and compute distance, duration, area swept and the tow midpoint;
        returns the accepted hauls and their flags (flag -> mask over them)."""
        n = len(ev)
        pos = np.arange(n)
        start, end, duration_h, alive = event_times(ev, rej, ~rej.mask("events", n))
        zero_time = alive & (duration_h <= 0)
        rej.add("events", pos[zero_time], ReasonCode.BAD_EFFORT, "tow duration is 0; start and end times are equal")
        alive &= ~zero_time

        track = Track.of(ev)
        have_end, geo_km = track.have_end, track.length_km
        logged_km = ev["distance"].to_numpy(float)
        logged = np.isfinite(logged_km)
        speed_kn = ev["speed"].to_numpy(float)
        derived_km = speed_kn * KM_PER_NMI * duration_h
        # a logged distance follows the tow's real track; the straight line between start and
        # end positions cuts every turn short, so the log wins when both are given
        distance_km = np.where(logged, logged_km, np.where(have_end, geo_km, derived_km))
        speed_derived = ~have_end & ~logged & np.isfinite(derived_km)
        with np.errstate(invalid="ignore"):
            disagrees = logged & have_end & (np.abs(geo_km - logged_km) > DISTANCE_TOLERANCE * logged_km)
        no_distance = alive & ~np.isfinite(distance_km)
        rej.add("events", pos[no_distance], ReasonCode.MISSING_VALUE,
                "distance towed cannot be computed: give end_lat/end_lon, a distance, or speed and duration")
        alive &= ~no_distance

        width_m = ev["net_width_m"].to_numpy(float)
        area_km2 = area_swept_km2(distance_km, width_m)
        zero_area = alive & (area_km2 <= 0)
        rej.add("events", pos[zero_area], ReasonCode.BAD_EFFORT,
                ["area swept is 0: the logged distance is 0; check the distance column" if lg else
                 "area swept is 0: start and end positions are the same; check the end position"
                 for lg in logged[zero_area]])
        alive &= ~zero_area
        with np.errstate(invalid="ignore", divide="ignore"):
            tow_speed = distance_km / KM_PER_NMI / duration_h
        lo, hi = TOW_SPEED_KN
        bad_speed = alive & np.isfinite(tow_speed) & ((tow_speed < lo) | (tow_speed > hi))
        rej.add("events", pos[bad_speed], ReasonCode.IMPLAUSIBLE_SPEED,
                [f"towing speed {v:.2f} knots ({d:.3f} km in {h * 60:.0f} min) is outside {lo:g}-{hi:g} knots; "
                 "check positions, times and units" for v, d, h in
                 zip(tow_speed[bad_speed], distance_km[bad_speed], duration_h[bad_speed], strict=True)])
        alive &= ~bad_speed
        alive = reject_live_outside(study, track.lon, track.lat, alive, rej, "tow midpoint")

        gear = ev["gear_depth_m"].to_numpy(float)
        bottom = ev["bottom_depth_m"].to_numpy(float)
        on_bottom = ~np.isfinite(gear)
        depth = np.where(on_bottom, bottom, gear)
        safe_h = np.where(alive & np.isfinite(duration_h), duration_h, 0.0)
        event_end = end.where(end.notna(), add_hours(start, safe_h))
        hauls = pd.DataFrame({
            "event_id": ev["event_id"],
            "event_start": start,
            "event_end": event_end,
            "lat": track.lat,
            "lon": track.lon,
            "depth_min_m": depth,
            "depth_max_m": depth,
            "bottom_depth_m": bottom,
            "on_bottom": on_bottom,
            "effort": area_km2,
            "effort_unit": "km2",
            "source_row": pos + 1,
            "observer_id": pd.NA,
            **track.columns(),
            "bottom_temperature": ev["bottom_temperature"],
        })[alive].reset_index(drop=True)
        # the flags of each accepted haul, as masks (in the order they are listed)
        return hauls, {"speed_derived": speed_derived[alive], DISTANCE_LOGGED: logged[alive],
                       DISTANCE_DISAGREES: disagrees[alive], "speed_unchecked": ~np.isfinite(tow_speed)[alive]}


def _catch_values(catch: pd.DataFrame) -> pd.DataFrame:
    """Long rows (biomass, count) per haul x taxon x life stage; several rows are summed.

    Key columns may be text or categoricals; groups are numbered from integer codes (nulls
    are a group of their own) in order of first appearance, and the key columns of the
    result keep their dtype. Lists (rows, flags) are Arrow list columns, not Python lists.
    """
    keys = ["event_id", "variable", "life_stage"]
    # one integer code per group, then numpy reductions: a pandas groupby over three string
    # keys with Python aggregations was the slowest step of a large trawl ingest
    combined = np.zeros(len(catch), dtype=np.int64)
    for key in keys:
        code, width = _key_codes(catch[key])
        combined = combined * width + code
    codes, _ = pd.factorize(combined)
    codes = codes.astype(np.int64)
    n_groups = int(codes.max()) + 1 if codes.size else 0
    first = np.full(n_groups, codes.size, dtype=np.int64)
    np.minimum.at(first, codes, np.arange(codes.size))
    n = np.bincount(codes, minlength=n_groups)
    # rows of each group in file order, as one list per group (built by Arrow, not in Python)
    order = np.argsort(codes, kind="stable")
    offsets = np.concatenate([[0], np.cumsum(n)]).astype(np.int64)
    rows = pa.ListArray.from_arrays(pa.array(offsets.astype(np.int32)), pa.array(catch["row"].to_numpy(np.int64)[order]))
    head = catch.iloc[first][keys].reset_index(drop=True)

    def total(col: str) -> np.ndarray:
        v = catch[col].to_numpy(float)
        seen = np.bincount(codes, weights=~np.isnan(v), minlength=n_groups) > 0
        sums = np.bincount(codes, weights=np.nan_to_num(v), minlength=n_groups)
        return np.where(seen, sums, np.nan)  # min_count=1: a group without any value stays null

    parts = []
    for quantity, unit, col in (("biomass", "kg", "weight"), ("count", "1", "count")):
        value = total(col)
        keep = np.flatnonzero(~np.isnan(value))
        part = head.iloc[keep].reset_index(drop=True)
        parts.append(part.assign(
            quantity=_constant(quantity, keep.size), unit=_constant(unit, keep.size), value=value[keep],
            variable_kind=_constant("taxon", keep.size), zero_filled=False,
            flags=_arrow_series(_merged_flags(n[keep] > 1)),
            source_record_rows=_arrow_series(rows.take(pa.array(keep))),
            n_values=n[keep], no_effort=False,
        ))
    return pd.concat(parts, ignore_index=True)


def _key_codes(column: pd.Series) -> tuple[np.ndarray, int]:
    """Integer code of each value (0 = null) and the number of codes, for a grouping key."""
    if isinstance(column.dtype, pd.CategoricalDtype):
        return column.cat.codes.to_numpy().astype(np.int64) + 1, len(column.cat.categories) + 1
    code, uniques = pd.factorize(column, use_na_sentinel=True)
    return code.astype(np.int64) + 1, len(uniques) + 1


def _take_categorical(values: pd.Series, at: np.ndarray) -> pd.Categorical:
    """``pd.Categorical(values.iloc[at])`` keeping every category of a categorical ``values``."""
    cat = values.array if isinstance(values.dtype, pd.CategoricalDtype) else pd.Categorical(values)
    return pd.Categorical.from_codes(cat.codes[at], dtype=cat.dtype)


def _present_categories(values: pd.Series) -> pd.Categorical:
    """``pd.Categorical(values)``: the sorted distinct values present as categories; by category
    when ``values`` is already categorical (no text per row)."""
    if not isinstance(values.dtype, pd.CategoricalDtype):
        return pd.Categorical(values)
    present = values.cat.remove_unused_categories()
    return pd.Categorical(present.cat.reorder_categories(sorted(present.cat.categories)))


def _folded_categorical(text: pd.Series) -> pd.Categorical:
    """Life stages normalised (:func:`~harmonize.adapters.life_stages.normalise_life_stage`) as a
    categorical: each distinct text is normalised once."""
    if isinstance(text.dtype, pd.CategoricalDtype):  # by category: no text per row
        present = text.cat.remove_unused_categories()
        folded = pd.Categorical(normalise_life_stage(pd.Series(present.cat.categories, dtype="string")))
        per_category = np.append(folded.codes, -1)
        codes = present.cat.codes.to_numpy()
        return pd.Categorical.from_codes(per_category[np.where(codes < 0, len(per_category) - 1, codes)],
                                         dtype=folded.dtype)
    code, uniques = pd.factorize(text, use_na_sentinel=True)
    folded = pd.Categorical(normalise_life_stage(pd.Series(uniques, dtype="string")))
    per_unique = np.append(folded.codes, -1)
    return pd.Categorical.from_codes(per_unique[np.where(code < 0, len(per_unique) - 1, code)],
                                     dtype=folded.dtype)


def _arrow_series(array: pa.Array) -> pd.Series:
    """An Arrow array (e.g. a list column) as a pandas Series, without Python objects per row."""
    return pd.Series(pd.arrays.ArrowExtensionArray(array))


def _merged_flags(merged: np.ndarray) -> pa.Array:
    """["merged_rows"] where a value sums several catch rows, [] elsewhere (an Arrow list column)."""
    offsets = np.concatenate([[0], np.cumsum(merged)]).astype(np.int32)
    return pa.ListArray.from_arrays(pa.array(offsets), pa.repeat(pa.scalar("merged_rows"), int(merged.sum())))


def _no_lists(n: int, value_type: pa.DataType) -> pa.Array:
    """``n`` empty lists (an Arrow list column)."""
    return pa.ListArray.from_arrays(pa.array(np.zeros(n + 1, dtype=np.int32)), pa.array([], value_type))


def _zero_values(events: pd.DataFrame, caught: pd.DataFrame, blocked: pd.DataFrame, study: Study,
                 protocol: str | None, quantities: list[tuple[str, str]], haul_ids: pd.Index) -> pd.DataFrame:
    """Inferred zeros (:func:`~harmonize.adapters.zero_filling.zero_fill`) with categorical haul ids
    and the value columns as Arrow arrays."""
    zeros = zero_fill(events, caught, blocked, study, protocol, quantities, event_categories=haul_ids)
    n = len(zeros)
    return zeros.assign(
        variable_kind=_constant("taxon", n), zero_filled=True,
        flags=_arrow_series(_no_lists(n, pa.string())),
        source_record_rows=_arrow_series(_no_lists(n, pa.int64())),
        n_values=np.zeros(n, dtype=np.int64), no_effort=False,
    )


def _concat_values(parts: list[pd.DataFrame]) -> pd.DataFrame:
    """Concatenate value frames; text columns become categoricals sharing their categories
    (recoded through the few categories, not row by row as text)."""
    parts = [p for p in parts if len(p)] or parts[:1]
    for col in ("event_id", "variable", "life_stage", "quantity", "unit", "variable_kind"):
        cats = [p[col] if isinstance(p[col].dtype, pd.CategoricalDtype) else p[col].astype("category")
                for p in parts]
        if col == "event_id" and isinstance(parts[0][col].dtype, pd.CategoricalDtype):
            union = parts[0][col].cat.categories  # the hauls, shared by every part
        else:
            union = pd.Index(pd.unique(np.concatenate([c.cat.categories.to_numpy(dtype=object) for c in cats])),
                             dtype=object) if cats else pd.Index([], dtype=object)
        for p, c in zip(parts, cats, strict=True):
            if c.cat.categories is union:
                continue
            to_union = np.append(union.get_indexer(c.cat.categories.astype(object)), -1)
            codes = c.cat.codes.to_numpy()
            p[col] = pd.Categorical.from_codes(to_union[np.where(codes < 0, len(to_union) - 1, codes)],
                                               categories=union)
    return pd.concat(parts, ignore_index=True)


def _constant(text: str, n: int) -> pd.Categorical:
    """``n`` rows of one text, as a categorical (no text per row)."""
    return pd.Categorical.from_codes(np.zeros(n, dtype=np.int8), categories=pd.Index([text], dtype=object))


def _temperature_values(hauls: pd.DataFrame, haul_ids: pd.Index) -> pd.DataFrame:
    """Bottom temperature measured at the haul, as a physical variable (CF standard name)."""
    t = hauls[hauls["bottom_temperature"].notna()]
    n = len(t)
    return pd.DataFrame({
        "event_id": pd.Categorical.from_codes(haul_ids.get_indexer(t["event_id"]), categories=haul_ids),
        "variable": _constant("sea_water_temperature_at_sea_floor", n),
        "variable_kind": _constant("physical", n),
        "life_stage": pd.Categorical.from_codes(np.full(n, -1, dtype=np.int8), categories=pd.Index([], dtype=object)),
        "quantity": _constant("measurement", n),
        "value": t["bottom_temperature"].to_numpy(float), "unit": _constant("degC", n), "zero_filled": False,
        "flags": _arrow_series(_no_lists(n, pa.string())),
        "source_record_rows": _arrow_series(_no_lists(n, pa.int64())),
        "n_values": np.ones(n, dtype=np.int64), "no_effort": True,
    })


class TrawlValues(ValueSource):
    """The values of a trawl ingest (catch sums, inferred zeros, bottom temperatures), made a
    run of hauls at a time from the integer-coded catch rows.

    Holding the catch rows as codes costs about 30 bytes per row; the values they become
    (about 2.5 per catch row, each with its lists of source rows and flags) would cost
    several times that, and were the largest part of a large ingest's memory.

    Parameters
    ----------
    catch
        The accepted catch rows in file order: event_id (categorical over ``haul_ids``),
        variable, life_stage (categoricals), weight, count, row (1-based file row).
    haul_ids
        The accepted hauls' ids, in the order of the output's events.
    temperature
        Bottom temperature of each haul (NaN: none), in the same order.
    zero_events
        event_id and year of the hauls that get inferred zeros (:func:`target_years`).
    blocked, study, protocol, quantities
        As :func:`~harmonize.adapters.zero_filling.zero_fill`.
    """

    def __init__(self, catch: pd.DataFrame, haul_ids: pd.Index, temperature: np.ndarray,
                 zero_events: pd.DataFrame, blocked: pd.DataFrame, study: Study, protocol: str | None,
                 quantities: list[tuple[str, str]]) -> None:
        self.catch = catch
        self.haul_ids = haul_ids
        self.temperature = temperature
        # the haul (position) of each catch row; -1 for none (then no event: the pipeline refuses it)
        self.catch_haul = catch["event_id"].cat.codes.to_numpy()
        self.zero_events = zero_events.reset_index(drop=True)
        self.zero_haul = haul_ids.get_indexer(zero_events["event_id"])
        # plain text: the few blocked pairs are looked up in every run
        self.blocked = blocked.astype({"event_id": object, "variable": object})
        self.study, self.protocol, self.quantities = study, protocol, quantities

    def blocks(self, order: np.ndarray, rows: int) -> Iterator[tuple[np.ndarray, pd.DataFrame]]:
        n = len(self.haul_ids)
        if n == 0:
            values = self.frame()
            yield np.full(len(values), -1, dtype=np.int64), values
            return
        order = np.asarray(order, dtype=np.int64)
        rank = np.empty(n, dtype=np.int64)
        rank[order] = np.arange(n)
        # each catch row's haul by its place in ``order``; a row without a haul (none is
        # expected: the pipeline refuses values without an event) goes with the last run
        # (4-byte integers: these arrays are per catch row, millions of them)
        catch_rank = np.where(self.catch_haul >= 0, rank[np.maximum(self.catch_haul, 0)], n).astype(np.int32)
        zero_rank = rank[self.zero_haul]
        # runs of hauls of about ``rows`` values: two per catch row (biomass and count), the
        # protocol's zeros and a temperature per haul, roughly
        per_rank = np.bincount(catch_rank, minlength=n + 1)
        per_haul = (per_rank[:n] * 2 + 2 * len(self.quantities) + 1)[order]
        run = (np.cumsum(per_haul) - per_haul) // max(rows, 1)
        cuts = np.concatenate([[0], np.flatnonzero(np.diff(run)) + 1, [n]])
        by_rank = np.argsort(catch_rank, kind="stable").astype(np.int32)
        del catch_rank
        # the catch rows of ranks lo..hi-1 are by_rank[starts[lo]:starts[hi]]; the last run
        # also takes rows without a haul (rank n)
        starts = np.concatenate([[0], np.cumsum(per_rank)])[cuts]
        starts[-1] = len(by_rank)
        for (lo, hi), (a, b) in zip(zip(cuts[:-1], cuts[1:], strict=True),
                                    zip(starts[:-1], starts[1:], strict=True), strict=True):
            in_run = np.zeros(n, dtype=bool)
            in_run[order[lo:hi]] = True
            values = self._values(self.catch.iloc[np.sort(by_rank[a:b])],
                                  self.zero_events.iloc[np.flatnonzero((zero_rank >= lo) & (zero_rank < hi))], in_run)
            # each value's haul: the run's haul ids are its categories, in the hauls' order
            codes = values["event_id"].cat.codes.to_numpy()
            yield np.where(codes >= 0, np.flatnonzero(in_run)[np.maximum(codes, 0)], -1), values

    def frame(self) -> pd.DataFrame:
        return self._values(self.catch, self.zero_events, np.ones(len(self.haul_ids), dtype=bool))

    def _values(self, catch: pd.DataFrame, zero_events: pd.DataFrame, hauls: np.ndarray) -> pd.DataFrame:
        """Catch sums of ``catch``, zeros of ``zero_events`` and the temperatures of the hauls in the mask."""
        # haul ids as categories of this run's hauls only: every step after this one looks
        # up categories, and the run's are a few thousand where the file's are a million
        in_run = np.flatnonzero(hauls)
        run_ids = self.haul_ids[in_run]
        local = np.full(len(self.haul_ids) + 1, -1, dtype=np.int64)
        local[in_run] = np.arange(in_run.size)
        catch = catch.assign(event_id=pd.Categorical.from_codes(local[catch["event_id"].cat.codes.to_numpy()],
                                                                categories=run_ids))
        values = _catch_values(catch)
        zeros = _zero_values(zero_events, catch[["event_id", "variable", "life_stage"]], self.blocked, self.study,
                             self.protocol, self.quantities, run_ids)
        measured = hauls & np.isfinite(self.temperature)
        temps = _temperature_values(pd.DataFrame({"event_id": self.haul_ids[measured],
                                                  "bottom_temperature": self.temperature[measured]}), run_ids)
        values = _concat_values([values, zeros, temps])
        values["n_vessels"] = pd.Series(pd.NA, index=values.index, dtype="Int32")
        return values
