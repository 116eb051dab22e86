"""Co-location: attach gridded cell-period values (SST, bottom temperature...) to sample events.

A sample event (a haul, a tow, a transect segment) gets, for each requested variable, the
value of the gridded source's event in the same study cell whose period (month or season,
``[event_start, event_end)``) holds the sample's start time. Fields tagged with the fixed
layers "surface" or "near_bottom" match every sample whatever its depth layer (a haul's
sea-surface temperature); fields reduced per study depth layer match the sample's layer.
A sample whose cell had no valid pixel in that period gets a null value, never a value
borrowed from a neighbouring cell or period.

The store's events pass the disclosure gate (:mod:`harmonize.disclosure`) like every output:
withheld fishing-effort cell-periods are not among the events, and an event with a
sensitive taxon is placed at its generalised position (its cell is the one the rounded
coordinates fall in, never its own withheld cell).
"""

from __future__ import annotations

from collections.abc import Iterator, Mapping, Sequence
from contextlib import contextmanager

import duckdb
import numpy as np
import pandas as pd

from harmonize.adapters.registry import kinds_sql
from harmonize.clock import utc_naive
from harmonize.disclosure import Disclosure
from harmonize.errors import HarmonizeError
from harmonize.gridded.cf import CANONICAL_VARIABLES
from harmonize.store import Store
from harmonize.study import Study
from harmonize.tagging import NEAR_BOTTOM, Grid

#: Layer tags of 2-D fields: they describe the field, not a study layer, and match any sample.
FIXED_LAYERS = ("surface", NEAR_BOTTOM)
#: Aggregate over one gridded source's rows of one variable: true when it is a 2-D field (one
#: fixed layer tag), whose values then match samples of any depth layer.
FIXED_LAYER_SQL = ("(count(DISTINCT depth_layer) = 1 AND bool_and(depth_layer IN ("
                   + ", ".join(f"'{x}'" for x in FIXED_LAYERS) + ")))")


def match_sql(sample: str, gridded: str, fixed_layer: str) -> str:
    """The co-location rule as a SQL join condition (the one rule colocate and the audit use).

    ``sample`` and ``gridded`` are relation aliases with columns cell_id, event_start and
    depth_layer (and event_end for the gridded one); ``fixed_layer`` a boolean expression,
    true where the gridded field is 2-D (:data:`FIXED_LAYER_SQL`). A sample matches the
    gridded cell-period of its own cell whose period ``[event_start, event_end)`` holds the
    sample's start, in its own depth layer unless the field is 2-D.
    """
    s, g = sample, gridded
    return (f"{g}.cell_id = {s}.cell_id AND {s}.event_start >= {g}.event_start AND {s}.event_start < {g}.event_end "
            f"AND ({fixed_layer} OR {g}.depth_layer = {s}.depth_layer)")
COLUMNS = ["source_id", "event_id", "variable", "value", "unit", "gridded_source_id", "gridded_event_id",
           "n_values", "valid_area_km2", "period_start", "period_end"]


def colocate(
    study: Study,
    variables: Sequence[str],
    events: pd.DataFrame | None = None,
    sources: Mapping[str, str] | None = None,
    disclosure: Disclosure | None = None,
    con: duckdb.DuckDBPyConnection | None = None,
) -> pd.DataFrame:
    """Gridded values of ``variables`` for each sample event, in long form.

    Parameters
    ----------
    study
        The study whose store holds the gridded sources (and, by default, the samples).
    variables
        Canonical (CF standard) names of gridded variables, e.g. ["sea_surface_temperature"].
    events
        Sample events with source_id, event_id, event_start and either cell_id or lat/lon
        (optionally depth_layer). None: every non-gridded event in the store.
    sources
        Variable -> gridded source_id, to choose one source where several provide it. A
        variable not named here is taken from every gridded source that has it.
    disclosure
        The disclosure rules applied to the store's events (default: the study's).
    con
        An open connection to the study's store (with its ``observations`` view), e.g. the
        one of an export in progress: used instead of opening another one.

    Returns
    -------
    DataFrame
        One row per (source_id, event_id, variable, gridded_source_id) with columns
        :data:`COLUMNS`; value, gridded_event_id, n_values and valid_area_km2 are null
        where the event's cell had no valid value in that period.

    Raises
    ------
    HarmonizeError
        A variable (or a chosen source) has no gridded values in the store.
    """
    variables = list(dict.fromkeys(variables))
    if not variables:
        raise HarmonizeError("name at least one gridded variable to co-locate, e.g. sea_surface_temperature")
    sources = dict(sources or {})
    unknown = sorted(set(sources) - set(variables))
    if unknown:
        raise HarmonizeError(f"a source is chosen for '{unknown[0]}', which is not among the variables asked for")
    with _connection(study, con) as con:
        available = con.execute(
            f"""SELECT variable, source_id, {FIXED_LAYER_SQL} AS fixed
                FROM observations WHERE {kinds_sql(grid_values=True)} GROUP BY ALL ORDER BY ALL"""
        ).df()
        pairs = _pairs(available, variables, sources)
        samples = _samples(con, events, study, disclosure or Disclosure.for_study(study))
        con.register("_samples", samples)
        con.register("_pairs", pairs)
        try:
            result = _values(con)
        finally:
            con.unregister("_samples")
            con.unregister("_pairs")
    unit = pairs.set_index(["variable", "gridded_source_id"])["unit"]
    missing = result["unit"].isna()
    if missing.any():
        keys = pd.MultiIndex.from_frame(result.loc[missing, ["variable", "gridded_source_id"]])
        result.loc[missing, "unit"] = unit.reindex(keys).to_numpy()
    result["n_values"] = result["n_values"].astype("Int64")
    return result[COLUMNS]


@contextmanager
def _connection(study: Study, con: duckdb.DuckDBPyConnection | None) -> Iterator[duckdb.DuckDBPyConnection]:
    """The connection given, or a new read-only one to the study's store (closed afterwards)."""
    if con is not None:
        yield con
        return
    with Store(study.store_dir).connect() as own:
        yield own


def _values(con: duckdb.DuckDBPyConnection) -> pd.DataFrame:
    """The gridded values of the registered ``_samples`` x ``_pairs`` (null where none matched)."""
    return con.sql(
        f"""
        WITH g AS (
            SELECT o.source_id AS gridded_source_id, o.event_id AS gridded_event_id, o.variable,
                   o.cell_id, o.event_start, o.event_end, o.depth_layer, o.value, o.unit, o.n_values,
                   o.effort AS valid_area_km2
            FROM observations o JOIN _pairs p
              ON o.variable = p.variable AND o.source_id = p.gridded_source_id
            WHERE {kinds_sql('o.source_kind', grid_values=True)}
        ),
        wanted AS (SELECT s.*, p.variable, p.gridded_source_id, p.fixed_layer
                   FROM _samples s CROSS JOIN _pairs p)
        SELECT w.source_id, w.event_id, w.variable, g.value, g.unit, w.gridded_source_id,
               g.gridded_event_id, g.n_values, g.valid_area_km2, g.event_start AS period_start,
               g.event_end AS period_end
        FROM wanted w LEFT JOIN g
          ON g.variable = w.variable AND g.gridded_source_id = w.gridded_source_id
         AND {match_sql('w', 'g', 'w.fixed_layer')}
        ORDER BY w.source_id, w.event_id, w.variable, w.gridded_source_id
        """
    ).to_arrow_table().to_pandas()


def colocate_wide(
    study: Study,
    variables: Sequence[str],
    events: pd.DataFrame | None = None,
    sources: Mapping[str, str] | None = None,
    disclosure: Disclosure | None = None,
) -> pd.DataFrame:
    """One row per sample event (source_id, event_id), one column per variable.

    Raises
    ------
    HarmonizeError
        When several gridded sources provide a variable and ``sources`` does not choose one.
    """
    long = colocate(study, variables, events, sources, disclosure)
    per_var = long.groupby("variable")["gridded_source_id"].unique()
    for variable, ids in per_var.items():
        if len(ids) > 1:
            choice = ", ".join(f"'{i}'" for i in sorted(ids))
            raise HarmonizeError(f"{len(ids)} gridded sources provide '{variable}' ({choice}); choose one with "
                                 f"sources={{'{variable}': ...}} (CLI: --source {variable}=SOURCE_ID)")
    wide = long.pivot(index=["source_id", "event_id"], columns="variable", values="value").reset_index()
    wide.columns.name = None
    return wide[["source_id", "event_id", *[v for v in dict.fromkeys(variables)]]]


def _pairs(available: pd.DataFrame, variables: list[str], sources: Mapping[str, str]) -> pd.DataFrame:
    """(variable, gridded_source_id, unit, fixed_layer) to look up."""
    rows = []
    for variable in variables:
        have = available[available["variable"] == variable]
        if have.empty:
            present = ", ".join(sorted(available["variable"].unique())) or "none"
            raise HarmonizeError(f"no gridded source in the store has '{variable}'; gridded variables in the store: "
                                 f"{present}. Ingest a gridded file that maps it in [variables]")
        if variable in sources:
            have = have[have["source_id"] == sources[variable]]
            if have.empty:
                raise HarmonizeError(f"gridded source '{sources[variable]}' has no '{variable}' in the store")
        for r in have.itertuples():
            rows.append((variable, r.source_id, bool(r.fixed)))
    pairs = pd.DataFrame(rows, columns=["variable", "gridded_source_id", "fixed_layer"])
    pairs["unit"] = [CANONICAL_VARIABLES[v].unit if v in CANONICAL_VARIABLES else None for v in pairs["variable"]]
    return pairs


def _samples(con: duckdb.DuckDBPyConnection, events: pd.DataFrame | None, study: Study,
             rules: Disclosure) -> pd.DataFrame:
    """source_id, event_id, event_start, cell_id, depth_layer of the sample events."""
    if events is None:
        samples = kinds_sql(negate=True, grid_values=True)
        rules = rules.prepare(con, study, samples)
        events = con.sql(
            f"""SELECT source_id, event_id, min(event_start) AS event_start, any_value(cell_id) AS cell_id,
                       any_value(lat) AS lat, any_value(lon) AS lon, any_value(depth_layer) AS depth_layer
                FROM ({rules.public_sql(samples)}) GROUP BY source_id, event_id"""
        ).to_arrow_table().to_pandas()
    need = {"source_id", "event_id", "event_start"}
    missing = sorted(need - set(events.columns))
    if missing:
        raise HarmonizeError(f"the events to co-locate lack column(s) {missing}; they need source_id, event_id, "
                             "event_start and cell_id (or lat and lon)")
    ev = events.copy()
    if "cell_id" not in ev and not {"lat", "lon"} <= set(ev.columns):
        raise HarmonizeError("the events to co-locate need cell_id, or lat and lon to find it")
    if {"lat", "lon"} <= set(ev.columns):
        # an event without a cell (e.g. a generalised sensitive event) is placed by its position
        missing = ev["cell_id"].isna().to_numpy() if "cell_id" in ev else np.ones(len(ev), dtype=bool)
        cells = ev["cell_id"].astype(object).to_numpy(copy=True) if "cell_id" in ev else np.full(len(ev), None, object)
        if missing.any():
            found = Grid(study.crs, study.cell_size_km).cell_ids(
                pd.to_numeric(ev["lon"], errors="coerce").to_numpy(float)[missing],
                pd.to_numeric(ev["lat"], errors="coerce").to_numpy(float)[missing])
            cells[missing] = found.astype(object).where(found.notna(), None).to_numpy()
        ev["cell_id"] = cells
    if "depth_layer" not in ev:
        ev["depth_layer"] = None
    ev["event_start"] = utc_naive(ev["event_start"]).to_numpy()
    out = ev[["source_id", "event_id", "event_start", "cell_id", "depth_layer"]].drop_duplicates()
    return out.astype({"source_id": object, "event_id": object, "cell_id": object, "depth_layer": object})
