"""The adapter interface: read raw files -> validated canonical events, values and rejections."""

from __future__ import annotations

from abc import ABC, abstractmethod
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import ClassVar

import numpy as np
import pandas as pd

from harmonize.adapters.value_source import ValueSource
from harmonize.config_spec import Map, Table
from harmonize.contract import fields
from harmonize.memory import release_free_memory
from harmonize.profile import Profile
from harmonize.reading.fields import coerce_fields
from harmonize.reading.quarantine import Rejections
from harmonize.reading.text import RawTable, read_table
from harmonize.study import Study

#: progress(stage, done, total) — the CLI turns it into a progress bar.
ProgressCallback = Callable[[str, int, int], None]

EVENT_COLUMNS = (
    "event_id", "event_start", "event_end", "lat", "lon", "depth_min_m", "depth_max_m",
    "bottom_depth_m", "on_bottom", "effort", "effort_unit", "flags", "source_row", "observer_id",
)
# track_start_lat, track_start_lon, track_end_lat, track_end_lon (optional, default null): the
# start and end positions of an event with a track (tow, segment), for twins and maps.
VALUE_COLUMNS = (
    "event_id", "variable", "variable_kind", "life_stage", "quantity", "value", "unit",
    "zero_filled", "flags", "source_record_rows", "n_values", "n_vessels", "no_effort",
    "behavior", "count_observed", "subsample_fraction", "provider_record_id",
)
# behavior (optional, default null): Darwin Core behavior of the counted animals (seabirds
# "in_flight" / "on_water"); part of the record key, so both can be stored for one taxon.
# count_observed, subsample_fraction (optional, default null): for a count raised from a
# subsample, the number counted and the share counted (value = count_observed / fraction).
# provider_record_id (optional, default null): the provider's id(s) of the records behind a value.
# no_effort (optional, default False): the value is not sampled by the event's effort (e.g. a
# temperature measured during a haul); its effort, effort_unit and density stay null.


@dataclass
class InputFile:
    """One input file and its accounting."""

    role: str
    path: Path
    sha256: str
    rows_read: int
    rows_accepted: int
    rows_quarantined: int


@dataclass
class AdapterOutput:
    """What an adapter hands to the pipeline.

    ``events`` has one row per accepted event with :data:`EVENT_COLUMNS` (event_start in
    UTC, lat/lon the event's representative point); ``values`` one row per (event,
    variable, quantity, life_stage) with :data:`VALUE_COLUMNS`; ``quarantine`` one row per
    rejected input row (source_file, source_row, reason_code, message, raw); ``files`` the
    per-file accounting. Events may also carry pre-computed tags (cell_id, season,
    season_year, depth_layer) which the pipeline then keeps.

    An adapter whose values would not fit in memory at once gives a ``value_source``
    (:class:`~harmonize.adapters.value_source.ValueSource`) instead: the pipeline then asks
    it for the values a run of events at a time, and ``values`` is made only when read.
    """

    events: pd.DataFrame
    values: pd.DataFrame
    quarantine: pd.DataFrame
    files: list[InputFile]
    notes: list[str] = field(default_factory=list)
    #: (file name, latitudes, longitudes) of the positions read, for the swapped-coordinates note
    positions: list[tuple[str, np.ndarray, np.ndarray]] = field(default_factory=list)
    #: For inputs whose "rows" are grid values or pings: values rejected in bulk and counted,
    #: not stored one by one (columns source_file, reason_code, n_values, message). They are
    #: part of the file's rows_quarantined.
    masked: pd.DataFrame = field(default_factory=lambda: pd.DataFrame(
        {"source_file": [], "reason_code": [], "n_values": [], "message": []}))
    #: Ping sources: the pings at the edges of each vessel's part of the file
    #: (:data:`harmonize.parts.EDGE_COLUMNS` but source_id); the store joins them across the
    #: files of the source (harmonize.parts). None for every other input.
    track_edges: pd.DataFrame | None = None
    #: Ping sources: the cell-periods the owned edge pings lie in, as events and values of 0
    #: hours: the store keeps them as the templates of the parts its view adds.
    edge_events: pd.DataFrame | None = None
    edge_values: pd.DataFrame | None = None
    #: Values made on demand (see above); None when ``values`` holds them.
    value_source: ValueSource | None = None


def _values(self: AdapterOutput) -> pd.DataFrame:
    """The values as one frame; made from ``value_source`` (once) when it gives them."""
    if self._values is None and self.value_source is not None:
        self._values = self.value_source.frame()
    return self._values


def _set_values(self: AdapterOutput, values: pd.DataFrame | None) -> None:
    self._values = values


# ``values`` stays a field of the dataclass (its __init__ and dataclasses.replace set it),
# read through this property so that a value source's frame is made only when someone reads it
AdapterOutput.values = property(_values, _set_values)  # type: ignore[assignment]


class Adapter(ABC):
    """A source kind. Subclasses set the class attributes and implement :meth:`read`.

    Register a built-in adapter with ``register(MyAdapter)`` at the bottom of its module;
    an outside package exposes its class in the ``harmonize.adapters`` entry-point group.
    """

    kind: ClassVar[str]
    description: ClassVar[str]
    #: table role -> Table Schema name in harmonize.schemas; one-table kinds use "rows".
    tables: ClassVar[Mapping[str, str]]

    # What the rest of the tool knows of a kind: every per-kind list (profile kinds, export
    # selections, the audit's kind sets and order, the store's row tracing, Darwin Core effort
    # words, the starter profiles) is derived from these attributes through the registry.

    #: Events sample organisms (rows of the wide matrix, Darwin Core events and occurrences,
    #: places a survey can plan); False for physical grids and fishing activity.
    is_sample: ClassVar[bool] = True
    #: Every accepted data row is found again by file and row number in the store (store
    #: check); False where the "rows" are grid values or pings counted in bulk.
    row_traced: ClassVar[bool] = True
    #: The events' effort in words (Darwin Core samplingEffort); None: no sampling effort.
    effort_words: ClassVar[str | None] = None
    #: The effort's short name in the audit report ("area swept", "fishing hours").
    effort_label: ClassVar[str] = "effort"
    #: A value spans files (a season of a grid in two yearly files, a cell's fishing in many
    #: daily ping files): each ingest writes its part and the store merges the parts of the
    #: live ingests of a source (harmonize.parts).
    merges_parts: ClassVar[bool] = False
    #: With ``merges_parts``: the parts of a value add up (hours of fishing in many files), and a
    #: merged value of zero is no value (a cell-period only a file's edge touched); False: the
    #: merged value is the area-weighted mean of the parts (a cell's value on a grid).
    parts_add_up: ClassVar[bool] = False
    #: Its values are physical fields on a grid of cells (a model or satellite product): they
    #: are colocated with the samples (harmonize.colocate, the wide table's gridded_ columns)
    #: and compared with in-situ measurements in the audit, never counted among them.
    grid_values: ClassVar[bool] = False
    #: Its rows locate fishing vessels: a value behind fewer than ``[confidentiality]
    #: min_vessels`` vessels is withheld or summed into coarser blocks (rule of three, see
    #: harmonize.disclosure), and a rejected row's text is withheld from the quarantine listing.
    locates_vessels: ClassVar[bool] = False
    #: Yearly effort totals add this kind's effort up (False: gridded valid pixel area).
    sums_effort: ClassVar[bool] = True
    #: What one event is called where events of kinds are counted apart ("samples" for
    #: samples; cell-periods of grids and fleets are never added to samples).
    events_called: ClassVar[str] = "samples"
    #: Events say where fishing happened, not where anyone sampled (no thin_samples or
    #: coverage findings; fishing effort in Darwin Core events).
    is_fishing_effort: ClassVar[bool] = False
    #: The source follows a sampling design: a gap is an error and strata are checked;
    #: False (volunteers, fleets): gaps are warnings.
    designed: ClassVar[bool] = True
    #: Its records are compared with other sources' for twins (probable_duplicate).
    finds_twins: ClassVar[bool] = False
    #: provider_type and protocol written into a starter profile (harmonize init).
    default_provider_type: ClassVar[str] = "agency"
    default_protocol: ClassVar[str | None] = None
    #: Position among the kinds in reports and listings (lower first; ties by name).
    display_order: ClassVar[int] = 100
    #: The profile sections of this kind beyond [source], [columns], [units], [constants]
    #: and [formats] (see docs/sources/<kind>.md); an unknown section is refused.
    profile_sections: ClassVar[Mapping[str, Table | Map]] = {}
    #: Those sections, commented, with their defaults: the end of a starter profile.
    profile_example: ClassVar[str] = ""
    #: A worked example profile written by ``harmonize init`` instead of the generated template.
    profile_starter: ClassVar[str | None] = None
    #: Fields are typed by reading.fields.coerce_fields, which applies [formats] (degrees and
    #: minutes, percent); False for kinds that read their files otherwise.
    reads_formats: ClassVar[bool] = True
    #: A date-time field may be mapped onto two provider columns ([date, time]).
    joins_date_time: ClassVar[bool] = False
    #: Table roles read and typed in blocks of rows (:mod:`harmonize.reading.blocks`):
    #: text fields come back as categoricals and the raw table reads rejected rows' text again.
    reads_in_blocks: ClassVar[tuple[str, ...]] = ()

    def table_fields(self) -> dict[str, set[str]]:
        """Field names per table role, for profile validation."""
        return {role: {f.name for f in fields(schema)} for role, schema in self.tables.items()}

    def read_fields(
        self, inputs: Mapping[str, Path], profile: Profile, rejections: Rejections
    ) -> tuple[dict[str, RawTable], dict[str, pd.DataFrame]]:
        """Read each of the adapter's tables as text and type its fields.

        Returns the raw tables and the typed field frames by role; bad cells and malformed
        lines go to ``rejections``.
        """
        raw: dict[str, RawTable] = {}
        typed: dict[str, pd.DataFrame] = {}
        for role, schema in self.tables.items():
            if role in self.reads_in_blocks and Path(inputs[role]).suffix.lower() != ".parquet":
                from harmonize.reading.blocks import read_typed_blocks

                raw[role], typed[role] = read_typed_blocks(inputs[role], profile, role, fields(schema), rejections, schema)
                continue
            table, malformed = read_table(inputs[role], profile, role)
            raw[role] = table
            typed[role] = coerce_fields(table, fields(schema), profile, rejections, schema, malformed)
            del table, malformed
            release_free_memory()  # the typing's temporaries: not counted in the next table's peak
        return raw, typed

    @abstractmethod
    def read(
        self,
        inputs: Mapping[str, Path],
        profile: Profile,
        study: Study,
        progress: ProgressCallback | None = None,
    ) -> AdapterOutput:
        """Read, validate and convert the inputs (role -> file) of one ingest."""


def finish(
    tables: list[RawTable],
    rejections: Rejections,
    events: pd.DataFrame,
    values: pd.DataFrame | ValueSource,
    notes: list[str] | None = None,
) -> AdapterOutput:
    """Build the AdapterOutput with per-file accounting from the rejections.

    ``values`` is a frame, or a :class:`~harmonize.adapters.value_source.ValueSource` that
    makes them on demand.
    """
    source = values if isinstance(values, ValueSource) else None
    files = []
    for t in tables:
        n_bad = rejections.count(t.role)
        files.append(
            InputFile(
                role=t.role,
                path=t.path,
                sha256=t.sha256,
                rows_read=t.n_rows,
                rows_accepted=t.n_rows - n_bad,
                rows_quarantined=n_bad,
            )
        )
    return AdapterOutput(
        events=events.reset_index(drop=True),
        values=None if source is not None else values.reset_index(drop=True),
        quarantine=rejections.to_frame(tables),
        files=files,
        positions=list(rejections.positions),
        notes=list(notes or []),
        value_source=source,
    )
