"""The audit's engines, registered by name: where the heavy aggregations of the audit run.

Each implementation computes the aggregations of :mod:`harmonize.engines.audit_rules` and
returns the audit's :class:`~harmonize.audit.metrics.Metrics`; :func:`harmonize.audit.run.audit`
looks the implementation up by the engine's name (:func:`audit_engine`), with no branching
on the name. ``duckdb`` runs everything in the store's connection; ``dask`` reduces the
store's live parquet files on Dask (:mod:`harmonize.engines.dask_engine`) and hands the two
small tables back to DuckDB, where the remaining queries run unchanged.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

import duckdb
import pandas as pd

from harmonize.adapters.registry import kinds as registered_kinds
from harmonize.audit import metrics as m
from harmonize.disclosure import Disclosure
from harmonize.engines import ENGINES
from harmonize.engines.audit_rules import EVENT_TAGS
from harmonize.errors import HarmonizeError
from harmonize.sql import sql_in


@dataclass(frozen=True)
class AuditInputs:
    """What an audit engine works on."""

    #: A store connection with the ``observations`` view.
    con: duckdb.DuckDBPyConnection
    #: The store's live parquet files (absolute paths: Dask workers do not share the store's
    #: search path).
    live_paths: Sequence[str]
    #: The study's domain cells (``cell_id`` column).
    domain_cells: pd.DataFrame
    min_vessels: int
    #: Only season years up to this one (the annual audit); None for all.
    max_year: int | None
    #: The disclosure rules of the study.
    rules: Disclosure
    #: Address of a Dask scheduler (None: the default).
    scheduler: str | None = None


AuditEngine = Callable[[AuditInputs], m.Metrics]
_AUDIT_ENGINES: dict[str, AuditEngine] = {}


def register_audit_engine(name: str) -> Callable[[AuditEngine], AuditEngine]:
    """Register the decorated function as the audit's implementation on engine ``name``."""
    if name not in ENGINES:
        raise ValueError(f"{name!r} is not an engine; the engines are {', '.join(ENGINES)}")

    def register(fn: AuditEngine) -> AuditEngine:
        _AUDIT_ENGINES[name] = fn
        return fn
    return register


def audit_engine(name: str) -> AuditEngine:
    """The audit's implementation on engine ``name``.

    Raises
    ------
    HarmonizeError
        When no implementation is registered under that name.
    """
    try:
        return _AUDIT_ENGINES[name]
    except KeyError:
        raise HarmonizeError(f"the audit has no implementation on engine {name!r}; "
                             f"choose one of {', '.join(_AUDIT_ENGINES)}") from None


def audit_engines() -> tuple[str, ...]:
    """The names of the registered audit implementations."""
    return tuple(_AUDIT_ENGINES)


@register_audit_engine("duckdb")
def _on_duckdb(inputs: AuditInputs) -> m.Metrics:
    return m.compute(inputs.con, inputs.domain_cells, inputs.min_vessels, inputs.max_year, inputs.rules)


@register_audit_engine("dask")
def _on_dask(inputs: AuditInputs) -> m.Metrics:
    """The per-event table and the taxon record counts from Dask; the rest in DuckDB.

    The files hold the parts of values that span files (harmonize.parts): the vessels behind
    an effort event are taken from the store's merged view, so the rule of three is judged
    per cell-period as on DuckDB, and the events where a sensitive taxon was recorded come
    from the same view, so their cells are not named.
    """
    from harmonize.engines.dask_engine import audit_tables, duplicate_keys

    con, rules, max_year = inputs.con, inputs.rules, inputs.max_year
    tables = audit_tables(inputs.live_paths, duplicate_keys(con), max_year, inputs.scheduler)
    events = tables.events
    # fishing cell-periods are taken whole from the merged view: the files hold their parts,
    # and the hours of ping tracks joined across files (harmonize.parts) are in no file
    tags = ", ".join(f"any_value({t}) AS {t}" for t in EVENT_TAGS)
    year = "" if max_year is None else f" AND season_year <= {int(max_year)}"
    whole = registered_kinds(locates_vessels=True)
    effort = con.execute(f"""SELECT source_id, event_id, {tags}, true AS effort_bearing, false AS biological,
                                    CAST(min(n_vessels) AS INTEGER) AS n_vessels
                             FROM observations WHERE {sql_in('source_kind', whole)}{year} GROUP BY ALL""").df()
    events = events[~events["source_kind"].isin(whole).to_numpy()]
    if len(effort):
        effort["season_year"] = pd.array(effort["season_year"], dtype="Int32")
        effort["n_vessels"] = pd.array(effort["n_vessels"], dtype="Int32")
        events = pd.concat([events, effort[events.columns]], ignore_index=True)
    else:
        events = events.reset_index(drop=True)
    sensitive = con.execute(f"""SELECT DISTINCT source_id, event_id, TRUE AS sensitive FROM observations
                                WHERE {m.KEPT_SQL} AND {rules.sensitive_present_sql()}""").df()
    events = events.merge(sensitive, on=["source_id", "event_id"], how="left")
    events["sensitive"] = events["sensitive"].fillna(False).astype(bool)
    registered = {"_dask_audit_events": events, "_dask_audit_records": tables.records}
    for name, frame in registered.items():
        con.register(name, frame)
    try:
        m.build_event_table(con, inputs.domain_cells, inputs.min_vessels, max_year,
                            events_table="_dask_audit_events", rules=rules)
        encounters = m.encounters(con, max_year, records_table="_dask_audit_records")
        comparisons = m.comparisons(con, max_year)
    finally:
        for name in registered:
            con.unregister(name)
    n_cells = len(inputs.domain_cells)
    return m.Metrics(
        extent=m.extent(con), coverage=m.coverage(con, n_cells), layer_events=m.layer_events(con),
        stratum_events=m.stratum_events(con), source_years=m.source_years(con),
        bio_providers=m.bio_providers(con), encounters=encounters, comparisons=comparisons,
        cell_maps=m.cell_maps(con), suppressed=m.suppressed(con), n_domain_cells=n_cells,
    )
