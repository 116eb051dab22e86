"""Zero-filling: the absences a complete-catch protocol lets an adapter infer (the one rule of every adapter)."""

from __future__ import annotations

import numpy as np
import pandas as pd

from harmonize.adapters.life_stages import COARSE_LIFE_STAGES
from harmonize.membership import codes_in, distinct_present
from harmonize.study import Study
from harmonize.tagging import tag_season

#: Event flag: a record of a taxon with a staged target had no (or a coarse) life stage, so no
#: staged zero of that taxon was inferred for the event.
STAGE_UNRESOLVED = "stage_unresolved"


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
    DataFrame with event_id, variable, life_stage, quantity, unit, value (0.0); with
    ``event_categories`` the text columns are categoricals.
    """
    cols = ["event_id", "variable", "life_stage", "quantity", "unit", "value"]
    rows, pair_target, targets = zero_pairs(events, caught, blocked, study, protocol)
    if not rows.size or not quantities:
        return pd.DataFrame({c: [] for c in cols})
    q = len(quantities)
    pair = np.repeat(np.arange(rows.size), q)
    if event_categories is None:
        return pd.DataFrame({
            "event_id": events["event_id"].to_numpy()[rows[pair]],
            "variable": targets["taxon"].to_numpy()[pair_target[pair]],
            "life_stage": targets["life_stage"].to_numpy()[pair_target[pair]],
            "quantity": np.tile([qu for qu, _ in quantities], rows.size),
            "unit": np.tile([u for _, u in quantities], rows.size),
            "value": 0.0,
        })[cols]
    # categoricals: codes looked up once per event and once per target, not once per zero
    def per_pair(text: pd.Series | list, at: np.ndarray) -> pd.Categorical:
        cat = pd.Categorical(text)
        return pd.Categorical.from_codes(cat.codes[at], dtype=cat.dtype)

    return pd.DataFrame({
        "event_id": pd.Categorical.from_codes(event_categories.get_indexer(events["event_id"])[rows[pair]],
                                              categories=event_categories),
        "variable": per_pair(targets["taxon"], pair_target[pair]),
        "life_stage": per_pair(targets["life_stage"], pair_target[pair]),
        "quantity": per_pair([qu for qu, _ in quantities], np.tile(np.arange(q), rows.size)),
        "unit": per_pair([u for _, u in quantities], np.tile(np.arange(q), rows.size)),
        "value": 0.0,
    })[cols]


def zero_pairs(events: pd.DataFrame, caught: pd.DataFrame, blocked: pd.DataFrame, study: Study,
               protocol: str | None) -> tuple[np.ndarray, np.ndarray, pd.DataFrame]:
    """The (event, target) pairs of :func:`zero_fill`, as integer positions.

    Returns the events row and the targets row of each inferred zero, in the order of events
    then targets, and the protocol's targets (taxon, life_stage, first_year, last_year).
    Matching is by integer code: ids and names are looked up once per distinct value (once
    per category when a column is categorical), not once per row.
    """
    targets = study.targets[study.targets["protocol"] == protocol] if protocol else study.targets.iloc[:0]
    targets = targets.reset_index(drop=True)
    if targets.empty or events.empty:
        return np.array([], dtype=np.int64), np.array([], dtype=np.int64), targets
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
    return rows.astype(np.int64), pair_target.astype(np.int64), targets


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
