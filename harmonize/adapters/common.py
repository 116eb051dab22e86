"""Steps that several adapters share: domain test, taxon names, life stages, orphan records, zero-filling."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from harmonize.adapters.reading import Rejections, _short, closest_names
from harmonize.errors import ReasonCode
from harmonize.study import Study, normalise_name, taxon_lookup
from harmonize.tagging import inside_domain, normalise_lon, tag_season

#: Plural and variant spellings of life stages, mapped to the singular (common practice).
LIFE_STAGE_SPELLINGS = {
    "adults": "adult", "larvae": "larva", "larvas": "larva", "juveniles": "juvenile",
    "eggs": "egg", "nauplii": "nauplius", "copepodites": "copepodite", "zoeae": "zoea",
    "zoeas": "zoea", "megalopae": "megalopa", "post-larva": "postlarva", "post-larvae": "postlarva",
    "postlarvae": "postlarva",
}
#: Life-stage words that do not name one stage: a record so marked may hold any stage of its
#: taxon, like a record without a stage (common practice in catch and count sheets).
COARSE_LIFE_STAGES = frozenset({"unknown", "unstaged", "undetermined", "mixed", "all", "unsorted"})
#: Event flag: a record of a taxon with a staged target had no (or a coarse) life stage, so no
#: staged zero of that taxon was inferred for the event.
STAGE_UNRESOLVED = "stage_unresolved"


def normalise_life_stage(stage: pd.Series) -> pd.Series:
    """Life stages in lower case and singular ("Larvae" -> "larva"); blanks stay null."""
    folded = stage.astype("string").str.strip().str.casefold().replace("", pd.NA)
    return folded.replace(LIFE_STAGE_SPELLINGS).astype("string")


def reject_outside_domain(
    study: Study,
    lon: np.ndarray,
    lat: np.ndarray,
    positions: np.ndarray,
    role: str,
    rejections: Rejections,
    what: str = "position",
) -> np.ndarray:
    """Quarantine rows whose point lies outside the study domain; returns the inside mask."""
    lon = normalise_lon(lon)
    inside = inside_domain(study.domain, lon, lat)
    out = ~inside
    if out.any():
        rejections.add(
            role, positions[out], ReasonCode.OUTSIDE_DOMAIN,
            [f"{what} ({la:.4f}, {lo:.4f}) lies outside the study domain"
             for la, lo in zip(lat[out], lon[out], strict=True)],
        )
    return inside


def swapped_positions(study: Study, lat: np.ndarray, lon: np.ndarray) -> int:
    """How many positions lie outside the domain (or off the globe) but inside it once swapped.

    Only such positions suggest that a file's latitude and longitude columns are swapped; a
    vessel in port or at anchor outside the domain does not.
    """
    lat = np.asarray(lat, dtype=float)
    lon = np.asarray(lon, dtype=float)
    ok = np.isfinite(lat) & np.isfinite(lon)

    def inside(la: np.ndarray, lo: np.ndarray) -> np.ndarray:
        valid = ok & (np.abs(la) <= 90) & (lo >= -180) & (lo <= 360)
        hit = np.zeros(la.shape, dtype=bool)
        if valid.any():
            hit[valid] = inside_domain(study.domain, normalise_lon(lo[valid]), la[valid])
        return hit

    return int((inside(lon, lat) & ~inside(lat, lon)).sum())


def swapped_position_notes(study: Study, positions: list[tuple[str, np.ndarray, np.ndarray]]) -> list[str]:
    """One note per file whose positions would fall inside the domain with latitude and longitude swapped."""
    counts: dict[str, int] = {}
    for file_name, lat, lon in positions:
        counts[file_name] = counts.get(file_name, 0) + swapped_positions(study, lat, lon)
    return [f"{name}: {n:,} position{'s' if n != 1 else ''} lie outside the study domain but would lie inside "
            "it with latitude and longitude swapped; check which columns the profile maps to the latitude "
            "and longitude fields" for name, n in counts.items() if n]


def resolve_taxa(names: pd.Series, study: Study) -> tuple[pd.Series, np.ndarray, pd.Series, pd.Series]:
    """Canonical taxon for each name via taxa.csv names and aliases (case/space-insensitive).

    Returns (canonical names with nulls where unknown, unknown mask, a message per row
    naming the closest known names, and the closest known taxon of each unknown name).
    The closest taxon is what a misspelt name most likely meant: adapters never infer a
    zero for it in the same event.
    """
    lookup = taxon_lookup(study.taxa)
    # a catch file repeats a few dozen names millions of times: normalise each distinct one
    codes, distinct_names = pd.factorize(names, use_na_sentinel=True)
    per_name = normalise_name(pd.Series(distinct_names, dtype=object)).map(lookup).astype("string")
    # every name null (e.g. all rows malformed): nothing to look up, and codes are all -1
    mapped = per_name.to_numpy()[codes] if len(per_name) else np.full(len(codes), pd.NA, dtype=object)
    canonical = pd.Series(mapped, index=names.index, dtype="string")
    canonical[codes < 0] = pd.NA
    unknown = (canonical.isna() & names.notna()).to_numpy()
    messages = pd.Series(pd.NA, index=names.index, dtype="string")
    best = pd.Series(pd.NA, index=names.index, dtype="string")
    if unknown.any():
        distinct = names[unknown].unique()
        close = closest_names(distinct, list(lookup) + list(study.taxa["taxon"]))
        per_name, first = {}, {}
        for name in distinct:
            options = list(dict.fromkeys(lookup.get(c.casefold(), c) for c in close.get(name, [])))
            hint = f"; closest known: {', '.join(options)}" if options else "; add it (or an alias) to the taxa list"
            per_name[name] = f"taxon '{_short(name, 80)}' is not in the taxa list{hint}"
            first[name] = options[0] if options else None
        messages[unknown] = names[unknown].map(per_name)
        best[unknown] = names[unknown].map(first)
    return canonical, unknown, messages, best


def reject_records_of_events(
    records: pd.DataFrame,
    record_alive: np.ndarray,
    event_ids: pd.Series,
    event_alive: np.ndarray,
    event_rejections: pd.DataFrame,
    rejections: Rejections,
    event_word: str = "event",
) -> np.ndarray:
    """Quarantine records whose event is unknown (orphan_record) or was rejected.

    A record of a rejected event gets the event's reason code, with the event's row in
    the message. Returns the updated alive mask of the records.
    """
    alive = record_alive.copy()
    rec_ids = records["event_id"]
    known = is_in(rec_ids, event_ids[event_ids.notna()])
    orphan = alive & ~known & rec_ids.notna().to_numpy()
    if orphan.any():
        rejections.add(
            "records", np.flatnonzero(orphan), ReasonCode.ORPHAN_RECORD,
            [f"{event_word} '{e}' is not in the events file" for e in rec_ids[orphan]],
        )
    alive &= ~orphan
    # first occurrence of each event id decides: a later duplicate row does not count
    first = pd.DataFrame({"event_id": event_ids, "pos": np.arange(len(event_ids)), "alive": event_alive})
    first = first[first["event_id"].notna()].drop_duplicates("event_id")
    dead = first[~first["alive"]].merge(event_rejections, on="pos", how="left")
    if len(dead):
        hit = is_in(rec_ids, dead["event_id"]) & alive
        if hit.any():
            info = dead.set_index("event_id")
            for reason, grp in pd.DataFrame({"pos": np.flatnonzero(hit), "eid": rec_ids[hit].to_numpy()}).assign(
                reason=lambda d: info.loc[d["eid"], "reason_code"].to_numpy()
            ).groupby("reason"):
                rejections.add(
                    "records", grp["pos"].to_numpy(), ReasonCode(reason),
                    [f"its {event_word} '{e}' (events row {info.loc[e, 'pos'] + 1}) was rejected: {info.loc[e, 'message']}"
                     for e in grp["eid"]],
                )
        alive &= ~hit
    return alive


def catch_unknown(events: pd.DataFrame, lost_event_ids: object, kept_event_ids: pd.Series) -> np.ndarray:
    """Mask of events that lost records to quarantine and kept none: what they caught or
    counted is unknown, so no zero is inferred for any target there (docs/audit.md: such an
    event is not a sample)."""
    lost = pd.Index(pd.unique(pd.Series(np.asarray(lost_event_ids, dtype=object)).dropna()))
    kept = pd.Index(distinct_present(kept_event_ids))
    ids = events["event_id"]
    return (codes_in(ids, lost) >= 0) & (codes_in(ids, kept) < 0)


def target_years(events: pd.DataFrame, study: Study) -> pd.DataFrame:
    """event_id and the year in which targets.csv first_year/last_year windows are read: the
    event's season_year on the study calendar (the year it is stored and exported under),
    taken from ``season_year`` where the adapter set it (a transect segment's midpoint),
    else from ``event_start``."""
    if "season_year" in events and events["season_year"].notna().all():
        year = events["season_year"]
    else:
        year = tag_season(events["event_start"], study.seasons, study.timezone)[1]
    return pd.DataFrame({"event_id": events["event_id"].to_numpy(), "year": np.asarray(year, dtype=np.int64)})


def zero_fill(
    events: pd.DataFrame,
    caught: pd.DataFrame,
    blocked: pd.DataFrame,
    study: Study,
    protocol: str | None,
    quantities: list[tuple[str, str]],
    event_categories: pd.Index | None = None,
) -> pd.DataFrame:
    """Zero rows for target taxa of the protocol that an event did not record.

    The one zero-filling rule of every adapter: an event gets a zero for a target (taxon,
    life stage) of its protocol, within the target's first_year..last_year window, unless
    it recorded that taxon at that stage (at any stage for an unstaged target), recorded the
    taxon without a stage or with a coarse one (:data:`COARSE_LIFE_STAGES`: such a record
    may be any stage, so it blocks every staged zero of its taxon; see
    :func:`stage_unresolved_events` for the event flag), or lost a record of the taxon to
    quarantine (``blocked``).

    Parameters
    ----------
    events
        event_id and year of every accepted event (:func:`target_years`: its season year).
    caught
        event_id, variable, life_stage of every accepted record.
    blocked
        event_id, variable of records that went to quarantine with a known taxon: those
        pairs never become inferred zeros.
    protocol
        The profile's protocol (key into targets.csv); None means no zero-filling.
    quantities
        (quantity, unit) pairs the protocol records, e.g. [("biomass", "kg"), ("count", "1")].
    event_categories
        When given (the events' ids), ``event_id`` is returned as a categorical over them.

    Returns
    -------
    DataFrame with event_id, variable, life_stage, quantity, unit, value (0.0).
    """
    cols = ["event_id", "variable", "life_stage", "quantity", "unit", "value"]
    rows, targets = zero_pairs(events, caught, blocked, study, protocol)
    if not rows.size or not quantities:
        return pd.DataFrame({c: [] for c in cols})
    q = len(quantities)
    pair = np.repeat(np.arange(rows.size), q)
    if event_categories is None:
        event_id = events["event_id"].to_numpy()[rows[pair]]
    else:  # codes looked up once per event, not once per zero
        codes = event_categories.get_indexer(events["event_id"])[rows[pair]]
        event_id = pd.Categorical.from_codes(codes, categories=event_categories)
    return pd.DataFrame({
        "event_id": event_id,
        "variable": targets["taxon"].to_numpy()[pair],
        "life_stage": targets["life_stage"].to_numpy()[pair],
        "quantity": np.tile([qu for qu, _ in quantities], rows.size),
        "unit": np.tile([u for _, u in quantities], rows.size),
        "value": 0.0,
    })[cols]


def zero_pairs(
    events: pd.DataFrame,
    caught: pd.DataFrame,
    blocked: pd.DataFrame,
    study: Study,
    protocol: str | None,
) -> tuple[np.ndarray, pd.DataFrame]:
    """The (event, target) pairs of :func:`zero_fill`, as integer positions.

    Returns the events row of each inferred zero and the target row (one row per pair:
    taxon, life_stage, first_year, last_year), in the order of events then targets.
    Matching is by integer code: ids and names are looked up once per distinct value (once
    per category when a column is categorical), not once per row.
    """
    targets = study.targets[study.targets["protocol"] == protocol] if protocol else study.targets.iloc[:0]
    targets = targets.reset_index(drop=True)
    if targets.empty or events.empty:
        return np.array([], dtype=np.int64), targets.iloc[:0]
    ev_code, ev_ids = pd.factorize(events["event_id"])
    ev_ids = pd.Index(ev_ids)
    taxa = pd.Index(targets["taxon"].unique())
    t_taxon = taxa.get_indexer(targets["taxon"])
    c_ev, c_var = codes_in(caught["event_id"], ev_ids), codes_in(caught["variable"], taxa)
    seen = (c_ev >= 0) & (c_var >= 0)
    hit = np.zeros((len(ev_ids), len(taxa)), dtype=bool)
    hit[c_ev[seen], c_var[seen]] = True
    closed = np.zeros_like(hit)  # (event, taxon) pairs of quarantined records of a known taxon
    if len(blocked):
        b_ev, b_var = codes_in(blocked["event_id"], ev_ids), codes_in(blocked["variable"], taxa)
        ok = (b_ev >= 0) & (b_var >= 0)
        closed[b_ev[ok], b_var[ok]] = True
    # a record without a stage (or with a coarse one) may be any stage of its taxon: it
    # meets every staged target of that taxon, so no staged zero is inferred beside it
    any_stage = np.zeros_like(hit)
    unstaged = seen & _coarse_stage(caught["life_stage"])
    any_stage[c_ev[unstaged], c_var[unstaged]] = True
    year = events["year"].to_numpy(dtype=np.int64)
    first = targets["first_year"].astype("Float64").fillna(0).to_numpy(dtype=float)
    last = targets["last_year"].astype("Float64").fillna(9999).to_numpy(dtype=float)
    zero = np.zeros((len(events), len(targets)), dtype=bool)
    for t in range(len(targets)):  # a loop over the protocol's few targets
        v = t_taxon[t]
        stage = targets["life_stage"].iloc[t]
        if pd.isna(stage):  # a target without a stage is met by a catch of any stage
            met = hit[:, v]
        else:  # a staged target only by that stage
            same = seen & (c_var == v) & (codes_in(caught["life_stage"], pd.Index([stage])) == 0)
            met = any_stage[:, v].copy()
            met[c_ev[same]] = True
        zero[:, t] = (year >= first[t]) & (year <= last[t]) & ~met[ev_code] & ~closed[ev_code, v]
    rows, pair_target = np.nonzero(zero)  # row-major: events, then targets (a cross join's order)
    return rows.astype(np.int64), targets.iloc[pair_target].reset_index(drop=True)


def _coarse_stage(stage: pd.Series) -> np.ndarray:
    """True where a record's life stage is missing or does not name one stage."""
    if isinstance(stage.dtype, pd.CategoricalDtype):  # one test per category, not per row
        per_category = np.append(stage.cat.categories.isin(COARSE_LIFE_STAGES), True)
        codes = stage.cat.codes.to_numpy()
        return per_category[np.where(codes < 0, len(per_category) - 1, codes)]
    return (stage.isna() | stage.isin(COARSE_LIFE_STAGES)).to_numpy(dtype=bool)


def stage_unresolved_events(caught: pd.DataFrame, study: Study, protocol: str | None) -> np.ndarray:
    """Events with a record whose life stage is missing or coarse, of a taxon that the
    protocol targets by stage: :func:`zero_fill` infers none of that taxon's staged zeros
    there, and the adapters flag the event ``stage_unresolved``.

    Returns the distinct event ids.
    """
    targets = study.targets[study.targets["protocol"] == protocol] if protocol else study.targets.iloc[:0]
    staged = pd.Index(targets.loc[targets["life_stage"].notna(), "taxon"].unique())
    if staged.empty or caught.empty:
        return np.array([], dtype=object)
    hit = (codes_in(caught["variable"], staged) >= 0) & _coarse_stage(caught["life_stage"])
    return distinct_present(caught["event_id"][hit])


def codes_in(values: pd.Series, index: pd.Index) -> np.ndarray:
    """Position of each value in ``index`` (-1 where absent or null); by category when categorical."""
    if isinstance(values.dtype, pd.CategoricalDtype):
        per_category = np.append(index.get_indexer(values.cat.categories), -1)
        codes = values.cat.codes.to_numpy()
        return per_category[np.where(codes < 0, len(per_category) - 1, codes)]
    found = index.get_indexer(values)
    return np.where(values.isna().to_numpy(), -1, found)


def is_in(values: pd.Series, lookup: pd.Series | pd.Index | np.ndarray) -> np.ndarray:
    """``values.isin(lookup)`` as a boolean array, without a Python object per row or per lookup value.

    Categoricals are matched by category code; Arrow-backed text by ``pyarrow.compute.is_in``
    (pandas' ``isin`` on Arrow strings first turns every lookup value into a Python string:
    1.5 s of a 1e6-row trawl ingest). A null matches only when ``lookup`` holds a null, as
    in pandas.
    """
    if isinstance(values.dtype, pd.CategoricalDtype):
        lookup_s = pd.Series(np.asarray(lookup, dtype=object))
        found = codes_in(values, pd.Index(lookup_s.dropna().unique())) >= 0
        if lookup_s.isna().any():
            found |= values.isna().to_numpy()
        return found
    if isinstance(values.dtype, pd.ArrowDtype | pd.StringDtype) and values.dtype != object:
        arr = pa.array(values, from_pandas=True)
        if pa.types.is_string(arr.type) or pa.types.is_large_string(arr.type):
            if isinstance(lookup, pd.Series | pd.Index) and lookup.dtype != object:
                value_set = pa.array(lookup, from_pandas=True).cast(arr.type)  # Arrow text: no copy to Python
            else:
                value_set = pa.array(np.asarray(lookup, dtype=object), type=arr.type, from_pandas=True)
            found = pc.is_in(arr, value_set=value_set, skip_nulls=False)
            return np.asarray(found.to_numpy(zero_copy_only=False), dtype=bool)
    return values.isin(lookup).to_numpy(dtype=bool)


def distinct_present(values: pd.Series) -> np.ndarray:
    """The distinct non-null values of a column (by category code when categorical, so a
    column of millions of rows is never compared row by row as text)."""
    if isinstance(values.dtype, pd.CategoricalDtype):
        codes = values.cat.codes.to_numpy()
        return np.asarray(values.cat.categories[np.unique(codes[codes >= 0])], dtype=object)
    return np.asarray(pd.unique(values.dropna()), dtype=object)


def unattributed_records(kept: np.ndarray, event_ids: pd.Series) -> int:
    """Quarantined record rows with no readable event id (a malformed line, an empty id).

    Such a row may belong to any event, so no event's records are known complete: the
    adapters flag every event incomplete and infer no zero (see :func:`unattributed_note`).
    """
    return int((~kept & event_ids.isna().to_numpy()).sum())


def unattributed_note(file_name: str, n: int, record: str, event: str,
                      what: str = "counts", flag: str = "counts_incomplete") -> str:
    """The ingest note for quarantined records that no event can claim."""
    return (f"{file_name}: {n} quarantined {record} row(s) have no readable {event} id, so no {event}'s "
            f"{what} can be known complete: every {event} is flagged {flag} and no zeros were "
            "inferred; fix those rows and ingest again with --replace")
