"""The shared opening of two-table sources: events (hauls, tows, segments) and their records.

Every such adapter reads an events file and a records file, types their fields, rejects
repeated event ids, validates its events (the kind's own rules), then quarantines the records
of unknown or rejected events and of unknown taxa, and finds which events lost records to
quarantine (their records are incomplete: no zero is inferred for those taxa there). The kind
then turns what is left into events and values. :class:`EventRecordAdapter` owns the shared
steps; a kind sets the words of its messages and implements :meth:`~EventRecordAdapter.validate_events`
and :meth:`~EventRecordAdapter.convert`.
"""

from __future__ import annotations

from abc import abstractmethod
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any, ClassVar

import numpy as np
import pandas as pd

from harmonize.adapters.base import Adapter, AdapterOutput, ProgressCallback, finish
from harmonize.errors import ReasonCode
from harmonize.geodesy import track_geometry
from harmonize.membership import distinct_present, is_in
from harmonize.memory import release_free_memory
from harmonize.profile import Profile
from harmonize.reading.quarantine import Rejections, reject_repeated_ids
from harmonize.reading.taxa import resolve_taxa
from harmonize.reading.text import RawTable
from harmonize.study import Study
from harmonize.tagging import normalise_lon


@dataclass
class Opening:
    """One ingest's profile and its rules, both tables as read (raw text, typed fields), and
    the rejections so far."""

    profile: Profile
    rules: Any
    ev_raw: RawTable
    rc_raw: RawTable
    ev: pd.DataFrame
    rc: pd.DataFrame
    rejections: Rejections


@dataclass
class RecordCheck:
    """The records after the shared checks.

    ``taxon`` is the canonical taxon of each record (null where unknown); ``kept`` the mask
    of records still accepted; ``incomplete`` the distinct ids of accepted events that lost a
    record to quarantine; ``blocked`` the (event_id, variable) pairs of those lost records
    whose taxon is known or guessed (never zero-filled); ``unattributed`` the number of
    quarantined records without a readable event id (:func:`unattributed_records`).
    """

    taxon: pd.Series | None
    kept: np.ndarray
    incomplete: np.ndarray
    blocked: pd.DataFrame
    unattributed: int


class EventRecordAdapter(Adapter):
    """A two-table source kind: an events file and a records file joined by ``event_id``.

    Subclasses set the words below and implement :meth:`validate_events` and :meth:`convert`;
    :meth:`profile_rules` and :meth:`reject_records` are optional hooks.
    """

    tables: ClassVar[Mapping[str, str]]
    #: What one event is called in messages ("haul", "tow", "segment").
    event_word: ClassVar[str] = "event"
    #: What one record row is called in the unattributed note ("catch", "count", "bird").
    record_word: ClassVar[str] = "record"
    #: What an event's records are called where they are incomplete ("catch", "counts").
    records_called: ClassVar[str] = "counts"
    #: The event flag for incomplete records.
    incomplete_flag: ClassVar[str] = "counts_incomplete"

    def profile_rules(self, profile: Profile) -> Any:
        """The kind's own profile settings, checked before any file is read (ConfigError)."""
        return None

    @abstractmethod
    def validate_events(self, opening: Opening, study: Study) -> tuple[pd.DataFrame, Any]:
        """The kind's checks of its events (repeated ids are already rejected).

        Returns the accepted events and their flags in the kind's own form.
        """

    def reject_records(self, rc: pd.DataFrame, alive: np.ndarray, rejections: Rejections) -> None:
        """The kind's own checks of the records still alive (after orphans and unknown taxa)."""

    @abstractmethod
    def convert(self, opening: Opening, records: RecordCheck, events: pd.DataFrame, flags: Any,
                study: Study) -> tuple[pd.DataFrame, pd.DataFrame, list[str]]:
        """The accepted events, their values and the ingest notes."""

    def read(
        self,
        inputs: Mapping[str, Path],
        profile: Profile,
        study: Study,
        progress: ProgressCallback | None = None,
    ) -> AdapterOutput:
        rules = self.profile_rules(profile)
        rej = Rejections()
        raw, typed = self.read_fields(inputs, profile, rej)
        opening = Opening(profile, rules, raw["events"], raw["records"], typed["events"], typed["records"], rej)
        del raw, typed
        if progress:
            progress("read", 1, 3)
            progress("validate", 2, 3)
        reject_repeated_ids(rej, "events", opening.ev["event_id"], self.event_word)
        events, flags = self.validate_events(opening, study)
        records = self.check_records(opening, study)
        events, values, notes = self.convert(opening, records, events, flags, study)
        if progress:
            progress("convert", 3, 3)
        return finish([opening.ev_raw, opening.rc_raw], rej, events, values, notes)

    def check_records(self, opening: Opening, study: Study) -> RecordCheck:
        """Quarantine the records of unknown or rejected events and of unknown taxa, then the
        kind's own record checks; find the events whose records are incomplete."""
        release_free_memory()  # what reading and the event checks freed: not counted below
        ev, rc, rej = opening.ev, opening.rc, opening.rejections
        ev_alive = ~rej.mask("events", len(ev))
        rc_alive = ~rej.mask("records", len(rc))
        rc_alive = reject_records_of_events(
            rc, rc_alive, ev["event_id"], ev_alive, rej.first_reasons("events"), rej, self.event_word
        )
        taxon, unknown, messages, guess = resolve_taxa(rc["taxon"], study)
        unknown = unknown & rc_alive
        rej.add("records", np.flatnonzero(unknown), ReasonCode.UNKNOWN_TAXON, messages[unknown])
        self.reject_records(rc, rc_alive & ~unknown, rej)
        kept = ~rej.mask("records", len(rc))
        # A quarantined record of a live event makes that event's records incomplete, and its
        # taxon (when known, or the closest known name of a misspelt one) is never zero-filled
        # for that event.
        lost = ~kept & is_in(rc["event_id"], ev["event_id"][ev_alive])
        blocked = pd.DataFrame({"event_id": rc["event_id"][lost], "variable": _known_or_guessed(taxon[lost], guess[lost])})
        blocked = blocked.dropna()
        release_free_memory()  # the checks' per-row temporaries
        return RecordCheck(taxon, kept, distinct_present(rc["event_id"][lost]), blocked,
                           unattributed_records(kept, rc["event_id"]))

    def unattributed_note(self, file_name: str, n: int) -> str:
        """The ingest note for ``n`` quarantined records that no event can claim."""
        return unattributed_note(file_name, n, self.record_word, self.event_word,
                                 what=self.records_called, flag=self.incomplete_flag)


def _known_or_guessed(taxon: pd.Series, guess: pd.Series) -> pd.Series:
    """The taxon of each record, or its closest known taxon where the name is unknown (categorical
    columns, as :func:`~harmonize.reading.taxa.resolve_taxa` gives for a table read in blocks,
    compared as text: their categories differ)."""
    if isinstance(taxon.dtype, pd.CategoricalDtype):
        taxon, guess = taxon.astype(object), guess.astype(object)
    return taxon.fillna(guess)


def event_times(ev: pd.DataFrame, rejections: Rejections, alive: np.ndarray, start_field: str = "start_time",
                start_words: str = "start_time") -> tuple[pd.Series, pd.Series, np.ndarray, np.ndarray]:
    """Start, end and duration (h) of each event; an end before the start is quarantined.

    The duration is end - start where both are given, else the ``duration`` field. Returns
    (start, end, duration_h, alive) with the events that ended before they started taken
    out of ``alive``; ``start_words`` names the start in the message.
    """
    start, end = ev[start_field], ev["end_time"]
    backwards = alive & (end < start).fillna(False).to_numpy()
    rejections.add("events", np.flatnonzero(backwards), ReasonCode.END_BEFORE_START,
                   [f"end_time {e} is before {start_words} {s}"
                    for s, e in zip(start[backwards], end[backwards], strict=True)])
    duration_h = ((end - start).dt.total_seconds() / 3600.0).to_numpy(dtype=float, na_value=np.nan)
    duration_h = np.where(np.isnan(duration_h), ev["duration"].to_numpy(float), duration_h)
    return start, end, duration_h, alive & ~backwards


@dataclass
class Track:
    """The start and end positions of events that cover a line (tows, transect segments).

    ``have_end``: both positions are given; ``length_km`` the geodesic between them (0 where
    not ``have_end``); ``lon``, ``lat`` the event's representative point: the geodesic
    midpoint, or the start where there is no end.
    """

    start_lon: np.ndarray
    start_lat: np.ndarray
    end_lon: np.ndarray
    end_lat: np.ndarray
    have_end: np.ndarray
    length_km: np.ndarray
    lon: np.ndarray
    lat: np.ndarray

    @classmethod
    def of(cls, ev: pd.DataFrame) -> Track:
        """The track of each event from its start_lat/start_lon and end_lat/end_lon fields."""
        slon, slat = ev["start_lon"].to_numpy(float), ev["start_lat"].to_numpy(float)
        elon, elat = ev["end_lon"].to_numpy(float), ev["end_lat"].to_numpy(float)
        have_end = np.isfinite(elon) & np.isfinite(elat) & np.isfinite(slon) & np.isfinite(slat)
        length_km, mid_lon, mid_lat = track_geometry(
            np.where(have_end, slon, 0), np.where(have_end, slat, 0),
            np.where(have_end, elon, 0), np.where(have_end, elat, 0),
        )
        return cls(slon, slat, elon, elat, have_end, length_km,
                   np.where(have_end, mid_lon, normalise_lon(slon)), np.where(have_end, mid_lat, slat))

    def columns(self) -> dict[str, np.ndarray]:
        """The optional track_* event columns (null where the event has no end position)."""
        have = self.have_end
        return {
            "track_start_lat": np.where(have, self.start_lat, np.nan),
            "track_start_lon": np.where(have, normalise_lon(self.start_lon), np.nan),
            "track_end_lat": np.where(have, self.end_lat, np.nan),
            "track_end_lon": np.where(have, normalise_lon(self.end_lon), np.nan),
        }


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


def flag_tuples(bits: Mapping[str, np.ndarray]) -> list[tuple[str, ...]]:
    """Per row, the names of the flags whose mask is true (vectorised: one lookup per distinct combination)."""
    names = list(bits)
    if not names:
        return []
    code = np.zeros(len(next(iter(bits.values()))), dtype=np.int64)
    for i, name in enumerate(names):
        code |= np.asarray(bits[name], dtype=bool).astype(np.int64) << i
    table = {c: tuple(n for i, n in enumerate(names) if c >> i & 1) for c in np.unique(code).tolist()}
    return pd.Series(code).map(table).tolist()
