"""The ingest pipeline: adapter -> tagging -> observation rows -> store."""

from __future__ import annotations

import dataclasses
import hashlib
import json
import logging
import uuid
from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pyarrow as pa

from harmonize import connections, parts, twin_windows, twins
from harmonize.adapters.base import Adapter, AdapterOutput, InputFile, ProgressCallback
from harmonize.adapters.domain import swapped_position_notes
from harmonize.adapters.registry import adapter_class, get_adapter, list_adapters
from harmonize.clock import utc_naive
from harmonize.contract import CONTRACT_VERSION, observation_sql_columns, validate_observations
from harmonize.engines import engine_scope
from harmonize.errors import ConfigError, DuplicateIngestError, HarmonizeError
from harmonize.files import digests_known, file_sha256
from harmonize.membership import codes_in, distinct_present, is_in
from harmonize.memory import release_free_memory
from harmonize.profile import Profile, find_profile, load_profile, peek_kind
from harmonize.sql import sql_text
from harmonize.store import IngestRecord, Store
from harmonize.study import Study
from harmonize.tagging import (
    Grid,
    assign_strata,
    calendar_year,
    normalise_lon,
    tag_depth_layer,
    tag_season,
)
from harmonize.units import density_unit_sql

# the volunteer twins are recomputed at every commit: a hook of the store that the pipeline installs
twins.install()

logger = logging.getLogger(__name__)


@dataclass
class IngestResult:
    """What an ingest (or a check) did."""

    status: str  # complete | unchanged | checked
    source_id: str
    source_kind: str
    ingest_id: str | None
    files: list[InputFile]
    records_written: int = 0
    records_zero_filled: int = 0
    quarantine: pd.DataFrame = field(default_factory=pd.DataFrame)
    superseded: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    masked: pd.DataFrame = field(default_factory=pd.DataFrame)
    #: accepted events that yield no observation row (see :meth:`Assembly.events_without_values`)
    events_without_values: pd.DataFrame = field(default_factory=pd.DataFrame)

    @property
    def rows_read(self) -> int:
        return sum(f.rows_read for f in self.files)

    @property
    def rows_accepted(self) -> int:
        return sum(f.rows_accepted for f in self.files)

    @property
    def rows_quarantined(self) -> int:
        return sum(f.rows_quarantined for f in self.files)

    def reasons(self) -> pd.Series:
        """Quarantined rows (and values rejected in bulk) by reason code."""
        counts = (self.quarantine["reason_code"].value_counts() if not self.quarantine.empty
                  else pd.Series(dtype="int64"))
        if not self.masked.empty:
            counts = counts.add(self.masked.groupby("reason_code")["n_values"].sum(), fill_value=0)
        return counts.astype("int64").sort_values(ascending=False)


def prepare(study: Study, profile: str | Path) -> tuple[Adapter, Profile]:
    """The adapter and validated profile for a profile name or path."""
    path = find_profile(study, profile)
    adapter = get_adapter(peek_kind(path))
    return adapter, load_profile(path, study, adapter.table_fields())


def assign_inputs(adapter: Adapter, profile: Profile, files: Sequence[str | Path] = (),
                  events: str | Path | None = None, records: str | Path | None = None) -> list[dict[str, Path]]:
    """Group input files into ingests: one per file for one-table kinds, one pair otherwise."""
    roles = list(adapter.tables)
    if roles == ["rows"] or "rows" in roles:
        if events or records:
            raise ConfigError(profile.path, "source.kind", f"a {adapter.kind} source reads one table; pass the file(s) without --events/--records")
        if not files:
            raise ConfigError(profile.path, None, "no input files given")
        return [{"rows": Path(f)} for f in files]
    if files and not (events or records) and len(files) == 2:
        events, records = files
    elif files:
        raise ConfigError(profile.path, "source.kind",
                          f"a {adapter.kind} source reads two tables; pass --events FILE --records FILE")
    if not events or not records:
        raise ConfigError(profile.path, "source.kind",
                          f"a {adapter.kind} source needs both --events FILE and --records FILE")
    return [{"events": Path(events), "records": Path(records)}]


def run(
    study: Study,
    profile: str | Path,
    inputs: Mapping[str, Path],
    *,
    write: bool = True,
    replace: bool = False,
    progress: ProgressCallback | None = None,
    engine: str | None = None,
    scheduler: str | None = None,
    dry_run: bool = False,
    notice: Callable[[str], None] | None = None,
) -> IngestResult:
    """Validate and harmonise one set of inputs; with ``write``, commit them to the store.

    An ingest is identified by its source, its main input's path relative to the study (as
    given when outside it) and the content of its inputs. Re-ingesting the same file(s) with
    the same configuration is a no-op ("unchanged"). The same file (path) with other content,
    or the same content under another configuration, needs ``replace=True``, which supersedes
    the earlier ingest; ``notice`` is told which ingests are replaced before anything is read.
    Another file that only shares the base name is a new ingest. ``dry_run`` does all of that
    but writing ("would replace ...").

    ``engine`` ("duckdb" or "dask"; default: ``HARMONIZE_ENGINE`` or "duckdb") runs the
    steps that support it (ping tracks -> fishing hours) on that engine; ``scheduler`` is
    the address of a Dask scheduler (see :mod:`harmonize.engines`). The result is the same.
    """
    with digests_known():  # each input is read once for its sha256
        return _run(study, profile, inputs, write=write, replace=replace, progress=progress, engine=engine,
                    scheduler=scheduler, dry_run=dry_run, notice=notice)


def _run(study: Study, profile: str | Path, inputs: Mapping[str, Path], *, write: bool, replace: bool,
         progress: ProgressCallback | None, engine: str | None, scheduler: str | None, dry_run: bool,
         notice: Callable[[str], None] | None) -> IngestResult:
    adapter, prof = prepare(study, profile)
    for role, path in inputs.items():
        if not Path(path).is_file():
            raise HarmonizeError(f"{path}: no such file ({role})")
    shas = {role: file_sha256(Path(p)) for role, p in inputs.items()}
    main_role = "events" if "events" in inputs else next(iter(inputs))
    inputs_sha = _digest(sorted(shas.items()))
    config_sha = _digest([prof.fingerprint, study.fingerprint, CONTRACT_VERSION])
    main_path = study_path(study, inputs[main_role])
    store = Store(study.store_dir)

    if write or dry_run:
        previous = store.previous_ingests(prof.source_id, main_path, inputs_sha)
        same = previous[(previous["inputs_sha256"] == inputs_sha) & (previous["config_sha256"] == config_sha)]
        if len(same):
            logger.info("%s: already ingested with this configuration; nothing to do", main_path)
            return IngestResult("unchanged", prof.source_id, adapter.kind, str(same["ingest_id"].iloc[-1]), [],
                                notes=[f"{main_path} was already ingested with this configuration (ingest {same['ingest_id'].iloc[-1]}); nothing to do"])
        if len(previous) and not replace:
            raise DuplicateIngestError(_duplicate_message(previous, main_path))
        if len(previous) and notice is not None:
            notice(f"{'would replace' if dry_run else 'replacing'} {describe_ingests(previous)}")

    started = pd.Timestamp.now("UTC").tz_localize(None)
    logger.info("reading %s with profile %s (%s adapter)", ", ".join(Path(p).name for p in inputs.values()),
                prof.path.name, adapter.kind)
    with engine_scope(engine, scheduler):
        out = adapter.read(inputs, prof, study, progress)
    release_free_memory()  # what reading freed is not reused by the block-wise writing
    logger.info("%s: %d rows read, %d accepted, %d quarantined", main_path, sum(f.rows_read for f in out.files),
                sum(f.rows_accepted for f in out.files), sum(f.rows_quarantined for f in out.files))
    logger.debug("input sha256 %s, configuration sha256 %s", inputs_sha, config_sha)
    return store_output(study, prof, adapter.kind, out, write=write and not dry_run, replace=replace,
                        inputs_sha256=inputs_sha, config_sha256=config_sha, started=started, consume=True)


def _finds_twins(kind: str) -> bool:
    adapter = list_adapters().get(kind)
    return adapter is not None and adapter.finds_twins


def study_path(study: Study, path: str | Path) -> str:
    """A file's path relative to the study folder (posix), or its full path when outside it."""
    full = Path(path).resolve()
    try:
        return full.relative_to(study.root).as_posix()
    except ValueError:
        return full.as_posix()


def describe_ingests(previous: pd.DataFrame) -> str:
    """'ingest <id> of <path> (started <time>)', joined, for messages."""
    described = []
    for r in previous.itertuples():
        path = r.file_path if isinstance(r.file_path, str) and r.file_path else r.file_name
        started = f" (started {pd.Timestamp(r.started_at):%Y-%m-%d %H:%M} UTC)" if "started_at" in previous else ""
        described.append(f"ingest {r.ingest_id} of {path}{started}")
    return "; ".join(described)


def store_output(
    study: Study,
    profile: Profile,
    kind: str,
    out: AdapterOutput,
    *,
    write: bool = True,
    replace: bool = False,
    inputs_sha256: str | None = None,
    config_sha256: str | None = None,
    started: pd.Timestamp | None = None,
    consume: bool = False,
) -> IngestResult:
    """Tag, assemble and (with ``write``) commit an adapter's output to the store.

    ``run`` calls this after ``adapter.read``; tests and outside tools can call it with an
    AdapterOutput they built themselves. With ``consume`` the caller hands ``out`` over: its
    events frame is emptied once the events are tagged, so that its memory is free while the
    rows are made (``run`` does this; the output cannot be stored again).
    """
    _check_accounting(out)
    started = started if started is not None else pd.Timestamp.now("UTC").tz_localize(None)
    main = _main_file(out)
    main_name = Path(main).name
    main_path = study_path(study, main)
    shas = {f.role: f.sha256 for f in out.files}
    inputs_sha = inputs_sha256 or _digest(sorted(shas.items()))
    config_sha = config_sha256 or _digest([profile.fingerprint, study.fingerprint, CONTRACT_VERSION])
    ingest_id = f"{started:%Y%m%dT%H%M%S%f}-{uuid.uuid4().hex[:8]}"  # sorts by start time
    assembly = Assembly(out, study, profile, kind, ingest_id, consume=consume)
    blocks = assembly.blocks()
    notes = list(out.notes) + swapped_position_notes(study, out.positions)
    result = IngestResult("checked", profile.source_id, kind, None, out.files, 0, 0, out.quarantine, notes=notes)
    result.masked = out.masked
    if not write:
        for block in blocks:
            result.records_written += block.num_rows
            result.records_zero_filled += _zero_filled(block)
        result.events_without_values = assembly.events_without_values().to_pandas()
        return result

    store = Store(study.store_dir)
    adapter_cls = adapter_class(kind)
    files = [{"role": f.role, "file_name": f.path.name, "file_sha256": f.sha256, "rows_read": f.rows_read,
              "rows_accepted": f.rows_accepted, "rows_quarantined": f.rows_quarantined} for f in out.files]
    main_file = next(f for f in out.files if f.path == main)
    record = IngestRecord(
        ingest_id=ingest_id, source_id=profile.source_id, source_kind=kind,
        provider_type=profile.provider_type, file_name=main_name, file_sha256=main_file.sha256,
        inputs_sha256=inputs_sha, config_sha256=config_sha, started_at=started,
        finished_at=started, rows_read=result.rows_read,
        rows_accepted=result.rows_accepted, rows_quarantined=result.rows_quarantined,
        records_written=0, records_zero_filled=0,
        profile_file=profile.path.name,
        hook_data={twin_windows.HOOK_NAME: twin_windows.twin_settings(profile.section("duplicates"), profile.path)}
        if _finds_twins(kind) else {},
        file_path=main_path,
        row_traced=adapter_cls.row_traced,
        merge_rule=parts.merge_rule(adapter_cls.merges_parts, adapter_cls.parts_add_up),
    )
    staged = store.staging_dir(ingest_id)
    try:
        # the store decides where and how the rows are written; each file carries the record
        result.records_written, result.records_zero_filled = store.write_observations(staged, blocks, record, files)
        no_values = assembly.events_without_values()
        result.events_without_values = no_values.to_pandas()
        record.records_written, record.records_zero_filled = result.records_written, result.records_zero_filled
        record.finished_at = pd.Timestamp.now("UTC").tz_localize(None)

        def on_conflict(previous: pd.DataFrame) -> list[str]:
            same = previous[(previous["inputs_sha256"] == inputs_sha) & (previous["config_sha256"] == config_sha)]
            if len(same):
                raise DuplicateIngestError(
                    f"{main_path} was ingested by another process meanwhile (ingest {same['ingest_id'].iloc[-1]})")
            if len(previous) and not replace:
                raise DuplicateIngestError(_duplicate_message(previous, main_path))
            return list(previous["ingest_id"])

        edges = templates = None
        if out.track_edges is not None:
            # ping files: the pings at the edges of each vessel's part and the rows of their
            # cell-periods, which the store joins across the files of the source (harmonize.parts)
            edges = pa.Table.from_pandas(out.track_edges, preserve_index=False)
            if out.edge_events is not None and len(out.edge_events):
                templates = assemble(dataclasses.replace(out, events=out.edge_events, values=out.edge_values),
                                     study, profile, kind, ingest_id)
        superseded = store.commit(record, files, staged, out.quarantine, [], on_conflict, masked=out.masked,
                                  events_without_values=no_values, track_edges=edges, edge_parts=templates)
        logger.info("ingest %s committed: %d observation rows", ingest_id, result.records_written)
        if edges is not None and edges.num_rows:
            with store.connect(read_only=True, view=False) as con:
                note = parts.overlapping_tracks(con, profile.source_id, ingest_id)
            if note:
                result.notes.append(note)
    finally:
        store.discard(staged)
    result.status, result.ingest_id, result.superseded = "complete", ingest_id, superseded
    return result


def _duplicate_message(previous: pd.DataFrame, name: str) -> str:
    return (f"{name} (or a file with the same content) was already ingested for this source "
            f"({describe_ingests(previous)}) with different content or configuration; "
            "use --replace to supersede it (--dry-run shows what it replaces), "
            "or rename the source in the profile if it is new data")


def _digest(parts: object) -> str:
    return hashlib.sha256(json.dumps(parts, sort_keys=True, default=str).encode()).hexdigest()


def _check_accounting(out: AdapterOutput) -> None:
    for f in out.files:
        if f.rows_read != f.rows_accepted + f.rows_quarantined:
            raise HarmonizeError(
                f"internal accounting error in {f.path.name}: {f.rows_read} rows read, "
                f"{f.rows_accepted} accepted + {f.rows_quarantined} quarantined; please report this"
            )


_EVENT_ARROW = pa.schema([
    ("event_id", pa.string()), ("event_start", pa.timestamp("us", tz="UTC")),
    ("event_end", pa.timestamp("us", tz="UTC")), ("year", pa.int32()), ("season_year", pa.int32()), ("season", pa.string()), ("depth_layer", pa.string()),
    ("lat", pa.float64()), ("lon", pa.float64()), ("cell_id", pa.string()), ("stratum", pa.string()),
    ("depth_min_m", pa.float64()), ("depth_max_m", pa.float64()), ("bottom_depth_m", pa.float64()),
    ("effort", pa.float64()), ("effort_unit", pa.string()), ("observer_id", pa.string()),
    ("event_flags", pa.list_(pa.string())), ("source_row", pa.int64()), ("gear", pa.string()),
    ("track_start_lat", pa.float64()), ("track_start_lon", pa.float64()),
    ("track_end_lat", pa.float64()), ("track_end_lon", pa.float64()),
])
_VALUE_ARROW = pa.schema([
    ("event_id", pa.string()), ("variable", pa.string()), ("variable_kind", pa.string()),
    ("life_stage", pa.string()), ("quantity", pa.string()), ("value", pa.float64()), ("unit", pa.string()),
    ("zero_filled", pa.bool_()), ("value_flags", pa.list_(pa.string())),
    ("source_record_rows", pa.list_(pa.int64())), ("n_values", pa.int32()), ("n_vessels", pa.int32()),
    ("no_effort", pa.bool_()), ("behavior", pa.string()),
    ("count_observed", pa.float64()), ("subsample_fraction", pa.float64()), ("provider_record_id", pa.string()),
])
#: Mergeable parts of a value that spans files (harmonize.parts): written to the parquet files
#: beside the contract's columns when the adapter gives them; the store's view merges them.
_PART_ARROW = pa.schema([
    ("part_sum", pa.float64()), ("part_weight", pa.float64()), ("part_steps", pa.float64()),
    ("vessel_ids", pa.list_(pa.string())),
])


def tag_events(events: pd.DataFrame, study: Study, in_place: bool = False) -> pd.DataFrame:
    """Add year, season, season_year, depth_layer, cell_id and stratum to events.

    Tags an adapter already set (non-null) are kept. With ``in_place`` the columns are added
    to ``events`` itself (no copy: for a caller that owns the frame).
    """
    ev = events if in_place else events.copy()
    ev["lon"] = normalise_lon(ev["lon"].to_numpy(float))
    start = pd.to_datetime(ev["event_start"])
    season, season_year = tag_season(start, study.seasons, study.timezone)
    ev["year"] = calendar_year(start, study.timezone)
    ev["season"] = _keep(ev, "season", season)
    ev["season_year"] = _keep(ev, "season_year", season_year)
    on_bottom = ev["on_bottom"].fillna(False).to_numpy(bool) if "on_bottom" in ev else None
    layers = tag_depth_layer(ev["depth_min_m"], ev["depth_max_m"], ev["bottom_depth_m"],
                             study.depth_layers, study.near_bottom_m, on_bottom)
    ev["depth_layer"] = _keep(ev, "depth_layer", pd.Series(layers, index=ev.index, dtype="string"))
    grid = Grid(study.crs, study.cell_size_km)
    lon, lat = ev["lon"].to_numpy(float), ev["lat"].to_numpy(float)
    cells = grid.cell_ids(lon, lat)
    cells.index = ev.index
    ev["cell_id"] = _keep(ev, "cell_id", cells)
    ev["stratum"] = _keep(ev, "stratum", pd.Series(assign_strata(study.strata, lon, lat), index=ev.index, dtype="string"))
    return ev


def _to_arrow(frame: pd.DataFrame, schema: pa.Schema) -> pa.Table:
    """Column-by-column conversion with explicit types (robust for empty frames).

    Columns convert in Arrow's C++ code; a column Arrow refuses (mixed Python types) takes
    the slower route through Python objects, which gives the same result or the same error.
    """
    arrays = []
    for fld in schema:
        col = frame[fld.name]
        if pa.types.is_list(fld.type):
            arrays.append(_list_array(col, fld.type))
        elif pa.types.is_timestamp(fld.type):
            arrays.append(pa.array(utc_naive(col).to_numpy(), type=fld.type, from_pandas=True))
        else:
            try:
                arrays.append(pa.array(col, type=fld.type, from_pandas=True))
            except (pa.ArrowInvalid, pa.ArrowTypeError, TypeError, ValueError):
                arrays.append(pa.array(col.astype(object).where(col.notna(), None).tolist(), type=fld.type))
    return pa.Table.from_arrays(arrays, schema=schema)


def _list_array(col: pd.Series, typ: pa.DataType) -> pa.Array:
    """A list column from cells that are lists, tuples or arrays; any other cell becomes []."""
    if isinstance(col.dtype, pd.ArrowDtype) and pa.types.is_list(col.dtype.pyarrow_dtype):
        # an Arrow list column already: no Python list per row
        arr = pa.array(col).cast(typ)
        return pa.compute.if_else(arr.is_null(), pa.scalar([], type=typ), arr) if arr.null_count else arr
    values = col.to_numpy(dtype=object)
    try:  # lists and arrays convert in C++; None, NaN and pd.NA become nulls
        arr = pa.array(values, type=typ, from_pandas=True)
    except (pa.ArrowInvalid, pa.ArrowTypeError, TypeError, ValueError):
        cast = int if pa.types.is_integer(typ.value_type) else (lambda x: x)
        arr = pa.array([[cast(x) for x in v] if isinstance(v, list | tuple | np.ndarray) else [] for v in values],
                       type=typ)
    if arr.null_count:
        arr = pa.compute.if_else(arr.is_null(), pa.scalar([], type=typ), arr)
    return arr


def _keep(frame: pd.DataFrame, column: str, computed: pd.Series) -> pd.Series:
    if column in frame and frame[column].notna().any():
        return frame[column].where(frame[column].notna(), computed)
    return computed


#: Observation rows made (and written) per block: memory holds one block of rows, not all of them.
#: Each row of a block costs about 3 KB of peak memory while it is made and written (the
#: values, their Arrow columns, DuckDB's result, the writer's queue and parquet buffers):
#: 100,000 rows keep that part of a trawl ingest's peak near 0.4 GB (BENCHMARKS.md).
BLOCK_ROWS = 100_000
#: Rows of the assembled output checked against the contract (pandera), spread over the blocks.
SAMPLE_ROWS = 200_000
#: Sampled rows checked in one call of the contract check (its fixed cost is per call).
CHECK_ROWS = 20_000


#: SQL: the row has a density (value / effort): counts and biomass with a positive effort
_HAS_DENSITY = "v.quantity IN ('count', 'biomass') AND NOT v.no_effort AND e.effort > 0"


def assemble(out: AdapterOutput, study: Study, profile: Profile, kind: str, ingest_id: str) -> pa.Table:
    """Join tagged events and values into observation rows, in contract column order.

    The whole output as one table; :class:`Assembly` gives the same rows block by block.
    """
    blocks = list(Assembly(out, study, profile, kind, ingest_id).blocks())
    return pa.concat_tables(blocks) if len(blocks) > 1 else blocks[0]


def assemble_blocks(out: AdapterOutput, study: Study, profile: Profile, kind: str, ingest_id: str,
                    block_rows: int | None = None) -> Iterator[pa.Table]:
    """Observation rows in blocks of at most ``block_rows`` rows, in store order (:meth:`Assembly.blocks`)."""
    return Assembly(out, study, profile, kind, ingest_id, block_rows).blocks()


class Assembly:
    """The observation rows of one adapter output, made block by block, and the accepted
    events that yield none.

    The output's events are tagged once and held as Arrow columns; with ``consume`` the
    output's events frame is tagged in place and then emptied, so that its memory is free
    before the rows are made (:func:`run` hands its output over so). :meth:`blocks` makes
    the rows; after the last block, :meth:`events_without_values` lists the events none of
    whose values became a row, as seen in the rows themselves.
    """

    def __init__(self, out: AdapterOutput, study: Study, profile: Profile, kind: str, ingest_id: str,
                 block_rows: int | None = None, consume: bool = False) -> None:
        self.block_rows = block_rows or BLOCK_ROWS
        if consume:  # the caller hands the events over: tagged in place, and the output keeps none
            events, out.events = out.events, out.events.iloc[:0]
            ev = tag_events(events, study, in_place=True)
            del events
        else:
            ev = tag_events(out.events, study)
        ev = ev.rename(columns={"flags": "event_flags"})
        for col in _EVENT_ARROW.names:
            if col not in ev:
                ev[col] = None
        self.events = _dictionary_tags(_to_arrow(ev, _EVENT_ARROW))  # flags that are not lists become []
        self.unique = bool(ev["event_id"].is_unique)
        self.rank = _event_rank(ev)
        del ev
        release_free_memory()  # the tagged frame, now Arrow columns
        self.event_index = pd.Index(self.events["event_id"].to_pandas(types_mapper=pd.ArrowDtype)
                                    .astype(pd.StringDtype("pyarrow")))
        self.values, self.value_source = out.values if out.value_source is None else None, out.value_source
        self.params = [ingest_id, profile.source_id, kind, profile.provider_type, profile.protocol,
                       Path(_main_file(out)).name]
        self._effort_units = _distinct_text(self.events["effort_unit"])
        self._selects: dict[tuple, str] = {}
        self._valued: np.ndarray | None = None  # events with a row, once every block was made

    def _all_values(self) -> pd.DataFrame:
        if self.values is None:
            self.values = self.value_source.frame()  # type: ignore[union-attr]
        return self.values

    def blocks(self) -> Iterator[pa.Table]:
        """Observation rows in blocks of at most ``block_rows`` rows (default :data:`BLOCK_ROWS`), in store order.

        Yields at least one table (an empty one when there are no values). The blocks, put
        end to end, are the rows :func:`assemble` returns; a block is made only when the
        previous one has been consumed, so a caller that writes each block holds one block of
        rows at a time. Values are kept as Arrow columns (strings dictionary-encoded when the
        adapter gave categoricals) until their block is made. When the adapter gives a value
        source (:class:`~harmonize.adapters.value_source.ValueSource`), its values are asked
        for a run of events at a time, in store order, and never held all at once. The rows
        are checked against the contract on a sample (:class:`_ContractSample`).
        """
        block_rows = self.block_rows
        valued = np.zeros(self.events.num_rows, dtype=bool)
        con = connections.connect()
        try:
            if not self.unique:
                # a hash join over all rows (events whose ids repeat are rare and small)
                values = self._all_values()
                va_tab = _values_to_arrow(values)
                con.register("ev", self.events)
                con.register("va", _decoded(va_tab))
                select = self._select_sql(con, va_tab, values.columns)
                table = con.sql(f"SELECT {select} FROM va v JOIN ev e USING (event_id)", params=self.params).to_arrow_table()
                missing = con.execute("SELECT count(*) FROM va v ANTI JOIN ev e USING (event_id)").fetchall()[0][0]
                if missing:
                    raise HarmonizeError(f"internal error: {missing} values have no event; please report this")
                con.unregister("va")
                del va_tab
                valued = is_in(pd.Series(self.event_index), distinct_present(values["event_id"]))
                starts = range(0, max(table.num_rows, 1), block_rows)
                check = _ContractSample(len(starts))
                for i in starts:
                    block = table.slice(i, block_rows)
                    check.add(block, i)
                    yield block
                check.finish()
                self._valued = valued
                return
            runs: Iterator[tuple[np.ndarray | None, pd.DataFrame]]
            if self.value_source is None:
                runs = iter([(None, self._all_values())])
                n_blocks = -(-max(len(self.values), 1) // block_rows)
            else:
                runs = self.value_source.blocks(np.argsort(self.rank, kind="stable"), block_rows)
                n_blocks = max(_VALUE_ROWS_PER_EVENT * len(self.rank), 1) // block_rows + 1
            check = _ContractSample(n_blocks)
            done = 0
            empty = None
            for position, values in runs:
                if not len(values):
                    empty = values
                    continue
                for block in self._positional_blocks(con, values, position, valued):
                    check.add(block, done)
                    done += block.num_rows
                    yield block
            if not done:  # no values: one empty table
                for block in self._positional_blocks(con, self._all_values() if empty is None else empty, None, valued):
                    check.add(block, 0)
                    yield block
            check.finish()
            self._valued = valued
        finally:
            con.close()

    def _positional_blocks(self, con: duckdb.DuckDBPyConnection, values: pd.DataFrame, position: np.ndarray | None,
                           valued: np.ndarray) -> Iterator[pa.Table]:
        """Observation rows of ``values`` (events with distinct ids) in blocks, in the order of
        their events' ranks (values of one event in their given order); one empty table when
        ``values`` is empty. ``position``: each value's event row, when its source knows it
        (checked against the event ids); else found by id. Marks the events in ``valued``."""
        va_tab = _values_to_arrow(values)
        if position is None:
            # each value's event row, found by integer code when the adapter gave categoricals
            position = codes_in(values["event_id"], self.event_index).astype(np.int64)
        else:
            position = np.asarray(position, dtype=np.int64)
            self._check_positions(values["event_id"], position)
        missing = int((position < 0).sum())
        if missing:
            raise HarmonizeError(f"internal error: {missing} values have no event; please report this")
        valued[position] = True
        order = np.argsort(self.rank[position], kind="stable")
        # each block: its values (taken in store order) beside their event rows, by position;
        # the POSITIONAL JOIN keeps that order, which a hash join would not
        sql = f"SELECT {self._select_sql(con, va_tab, values.columns)} FROM va v POSITIONAL JOIN ev_rows e"
        del values
        for i in range(0, max(len(order), 1), self.block_rows):
            take = pa.array(order[i:i + self.block_rows], pa.int64())
            con.register("va", va_tab.take(take))
            con.register("ev_rows", self.events.take(pa.array(position[take.to_numpy()], pa.int64())))
            block = con.sql(sql, params=self.params).to_arrow_table()
            con.unregister("va")
            con.unregister("ev_rows")
            yield block

    def _check_positions(self, event_ids: pd.Series, position: np.ndarray) -> None:
        """Refuse event rows given by a value source that are not the values' events."""
        if len(position) != len(event_ids) or (len(position) and (position.min() < 0 or
                                                                   position.max() >= self.events.num_rows)):
            raise HarmonizeError("internal error: a value source gave event rows outside the events; please report this")
        if isinstance(event_ids.dtype, pd.CategoricalDtype):
            # every category at one event row, and that row's id the category: checked per category
            codes = event_ids.cat.codes.to_numpy().astype(np.int64)
            at = np.full(len(event_ids.cat.categories), -1, dtype=np.int64)
            known = codes >= 0
            at[codes[known]] = position[known]
            used = np.flatnonzero(at >= 0)
            same = np.array_equal(at[codes[known]], position[known]) and not (~known).any() and _same_text(
                self.events["event_id"].take(pa.array(at[used])), pa.array(event_ids.cat.categories[used], pa.string()))
        else:
            same = _same_text(self.events["event_id"].take(pa.array(position)),
                                pa.array(event_ids, pa.string(), from_pandas=True))
        if not same:
            raise HarmonizeError("internal error: a value source gave event rows that are not its values' events; "
                                 "please report this")

    def _select_sql(self, con: duckdb.DuckDBPyConnection, va_tab: pa.Table, value_columns: Sequence[str]) -> str:
        """:func:`_select_sql` for these values; made once per set of value units and part columns."""
        units = _distinct_text(va_tab["unit"])
        key = (units, tuple(p.name for p in _PART_ARROW if p.name in value_columns))
        if key not in self._selects:
            self._selects[key] = _select_sql(_density_unit_expr(con, units, self._effort_units), value_columns)
        return self._selects[key]

    def events_without_values(self) -> pa.Table:
        """The accepted events that yield no observation row, tagged, one row per event
        (after :meth:`blocks` has made every block).

        An empty haul under a profile without a zero-filling protocol, or a segment whose bird
        rows all went to quarantine, is accepted but has no value: the store keeps it in its
        ``events_without_values`` table so that its input row stays accounted for. Columns:
        :data:`harmonize.store.EVENTS_WITHOUT_VALUES_COLUMNS` but ingest_id; ``flags`` are the
        event's flags (e.g. catch_incomplete, counts_incomplete when records were rejected).
        """
        if self._valued is None:
            raise HarmonizeError("internal error: events without values asked for before every block was made")
        lonely = self.events.filter(pa.array(~self._valued))
        n = lonely.num_rows
        source_id, kind, provider_type, protocol, source_file = self.params[1:]
        constants = {"source_id": source_id, "source_kind": kind, "provider_type": provider_type,
                     "protocol": protocol, "source_file": source_file}
        arrays = []
        for fld in _NO_VALUES_ARROW:
            if fld.name in constants:
                arrays.append(pa.array([constants[fld.name]] * n, fld.type))
            else:
                arrays.append(lonely["event_flags" if fld.name == "flags" else fld.name].cast(fld.type))
        return pa.Table.from_arrays(arrays, schema=_NO_VALUES_ARROW)


def _dictionary_tags(events: pa.Table) -> pa.Table:
    """The events' text columns but the id dictionary-encoded: tags repeat (a few seasons,
    layers, strata, cells), and each block takes its values' event rows, which costs an
    integer per row instead of a text (5x faster, and about a third of the events' memory)."""
    for i, fld in enumerate(events.schema):
        if pa.types.is_string(fld.type) and fld.name != "event_id":
            events = events.set_column(i, fld.name, pa.compute.dictionary_encode(events.column(i)))
    return events


def _same_text(a: pa.Array | pa.ChunkedArray, b: pa.Array | pa.ChunkedArray) -> bool:
    """Whether two text columns are equal row by row (nulls equal only to nulls; chunks do not matter)."""
    a, b = (c if isinstance(c, pa.ChunkedArray) else pa.chunked_array([c]) for c in (a, b))
    return a.type == b.type and a.equals(b)


def _distinct_text(column: pa.ChunkedArray | pa.Array) -> tuple[str, ...]:
    """The distinct non-null texts of a (possibly dictionary-encoded) column, sorted."""
    if isinstance(column, pa.ChunkedArray):
        chunks = [c.dictionary_decode() if pa.types.is_dictionary(c.type) else c for c in column.chunks]
        column = pa.chunked_array(chunks, type=chunks[0].type) if chunks else pa.array([], pa.string())
    elif pa.types.is_dictionary(column.type):
        column = column.dictionary_decode()
    return tuple(sorted(v for v in pa.compute.unique(column).to_pylist() if v is not None))


class _ContractSample:
    """Checks the observation rows against the contract on a sample: up to ``SAMPLE_ROWS``
    rows in all, spread over the blocks, checked together every :data:`CHECK_ROWS` rows
    (one check per block was most of the check's time: its fixed cost is per call)."""

    def __init__(self, n_blocks: int) -> None:
        self.per_block = max(1_000, SAMPLE_ROWS // max(n_blocks, 1))
        self.pending: list[pa.Table] = []
        self.rows = 0

    def add(self, block: pa.Table, start: int) -> None:
        """Sample ``block`` (the rows from ``start`` on), checking the sample when it is large enough."""
        if block.num_rows == 0:
            validate_observations(block.slice(0, 0).to_pandas())
            return
        per_block = self.per_block
        if block.num_rows <= per_block:
            part = block
        elif per_block >= 20_000:
            part = _sample(block, per_block)
        else:  # one slice at a seeded random place
            at = int(np.random.default_rng(start).integers(0, block.num_rows - per_block + 1))
            part = block.slice(at, per_block)
        # a copy of the sampled rows: a slice would keep its whole block's buffers alive
        part = part.take(pa.array(np.arange(part.num_rows, dtype=np.int64)))
        if self.pending and not part.schema.equals(self.pending[0].schema):
            self.finish()
        self.pending.append(part)
        self.rows += part.num_rows
        if self.rows >= CHECK_ROWS:
            self.finish()

    def finish(self) -> None:
        """Check the rows sampled and not yet checked."""
        if self.pending:
            sample = pa.concat_tables(self.pending) if len(self.pending) > 1 else self.pending[0]
            self.pending, self.rows = [], 0
            validate_observations(sample.to_pandas())


#: Value rows per event assumed when sizing the contract's samples of a value source's blocks.
_VALUE_ROWS_PER_EVENT = 20


def _select_sql(density_unit: str, value_columns: Sequence[str]) -> str:
    """The select list that turns values ``v`` beside their events ``e`` into observation rows,
    each column cast to the contract's type (parameters: ingest id, source id, kind, provider
    type, protocol, source file); ``density_unit``: SQL of the density's unit
    (:func:`_density_unit_expr`)."""
    exprs = {
        "record_id": "substr(md5(concat_ws('|', $2, e.event_id, v.variable, coalesce(v.life_stage, ''), v.quantity, v.behavior)), 1, 24)",  # concat_ws skips a null behavior: ids without one are unchanged
        "ingest_id": "$1", "source_id": "$2", "source_kind": "$3", "provider_type": "$4", "protocol": "$5",
        # density only for counts and biomass; presence-only and no-effort values carry no effort
        "density": f"CASE WHEN {_HAS_DENSITY} THEN v.value / e.effort END",
        "density_unit": f"CASE WHEN {_HAS_DENSITY} THEN {density_unit} END",
        "effort": "CASE WHEN v.quantity = 'presence' OR v.no_effort THEN NULL ELSE e.effort END",
        "effort_unit": "CASE WHEN v.quantity = 'presence' OR v.no_effort THEN NULL ELSE e.effort_unit END",
        # the usual rows (no flag, or one value flag) skip the list sort: the same lists
        "flags": "CASE WHEN len(e.event_flags) = 0 AND len(v.value_flags) = 0 THEN v.value_flags "
                 "WHEN len(e.event_flags) = 0 AND len(v.value_flags) = 1 AND v.value_flags[1] IS NOT NULL "
                 "THEN v.value_flags "
                 "ELSE list_sort(list_distinct(list_concat(e.event_flags, v.value_flags))) END",
        "source_file": "$6",
    }
    select = []
    for col, typ in dict(observation_sql_columns()).items():
        expr = exprs.get(col)
        if expr is None:
            expr = f"v.{col}" if col in _VALUE_ARROW.names else f"e.{col}"
        select.append(f"CAST({expr} AS {typ}) AS \"{col}\"")
    # the mergeable parts, when the adapter gives them (gridded and effort sources)
    select += [f'v."{p.name}"' for p in _PART_ARROW if p.name in value_columns]
    return ", ".join(select)


#: Most (unit, effort unit) pairs whose density units are written out as a CASE (see :func:`_density_unit_expr`).
_MAX_UNIT_PAIRS = 64


def _density_unit_expr(con: duckdb.DuckDBPyConnection, units: Sequence[str], effort_units: Sequence[str]) -> str:
    """SQL for the density unit of ``v.unit`` over ``e.effort_unit``: :func:`harmonize.units.density_unit_sql`
    evaluated once per pair of the given (distinct, non-null) units, then looked up per row by
    a CASE over the pairs.

    Four regular expressions per row were a quarter of the assembling statement's time; the
    pairs are few (a handful of value units times one or two effort units). Null where
    either unit is null, as :func:`~harmonize.units.density_unit_sql`.
    """
    if len(units) * len(effort_units) > _MAX_UNIT_PAIRS:
        return density_unit_sql("v.unit", "e.effort_unit")
    if not units or not effort_units:
        return "CAST(NULL AS VARCHAR)"
    pairs = con.execute(
        f"SELECT u.unit, f.effort_unit, {density_unit_sql('u.unit', 'f.effort_unit')} "
        "FROM (SELECT unnest($1::VARCHAR[]) AS unit) u, (SELECT unnest($2::VARCHAR[]) AS effort_unit) f",
        [list(units), list(effort_units)]).fetchall()
    whens = " ".join(f"WHEN v.unit = {sql_text(u)} AND e.effort_unit = {sql_text(f)} THEN {sql_text(d) if d is not None else 'NULL'}"
                     for u, f, d in pairs)
    return f"CASE {whens} END"


_NO_VALUES_ARROW = pa.schema([
    ("source_id", pa.string()), ("source_kind", pa.string()), ("provider_type", pa.string()),
    ("protocol", pa.string()), ("event_id", pa.string()), ("event_start", pa.timestamp("us")),
    ("event_end", pa.timestamp("us")), ("year", pa.int32()), ("season", pa.string()),
    ("season_year", pa.int32()), ("depth_layer", pa.string()), ("lat", pa.float64()), ("lon", pa.float64()),
    ("cell_id", pa.string()), ("stratum", pa.string()), ("depth_min_m", pa.float64()),
    ("depth_max_m", pa.float64()), ("bottom_depth_m", pa.float64()), ("effort", pa.float64()),
    ("effort_unit", pa.string()), ("observer_id", pa.string()), ("flags", pa.list_(pa.string())),
    ("source_file", pa.string()), ("source_row", pa.int64()),
])


def _values_to_arrow(values: pd.DataFrame) -> pa.Table:
    """The adapter's values as Arrow columns of :data:`_VALUE_ARROW` (absent columns: defaults),
    then the :data:`_PART_ARROW` columns the adapter gives.

    Categorical text columns stay dictionary-encoded (one integer code per row) until
    :func:`_decoded`; Arrow-backed columns convert without copying; lists become list columns.
    """
    n = len(values)
    arrays = []
    schema = _value_schema(values)
    for fld in schema:
        name = "flags" if fld.name == "value_flags" else fld.name
        col = values[name] if name in values else pd.Series([None] * n, dtype=object, index=values.index)
        if name == "no_effort":
            col = col.fillna(False).astype(bool)
        elif name in ("n_values", "n_vessels"):
            col = pd.Series(pd.array(col, dtype="Int32"))
        if isinstance(col.dtype, pd.CategoricalDtype) and pa.types.is_string(fld.type):
            arr = pa.array(col, from_pandas=True)
            arr = pa.DictionaryArray.from_arrays(arr.indices, arr.dictionary.cast(fld.type))
        elif pa.types.is_list(fld.type):
            arr = _list_array(col, fld.type)
        else:
            arr = _to_arrow(pd.DataFrame({fld.name: col}), pa.schema([fld])).column(0)
        arrays.append(arr)
    return pa.Table.from_arrays(arrays, names=schema.names)


def _value_schema(values: pd.DataFrame | pa.Table) -> pa.Schema:
    """:data:`_VALUE_ARROW` and the part columns present in ``values``."""
    names = values.columns if isinstance(values, pd.DataFrame) else values.column_names
    return pa.schema(list(_VALUE_ARROW) + [p for p in _PART_ARROW if p.name in names])


def _decoded(table: pa.Table) -> pa.Table:
    """The table with dictionary-encoded columns turned back into plain ones (of :func:`_value_schema`)."""
    arrays = []
    schema = _value_schema(table)
    for fld, col in zip(schema, table.columns, strict=True):
        if pa.types.is_dictionary(col.type):
            col = pa.chunked_array([c.dictionary_decode() for c in col.chunks], type=fld.type)
        arrays.append(col)
    return pa.Table.from_arrays(arrays, schema=schema)


def _event_rank(events: pd.DataFrame) -> np.ndarray:
    """Each event's place in the store's order: by season_year, event_start, event_id (nulls last).

    Values are written in the order of their events' ranks, the values of one event in the
    order the adapter gives them; :func:`write_partitions` then finds each block sorted already.
    """
    ordered = events.reset_index(drop=True).sort_values(["season_year", "event_start", "event_id"],
                                                        na_position="last", kind="stable")
    rank = np.empty(len(events), dtype=np.int64)
    rank[ordered.index.to_numpy()] = np.arange(len(events))
    return rank


def _sample(table: pa.Table, n: int = SAMPLE_ROWS) -> pa.Table:
    # The contract check runs on the whole table when it is small, on a sample otherwise;
    # the SQL above already fixes every column's type.
    if table.num_rows > n:
        # 20 slices at random places: slicing is free, a row-wise take of list columns is not
        k, size = 20, n // 20
        blocks = np.sort(np.random.default_rng(0).choice(table.num_rows // size, k, replace=False))
        table = pa.concat_tables([table.slice(int(b) * size, size) for b in blocks])
    return table


def _main_file(out: AdapterOutput) -> Path:
    for f in out.files:
        if f.role in ("events", "rows"):
            return f.path
    return out.files[0].path


def _zero_filled(block: pa.Table) -> int:
    return int(pa.compute.sum(block["zero_filled"]).as_py() or 0)
