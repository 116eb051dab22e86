"""Volunteer and opportunistic records: complete checklists (effort in hours) and incidental sightings.

A *complete checklist* reports every taxon the observer could identify during a timed watch,
so a target taxon missing from it is a genuine zero and the hours observed are its effort.
An *incidental* record (or a checklist that is not complete) says only that a taxon was
present: it is stored as quantity "presence" with value 1, no effort, no density and never
any zero. This is the distinction community-science analyses rest on (Johnston et al. 2021,
"Analytical guidelines to increase the value of community science data: an example using
eBird data to estimate species distributions", Diversity and Distributions 27:1265-1277).

Input is one table (CSV/TSV/parquet), a plain Darwin Core occurrence table or a Darwin Core
Archive (see :mod:`harmonize.adapters.darwin_core`); Darwin Core term names map onto the
fields without a profile [columns] section.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping
from pathlib import Path

import numpy as np
import pandas as pd

from harmonize.adapters import darwin_core
from harmonize.adapters.base import Adapter, AdapterOutput, ProgressCallback, finish
from harmonize.adapters.domain import reject_outside_domain
from harmonize.adapters.life_stages import normalise_life_stage
from harmonize.adapters.registry import register
from harmonize.adapters.zero_filling import (
    STAGE_UNRESOLVED,
    stage_unresolved_events,
    target_years,
    zero_fill,
)
from harmonize.clock import add_hours, parse_times
from harmonize.config_spec import Table, Value, number, text
from harmonize.contract import fields
from harmonize.errors import ConfigError, ReasonCode, short_text
from harmonize.privacy import pseudonymise, study_salt
from harmonize.profile import Profile
from harmonize.reading.fields import NA_TOKENS, coerce_fields, resolve_columns
from harmonize.reading.quarantine import Rejections, reject_repeated_ids
from harmonize.reading.taxa import resolve_taxa
from harmonize.reading.text import RawTable, read_table
from harmonize.study import Study
from harmonize.tagging import normalise_lon
from harmonize.twin_windows import twin_settings

SCHEMA = "opportunistic_rows"
#: Checklists longer than 5 h or 5 km are flagged "long_effort": analyses of checklist data
#: commonly keep only shorter ones (Johnston et al. 2021, cited above; thresholds from memory).
LONG_EFFORT_H = 5.0
LONG_ROUTE_KM = 5.0
#: Records dated before this are refused unless the profile sets [plausibility] earliest
#: (typed years such as 0019 or 1019; common practice).
DEFAULT_EARLIEST = "1900-01-01"
#: The word that means "present, not counted" when the profile names no other: ours, and plain
#: English. A provider's own marker is mapped with [presence] tokens in the profile.
DEFAULT_PRESENCE_TOKENS = ("present",)
_STATUS = {"present": True, "detected": True, "absent": False, "notdetected": False, "not detected": False}
_EFFORT_UNITS_H = {"min": 1 / 60, "mins": 1 / 60, "minute": 1 / 60, "minutes": 1 / 60, "h": 1.0,
                   "hr": 1.0, "hrs": 1.0, "hour": 1.0, "hours": 1.0}


def parse_counts(
    text: pd.Series, presence_tokens: tuple[str, ...] = DEFAULT_PRESENCE_TOKENS
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Counts from text: a number, or empty / a presence token for present-not-counted.

    Parameters
    ----------
    text
        The count column as text.
    presence_tokens
        Markers meaning "present, not counted" (compared without case and surrounding blanks).

    Returns (count as float with NaN where not counted, not-a-count mask, not-whole mask).
    Negative numbers are returned as numbers; the caller rejects them.
    """
    t = text.astype("string").str.strip()
    folded = t.str.casefold()
    tokens = [tok.strip().casefold() for tok in presence_tokens]
    blank = (t.isna() | folded.isin(NA_TOKENS) | folded.isin(tokens)).to_numpy()
    values = pd.to_numeric(t.mask(blank), errors="coerce").to_numpy(dtype=float, na_value=np.nan)
    bad = ~blank & np.isnan(values)
    fractional = np.isfinite(values) & (values % 1 != 0)
    return values, bad, fractional


def parse_effort_text(text: pd.Series) -> np.ndarray:
    """Hours from free-text sampling effort ("90 minutes", "2 h", "PT1H30M"); NaN otherwise."""
    t = text.astype("string").str.strip()
    simple = t.str.extract(r"^(?P<n>\d+(?:\.\d+)?)\s*(?P<u>[A-Za-z]+)$")
    factor = simple["u"].str.casefold().map(_EFFORT_UNITS_H).astype(float)
    hours = pd.to_numeric(simple["n"], errors="coerce").astype(float) * factor
    iso = t.str.extract(r"^PT(?:(?P<h>\d+(?:\.\d+)?)H)?(?:(?P<m>\d+(?:\.\d+)?)M)?$")
    iso_h = (pd.to_numeric(iso["h"], errors="coerce").astype(float).fillna(0)
             + pd.to_numeric(iso["m"], errors="coerce").astype(float).fillna(0) / 60)
    iso_h = iso_h.where(iso["h"].notna() | iso["m"].notna())
    return hours.fillna(iso_h).to_numpy(dtype=float, na_value=np.nan)


def checklist_signatures(keys: pd.Series, parts: pd.DataFrame) -> pd.DataFrame:
    """An order-free content signature per checklist: (key, n_rows, hash sum).

    Two checklists with the same observer, time, place and records get the same signature,
    whatever the order of their rows.
    """
    row_hash = pd.util.hash_pandas_object(parts.astype("string").fillna("\x00"), index=False)
    h = (row_hash.to_numpy(np.uint64) >> np.uint64(12)).astype(np.int64)
    frame = pd.DataFrame({"key": keys.to_numpy(), "h": h})
    return frame.groupby("key", sort=False).agg(n=("h", "size"), h=("h", "sum")).reset_index()


@register
class OpportunisticAdapter(Adapter):
    kind = "opportunistic"
    description = ("Volunteer and opportunistic records (CSV or Darwin Core); complete checklists carry "
                   "effort in hours observed and zeros, incidental records are presence-only.")
    tables = {"rows": SCHEMA}
    effort_words = "time observed on a complete checklist"
    effort_label = "hours observed"
    designed = False
    finds_twins = True
    default_provider_type = "volunteer"
    default_protocol = "complete_checklist"
    display_order = 40
    profile_sections = {
        "presence": Table({"tokens": Value("array", "Words in the count column meaning 'present, not counted' "
                                                    "(default [\"present\"]; compared without case).",
                                           items="string")},
                          "Markers for a record noted but not counted."),
        "plausibility": Table({"earliest": text("Records before this date are bad_time.")},
                              "Plausibility of volunteer records."),
        "duplicates": Table({
            "distance_km": number("Twin window in space (km).", exclusive_minimum=0, default=2.0),
            "minutes": number("Twin window in time (minutes).", exclusive_minimum=0, default=60),
            "rank": Value("integer", "Rank of this source among twins (0 = kept first).", minimum=0),
        }, "Cross-source duplicates."),
    }
    profile_example = """\
[presence]
# tokens = ["present"]        # words in the count column meaning "present, not counted"

[duplicates]                  # a record this close to another source's record is a twin
# distance_km = 2.0
# minutes = 60
"""

    def read(
        self,
        inputs: Mapping[str, Path],
        profile: Profile,
        study: Study,
        progress: ProgressCallback | None = None,
    ) -> AdapterOutput:
        twin_settings(profile.section("duplicates"), profile.path)  # a bad [duplicates] fails before any reading
        earliest = _earliest(profile)
        presence_tokens = _presence_tokens(profile)
        rej = Rejections()
        raw, work, prof, notes, extra = _load(Path(inputs["rows"]), profile, rej)
        if progress:
            progress("read", 1, 3)
        rows = coerce_fields(work, fields(SCHEMA), prof, rej, SCHEMA, extra)
        n = len(rows)
        pos = np.arange(n)
        if progress:
            progress("validate", 2, 3)

        # duration: the field (minutes unless [units] says otherwise), else an eventDate
        # interval, else a free-text samplingEffort
        duration_h = rows["duration_min"].to_numpy(float)
        if "duration_min" not in prof.units:
            duration_h = duration_h / 60.0
        end_text = work.frame["_time_end"] if "_time_end" in work.frame else None
        if end_text is not None:
            interval_end = parse_times(end_text.astype("string").str.strip().replace("", pd.NA), prof)[0]
            span_h = ((interval_end - rows["time"]).dt.total_seconds() / 3600).to_numpy(float, na_value=np.nan)
            duration_h = np.where(np.isnan(duration_h) & (span_h > 0), span_h, duration_h)
        if "samplingEffort" in work.frame and "duration_min" not in prof.column_map("rows"):
            duration_h = np.where(np.isnan(duration_h), parse_effort_text(work.frame["samplingEffort"]), duration_h)
        date_only = ~rows["time"].isna().to_numpy() & ~_has_clock(work, prof)

        reject_repeated_ids(rej, "rows", rows["record_id"], "record")

        count, not_count, fractional = parse_counts(rows["count"], presence_tokens)
        label = _label(prof, "count")
        marker = " or ".join(f"'{tok}'" for tok in presence_tokens)
        rej.add("rows", pos[not_count], ReasonCode.BAD_TYPE,
                [f"{label} holds '{short_text(v)}'; expected a whole number, or empty or {marker} for present but "
                 "not counted (map your provider's marker with [presence] tokens in the profile)"
                 for v in rows["count"][not_count]])
        rej.add("rows", pos[fractional], ReasonCode.BAD_TYPE,
                [f"{label} holds {v:g}; a count must be a whole number" for v in count[fractional]])
        negative = count < 0
        rej.add("rows", pos[negative], ReasonCode.OUT_OF_RANGE,
                [f"{label} = {v:g} is negative; a count is 0 or more" for v in count[negative]])

        status = rows["occurrence_status"].str.strip().str.casefold()
        present = status.map(_STATUS).astype("boolean").to_numpy(dtype=object, na_value=None)
        bad_status = status.notna().to_numpy() & pd.isna(present)
        rej.add("rows", pos[bad_status], ReasonCode.BAD_TYPE,
                [f"{_label(prof, 'occurrence_status')} holds '{short_text(v)}'; expected present or absent "
                 "(or detected / notDetected)" for v in rows["occurrence_status"][bad_status]])
        absent = np.array([p is False for p in present]) | (count == 0)
        contradiction = absent & (count > 0)
        rej.add("rows", pos[contradiction], ReasonCode.OUT_OF_RANGE,
                [f"{label} = {v:g} contradicts occurrence status 'absent'; fix one of the two"
                 for v in count[contradiction]])
        count = np.where(absent, 0.0, count)

        too_early = (rows["time"] < earliest).fillna(False).to_numpy()
        rej.add("rows", pos[too_early], ReasonCode.BAD_TIME,
                [f"{_label(prof, 'time')} {t:%Y-%m-%d} is before {earliest:%Y-%m-%d}, the earliest date this "
                 "source accepts ([plausibility] earliest in the profile); check the year" for t in rows["time"][too_early]])

        lon = normalise_lon(rows["lon"].to_numpy(float))
        lat = rows["lat"].to_numpy(float)
        alive = ~rej.mask("rows", n)
        check = alive & np.isfinite(lon) & np.isfinite(lat)
        reject_outside_domain(study, lon[check], lat[check], pos[check], "rows", rej,
                              "sighting position")

        observer_id = pseudonymise(rows["observer"], study_salt(study.root))
        # the raw rows kept in the quarantine carry the pseudonym, never the name
        observer_col = resolve_columns(work, fields(SCHEMA), prof).get("observer")
        if observer_col is not None and observer_col in raw.frame:
            raw.frame = raw.frame.assign(**{observer_col: observer_id.fillna("").to_numpy(dtype=object)})
        rec = pd.DataFrame({
            "pos": pos, "time": rows["time"], "lat": lat, "lon": lon, "observer_id": observer_id,
            "checklist": rows["checklist_id"].str.strip(), "complete": rows["complete"].fillna(False).astype(bool),
            "duration_h": duration_h, "distance_km": rows["distance_km"].to_numpy(float),
            "date_only": date_only, "count": count, "absent": absent,
            "provider_id": rows["record_id"].astype("string").str.strip().replace("", pd.NA),
            "taxon_text": rows["taxon"].str.strip(),
            "life_stage": normalise_life_stage(rows["life_stage"]),
            "behavior": rows["behavior"].str.strip().str.casefold().str.replace(r"[\s-]+", "_", regex=True),
        })
        rec["key"] = _event_keys(rec)
        taxon, unknown, messages, guess = resolve_taxa(rec["taxon_text"].where(rec["taxon_text"] != ""), study)
        rec["variable"] = taxon
        rec["guess"] = taxon.fillna(guess)
        blank_taxon = rec["taxon_text"].isna().to_numpy() | (rec["taxon_text"] == "").fillna(True).to_numpy()

        # checklists: completeness from the live rows, then the row rules that depend on it
        alive = ~rej.mask("rows", n)
        live = rec[alive]
        complete_by_key = live.groupby("key", sort=False)["complete"].min()
        is_complete = rec["key"].map(complete_by_key).fillna(False).astype(bool).to_numpy()
        rej.add("rows", pos[alive & blank_taxon & ~is_complete], ReasonCode.MISSING_VALUE,
                f"{_label(prof, 'taxon')} is empty; only a complete checklist may have a row without a taxon "
                "(nothing seen)")
        first_blank = rec[alive & blank_taxon].drop_duplicates("key")["pos"].to_numpy()
        extra_blank = alive & blank_taxon & is_complete & ~np.isin(pos, first_blank)
        rej.add("rows", pos[extra_blank], ReasonCode.DUPLICATE_RECORD,
                "this complete checklist already has a row without a taxon; only the first is kept")
        rej.add("rows", pos[alive & unknown], ReasonCode.UNKNOWN_TAXON, messages[alive & unknown])
        orphan_absence = alive & absent & ~is_complete & ~unknown
        rej.add("rows", pos[orphan_absence], ReasonCode.ABSENCE_OUTSIDE_CHECKLIST,
                "an absence (count 0 or status absent) is only meaningful in a complete checklist; mark the "
                "checklist complete or drop the row")
        self._repeated_checklists(rec, ~rej.mask("rows", n), rej)

        alive = ~rej.mask("rows", n)
        events = _events(rec[alive])
        ok = alive & ~blank_taxon
        values = _values(rec[ok], events)
        # a quarantined row of a complete checklist leaves it incomplete: no zero for its taxon
        lost = ~alive & ~blank_taxon & rec["key"].isin(events.loc[events["complete"], "event_id"]).to_numpy()
        blocked = pd.DataFrame({"event_id": rec["key"][lost], "variable": rec["guess"][lost]}).dropna()
        complete_events = events[events["complete"]]
        zeros = zero_fill(
            target_years(complete_events, study),
            rec[ok].rename(columns={"key": "event_id"})[["event_id", "variable", "life_stage"]],
            blocked, study, profile.protocol, [("count", "1")],
        )
        zeros = zeros.assign(variable_kind="taxon", zero_filled=True, behavior=None, n_values=0,
                             flags=[[] for _ in range(len(zeros))],
                             source_record_rows=[[] for _ in range(len(zeros))])
        values = pd.concat([values, zeros], ignore_index=True)
        values["n_vessels"] = pd.NA

        # a complete checklist that yields no value at all (nothing seen, no targets) cannot be stored
        empty = ~events["event_id"].isin(values["event_id"])
        if empty.any():
            gone = rec["key"].isin(events.loc[empty, "event_id"]).to_numpy() & alive
            rej.add("rows", pos[gone], ReasonCode.MISSING_VALUE,
                    "the checklist reports nothing seen and the profile's protocol has no target taxa, so no zero "
                    "can be stored; set [source] protocol to a protocol of targets.csv")
            events = events[~empty]
        incomplete = set(rec["key"][lost])
        unresolved = set(stage_unresolved_events(
            rec[ok & is_complete].rename(columns={"key": "event_id"}), study, profile.protocol))
        events["flags"] = [f + ([STAGE_UNRESOLVED] if e in unresolved else [])
                           + (["checklist_incomplete"] if e in incomplete else [])
                           for f, e in zip(events["flags"], events["event_id"], strict=True)]
        events = events.drop(columns=["complete"])
        if progress:
            progress("convert", 3, 3)
        return finish([raw], rej, events, values, notes)

    @staticmethod
    def _repeated_checklists(rec: pd.DataFrame, alive: np.ndarray, rej: Rejections) -> None:
        """Quarantine a checklist that repeats an earlier one of the file under another id."""
        live = rec[alive & rec["checklist"].notna().to_numpy()]
        if live.empty:
            return
        parts = pd.DataFrame({
            "observer": live["observer_id"], "time": live["time"].astype("string"),
            "lat": live["lat"].round(5).astype("string"), "lon": live["lon"].round(5).astype("string"),
            "taxon": live["variable"], "count": pd.Series(live["count"]).astype("string"),
            "stage": live["life_stage"], "behavior": live["behavior"],
        })
        sig = checklist_signatures(live["key"], parts)
        first_pos = live.groupby("key", sort=False)["pos"].min()
        sig["first"] = sig["key"].map(first_pos)
        sig = sig.sort_values("first")
        original = sig.groupby(["n", "h"], sort=False)["key"].transform("first")
        repeats = sig[original != sig["key"]].assign(original=original[original != sig["key"]])
        if repeats.empty:
            return
        hit = live[live["key"].isin(repeats["key"])]
        of = hit["key"].map(repeats.set_index("key")["original"])
        rej.add("rows", hit["pos"].to_numpy(), ReasonCode.DUPLICATE_RECORD,
                [f"checklist '{k}' repeats checklist '{o}' (same observer, time, place and records); "
                 "only the first is kept" for k, o in zip(hit["key"], of, strict=True)])


def _load(path: Path, profile: Profile, rej: Rejections) -> tuple[RawTable, RawTable, Profile, list[str], list[tuple[int, str, int]]]:
    """The file as text (for the quarantine), a working copy to type, and the effective profile."""
    notes: list[str] = []
    if darwin_core.is_archive(path):
        dwc = darwin_core.read_archive(path, "rows")
        raw, malformed, notes = dwc.table, dwc.malformed, list(dwc.notes)
        if dwc.orphans:
            rej.add("rows", np.array([r - 1 for r, _ in dwc.orphans]), ReasonCode.ORPHAN_RECORD,
                    [m for _, m in dwc.orphans])
    else:
        raw, malformed = read_table(path, profile, "rows")
    mapping = dict(profile.column_map("rows"))
    columns = list(raw.frame.columns)
    if darwin_core.looks_like_dwc(columns):
        mapping.update(darwin_core.default_columns(columns, mapping))
    frame = raw.frame.copy()
    taxon_col, vernacular = mapping.get("taxon"), next((c for c in columns if darwin_core.short_term(c) == "vernacularName"), None)
    if taxon_col in frame and vernacular is not None and vernacular != taxon_col:
        # Darwin Core: a record without a scientific name may still carry a common name
        sci = frame[taxon_col].astype("string").fillna("").str.strip()
        frame[taxon_col] = sci.where(sci != "", frame[vernacular].astype("string").fillna("")).to_numpy(dtype=object)
    time_col = mapping.get("time", next((c for c in columns if c.casefold() == "time"), None))
    if time_col is not None and time_col in frame:
        text = frame[time_col].astype("string").fillna("")
        # an ISO 8601 interval "start/end" (Darwin Core eventDate) gives start time and duration;
        # only text starting with YYYY-MM is split, so day-first dates such as 14/11/2021 stay whole
        parts = text.str.extract(r"^\s*(?P<start>\d{4}-\d{2}[^/]*)/(?P<end>.+)$")
        interval = parts["start"].notna().to_numpy()
        if interval.any():
            frame[time_col] = np.where(interval, parts["start"].to_numpy(dtype=object), frame[time_col].to_numpy(dtype=object))
            frame["_time_end"] = parts["end"].fillna("").to_numpy(dtype=object)
        date_col = frame[time_col].astype("string").fillna("")
        if "eventTime" in frame:  # Darwin Core: a date in eventDate, the clock time in eventTime
            clock = frame["eventTime"].astype("string").fillna("").str.strip()
            join = (clock != "") & ~date_col.str.contains("T|:", regex=True)
            frame[time_col] = date_col.where(~join, date_col + "T" + clock).to_numpy(dtype=object)
    work = RawTable(raw.path, raw.role, frame, raw.sha256)
    prof = dataclasses.replace(profile, columns={**profile.columns, "rows": mapping})
    return raw, work, prof, notes, malformed


def _has_clock(work: RawTable, prof: Profile) -> np.ndarray:
    """True where the time text holds a clock time (not a bare date)."""
    col = prof.column_map("rows").get("time") or next((c for c in work.frame.columns if c.casefold() == "time"), None)
    if col is None or col not in work.frame:
        return np.ones(work.n_rows, dtype=bool)
    return work.frame[col].astype("string").str.contains(r"\d:\d", regex=True).fillna(False).to_numpy()


def _label(prof: Profile, name: str) -> str:
    col = prof.column_map("rows").get(name)
    return f"{name} (column '{col}')" if col and col != name else f"column '{name}'"


def _earliest(profile: Profile) -> pd.Timestamp:
    sec = profile.section("plausibility")  # its keys are checked by the profile's definition
    value = sec.get("earliest", DEFAULT_EARLIEST)
    try:
        return pd.Timestamp(str(value))
    except ValueError:
        raise ConfigError(profile.path, "plausibility.earliest", f"'{value}' is not a date (expected e.g. 2015-01-01)") from None


def _presence_tokens(profile: Profile) -> tuple[str, ...]:
    """The profile's markers for "present, not counted" ([presence] tokens), or the default."""
    sec = profile.section("presence")  # its keys are checked by the profile's definition
    tokens = sec.get("tokens", list(DEFAULT_PRESENCE_TOKENS))
    if not isinstance(tokens, list) or not tokens or not all(isinstance(t, str) and t.strip() for t in tokens):
        raise ConfigError(profile.path, "presence.tokens",
                          f"expected a list of non-empty words, e.g. [\"present\", \"seen\"], got {tokens!r}")
    numeric = [t for t in tokens if pd.notna(pd.to_numeric(t.strip(), errors="coerce"))]
    if numeric:
        raise ConfigError(profile.path, "presence.tokens",
                          f"'{numeric[0]}' is a number and would hide a count; a presence marker must not be one")
    return tuple(t.strip() for t in tokens)


def _event_keys(rec: pd.DataFrame) -> pd.Series:
    """Checklist id where given; otherwise one event per observer, time and place."""
    content = pd.util.hash_pandas_object(
        rec[["observer_id", "time", "lat", "lon"]].astype("string").fillna("\x00"), index=False)
    derived = pd.Series([f"inc-{h:016x}" for h in content.to_numpy(np.uint64)], index=rec.index, dtype="string")
    return rec["checklist"].where(rec["checklist"].notna() & (rec["checklist"] != ""), derived).astype("string")


def _events(live: pd.DataFrame) -> pd.DataFrame:
    """One event per checklist (or incidental report) from its live rows."""
    if live.empty:
        cols = ["event_id", "event_start", "event_end", "lat", "lon", "depth_min_m", "depth_max_m",
                "bottom_depth_m", "on_bottom", "effort", "effort_unit", "flags", "source_row",
                "observer_id", "complete"]
        return pd.DataFrame({c: [] for c in cols}).astype({"complete": bool, "event_start": "datetime64[us]"})
    g = live.groupby("key", sort=False)
    first = live.sort_values("pos").drop_duplicates("key").set_index("key")
    agg = g.agg(start=("time", "min"), last=("time", "max"), complete=("complete", "min"),
                any_complete=("complete", "max"), observers=("observer_id", "nunique"),
                duration_h=("duration_h", "first"), distance_km=("distance_km", "first"),
                date_only=("date_only", "all"))
    agg = agg.join(first[["lat", "lon", "observer_id", "pos"]])
    blank_rows = live[live["taxon_text"].isna() | (live["taxon_text"] == "")].drop_duplicates("key").set_index("key")["pos"]
    agg["source_row"] = agg.index.to_series().map(blank_rows).fillna(agg["pos"]).astype("int64") + 1
    end = add_hours(agg["start"], agg["duration_h"].to_numpy(float))
    end = end.where(end > agg["last"], agg["last"])
    # a record dated to the day only may have been made at any time of that day
    end = end.where(~(agg["date_only"] & agg["duration_h"].isna()), agg["start"] + pd.Timedelta(days=1))
    complete = agg["complete"].astype(bool)
    flags = []
    for c, anyc, nobs, d, km, dated in zip(complete, agg["any_complete"], agg["observers"], agg["duration_h"],
                                          agg["distance_km"], agg["date_only"], strict=True):
        f = []
        if bool(anyc) != bool(c) or nobs > 1:
            f.append("checklist_inconsistent")
        if c and not np.isfinite(d):
            f.append("effort_missing")
        if c and ((np.isfinite(d) and d > LONG_EFFORT_H) or (np.isfinite(km) and km > LONG_ROUTE_KM)):
            f.append("long_effort")
        if dated:
            f.append("date_only")
        flags.append(f)
    events = pd.DataFrame({
        "event_id": agg.index.astype(str),
        "event_start": agg["start"].astype("datetime64[us]"),
        "event_end": end.astype("datetime64[us]"),
        "lat": agg["lat"].to_numpy(float), "lon": agg["lon"].to_numpy(float),
        # sightings at the sea surface
        "depth_min_m": 0.0, "depth_max_m": 0.0, "bottom_depth_m": np.nan, "on_bottom": False,
        "effort": np.where(complete, agg["duration_h"].to_numpy(float), np.nan),
        "effort_unit": np.where(complete, "h", None),
        "flags": flags, "source_row": agg["source_row"].to_numpy(), "observer_id": agg["observer_id"].to_numpy(),
        "complete": complete.to_numpy(),
    }).reset_index(drop=True)
    return events


def _values(ok: pd.DataFrame, events: pd.DataFrame) -> pd.DataFrame:
    """Counts (complete checklists) or presences (everything else), one row per taxon x stage x behavior."""
    cols = ["event_id", "variable", "life_stage", "behavior", "quantity", "unit", "value", "variable_kind",
            "zero_filled", "flags", "source_record_rows", "n_values", "provider_record_id"]
    if ok.empty:
        return pd.DataFrame({c: [] for c in cols})
    complete = ok["key"].map(events.set_index("event_id")["complete"]).fillna(False).astype(bool)
    frame = ok.assign(complete=complete.to_numpy(), row=ok["pos"] + 1,
                      counted=np.isfinite(ok["count"].to_numpy(float)))
    keys = ["key", "variable", "life_stage", "behavior"]
    agg = frame.groupby(keys, dropna=False, sort=False).agg(
        total=("count", lambda s: s.sum(min_count=1)), counted=("counted", "sum"), n=("row", "size"),
        rows=("row", list), complete=("complete", "first"),
        provider_ids=("provider_id", lambda s: "|".join(s.dropna()) or None),
    ).reset_index()
    counts = agg["complete"] & agg["total"].notna()
    flags = []
    for n_rows, n_counted, is_count in zip(agg["n"], agg["counted"], counts, strict=True):
        f = ["merged_rows"] if n_rows > 1 else []
        if is_count and n_counted < n_rows:
            f.append("partly_counted")
        flags.append(f)
    return pd.DataFrame({
        "event_id": agg["key"].astype(str), "variable": agg["variable"], "life_stage": agg["life_stage"],
        "behavior": agg["behavior"], "quantity": np.where(counts, "count", "presence"), "unit": "1",
        "value": np.where(counts, agg["total"].to_numpy(float), 1.0), "variable_kind": "taxon",
        "zero_filled": False, "flags": flags, "source_record_rows": agg["rows"], "n_values": agg["n"],
        "provider_record_id": agg["provider_ids"].astype("string"),
    })
