"""Coverage metrics of the store, computed in DuckDB SQL; only aggregates leave the database.

Every query reads the ``observations`` view of a read-only store connection. Observation
rows are never pulled into Python: the first pass reduces them to events (a haul, tow,
segment, checklist, grid-cell-period) counted per tags and grid cell, and everything about
sampling effort is computed from that much smaller table. Taxon encounters and physical-variable comparisons
take one more filtered pass each over the parquet files.

Conventions shared by all metrics:

- rows flagged ``probable_duplicate`` (a volunteer twin of another source's record) are
  left out wherever something is counted;
- an event is a *sample* (``effort_bearing``) when it has at least one row that is not
  presence-only; presence-only events count as encounters, not as samples;
- effort events (fishing) whose value rests on fewer than ``min_vessels`` vessels are
  confidential, and events where a sensitive taxon was recorded are generalised: the cell of
  neither is ever named (``cell_public`` is null), see :mod:`harmonize.disclosure`.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import duckdb
import pandas as pd

from harmonize.adapters.registry import kinds_sql
from harmonize.colocate import FIXED_LAYER_SQL, match_sql
from harmonize.disclosure import Disclosure
from harmonize.engines.audit_rules import DUPLICATE_FLAG as DUPLICATE_FLAG
from harmonize.engines.audit_rules import KEPT_SQL as KEPT_SQL
from harmonize.engines.audit_rules import event_aggregates_sql, records_sql, year_filter_sql

#: The pseudo source kind of rows that pool every biological source.
ALL_BIOLOGICAL = "all_biological"
#: Provider types whose values are derived fields rather than in-situ measurements.
REFERENCE_PROVIDERS = ("model", "remote_sensing")

#: SQL condition: a row not flagged as a probable twin (the audit counts each bird once;
#: harmonize.engines.audit_rules).
_KEPT = KEPT_SQL


@dataclass
class Metrics:
    """Aggregated tables the findings and the report are built from (all small)."""

    extent: pd.DataFrame
    coverage: pd.DataFrame
    layer_events: pd.DataFrame
    stratum_events: pd.DataFrame
    source_years: pd.DataFrame
    bio_providers: pd.DataFrame
    encounters: pd.DataFrame
    comparisons: pd.DataFrame
    cell_maps: pd.DataFrame
    suppressed: pd.DataFrame
    n_domain_cells: int
    #: Incomplete seasons at each source's data end (:mod:`harmonize.audit.periods`).
    periods: pd.DataFrame = field(default_factory=pd.DataFrame)


_year_filter = year_filter_sql


def build_event_table(con: duckdb.DuckDBPyConnection, domain_cells: pd.DataFrame,
                      min_vessels: int, max_year: int | None = None, events_table: str | None = None,
                      rules: Disclosure | None = None) -> None:
    """Create the temporary table ``audit_cells``: public events counted per tag combination and cell.

    Confidential fishing events are left out of ``audit_cells`` (they are in no count of the
    audit); ``audit_cells_all`` keeps them for the totals of :func:`suppressed`.

    One pass over the observations reduces them to one row per event (grouped on a 64-bit
    hash of source id and event id, far cheaper than the two strings: a collision, odds
    about 1 in 3,000 for 1e8 events, would merge two events in the counts); the events are
    then counted per source, tags, grid cell and flags, a table small enough for every
    other metric to be computed from quickly.

    Parameters
    ----------
    con
        A connection with the ``observations`` view (read-only is fine: temporary
        tables live in memory).
    domain_cells
        Frame with a ``cell_id`` column: the grid cells whose centre lies in the domain.
    min_vessels
        Effort events with fewer distinct vessels are confidential.
    max_year
        Leave out season years after this one (the annual audit).
    events_table
        A table already holding one row per event (source_id, source_kind, protocol,
        provider_type, season_year, season, depth_layer, cell_id, stratum, effort_bearing,
        biological, n_vessels, sensitive), computed elsewhere by the same rules (the Dask engine,
        :mod:`harmonize.engines.dask_engine`); None computes it here.
    rules
        The disclosure rules (default: ``min_vessels`` and no sensitive taxa); the cells of
        confidential and of sensitive events are not named.
    """
    rules = rules or Disclosure(min_vessels=int(min_vessels))
    con.register("_audit_domain_cells", domain_cells[["cell_id"]])
    con.execute("CREATE OR REPLACE TEMP TABLE audit_domain_cells AS SELECT DISTINCT cell_id FROM _audit_domain_cells")
    con.unregister("_audit_domain_cells")
    confidential = rules.confidential_sql()
    ev_sql = f"""
            SELECT hash(source_id, event_id) AS event_key, any_value(source_id) AS source_id,
                   {event_aggregates_sql()},
                   bool_or({rules.sensitive_present_sql()}) AS sensitive,
                   any_value(effort) AS effort, any_value(effort_unit) AS effort_unit,
                   max(event_start) AS event_start
            FROM observations
            WHERE {_KEPT}{_year_filter(max_year)}
            GROUP BY event_key"""
    if events_table is not None:
        ev_sql = f"""
            SELECT source_id, source_kind, protocol, provider_type, CAST(season_year AS INTEGER) AS season_year,
                   season, depth_layer, cell_id, stratum, effort_bearing, biological,
                   CAST(n_vessels AS INTEGER) AS n_vessels, sensitive,
                   CAST(NULL AS DOUBLE) AS effort, CAST(NULL AS VARCHAR) AS effort_unit,
                   CAST(NULL AS TIMESTAMPTZ) AS event_start
            FROM {events_table}"""
    con.execute(
        f"""
        CREATE OR REPLACE TEMP TABLE audit_cells_all AS
        WITH ev AS ({ev_sql}
        ),
        tagged AS (
            SELECT ev.*, {confidential} AS confidential,
                   CASE WHEN {confidential} OR ev.sensitive THEN NULL ELSE ev.cell_id END AS cell_public,
                   d.cell_id IS NOT NULL AS in_domain
            FROM ev LEFT JOIN audit_domain_cells d ON d.cell_id = ev.cell_id
        )
        SELECT source_id, source_kind, protocol, provider_type, season_year, season, depth_layer, cell_id,
               stratum, effort_bearing, biological, confidential, cell_public, in_domain, effort_unit,
               count(*) AS n, sum(effort) AS effort_total, max(event_start) AS last_start
        FROM tagged GROUP BY ALL
        """
    )
    # a confidential fishing row is withheld whole (harmonize.disclosure): it is in no count of
    # the audit, by period or otherwise; only the totals of :func:`suppressed` mention it
    con.execute("CREATE OR REPLACE TEMP TABLE audit_cells AS SELECT * FROM audit_cells_all WHERE NOT confidential")


def extent(con: duckdb.DuckDBPyConnection) -> pd.DataFrame:
    """Events and years by source kind x season x depth layer, plus all biological sources pooled."""
    return con.execute(
        f"""
        WITH rows AS (
            SELECT source_kind, season, depth_layer, season_year, effort_bearing, n FROM audit_cells
            UNION ALL
            SELECT '{ALL_BIOLOGICAL}', season, depth_layer, season_year, effort_bearing, n
            FROM audit_cells WHERE biological
        )
        SELECT source_kind, season, depth_layer,
               coalesce(sum(n) FILTER (WHERE effort_bearing), 0)::BIGINT AS events,
               count(DISTINCT season_year) FILTER (WHERE effort_bearing) AS "years",
               min(season_year) FILTER (WHERE effort_bearing) AS first_year,
               max(season_year) FILTER (WHERE effort_bearing) AS last_year,
               coalesce(sum(n) FILTER (WHERE NOT effort_bearing), 0)::BIGINT AS presence_only_events
        FROM rows GROUP BY ALL ORDER BY ALL
        """
    ).df()


def coverage(con: duckdb.DuckDBPyConnection, n_domain_cells: int) -> pd.DataFrame:
    """Per source kind x season_year x season: events, domain cells sampled, their share, strata.

    Every season a kind ever sampled gets a row for every year of the kind's span, with
    zeros where nothing was sampled, so gaps are explicit.
    """
    denom = max(int(n_domain_cells), 1)
    return con.execute(
        f"""
        WITH kind_years AS (
            SELECT source_kind, min(season_year) AS y0, max(season_year) AS y1
            FROM audit_cells WHERE season_year IS NOT NULL GROUP BY ALL
        ),
        kind_seasons AS (
            SELECT DISTINCT source_kind, season FROM audit_cells WHERE season IS NOT NULL
        ),
        frame AS (
            SELECT k.source_kind, s.season, unnest(range(k.y0, k.y1 + 1)) AS season_year
            FROM kind_years k JOIN kind_seasons s USING (source_kind)
        ),
        agg AS (
            SELECT source_kind, season_year, season,
                   sum(n) FILTER (WHERE effort_bearing) AS events,
                   count(DISTINCT cell_public) FILTER (WHERE effort_bearing AND in_domain) AS cells_sampled,
                   count(DISTINCT cell_id) FILTER (WHERE effort_bearing AND in_domain)
                     - count(DISTINCT cell_public) FILTER (WHERE effort_bearing AND in_domain) AS cells_suppressed,
                   count(DISTINCT stratum) FILTER (WHERE effort_bearing) AS strata_sampled,
                   sum(n) FILTER (WHERE NOT effort_bearing) AS presence_only_events
            FROM audit_cells GROUP BY ALL
        )
        SELECT f.source_kind, CAST(f.season_year AS INTEGER) AS season_year, f.season,
               coalesce(a.events, 0)::BIGINT AS events,
               coalesce(a.cells_sampled, 0) AS cells_sampled,
               coalesce(a.cells_sampled, 0) / {denom}::DOUBLE AS coverage_fraction,
               coalesce(a.strata_sampled, 0) AS strata_sampled,
               coalesce(a.cells_suppressed, 0) AS cells_suppressed,
               coalesce(a.presence_only_events, 0)::BIGINT AS presence_only_events,
               {int(n_domain_cells)} AS domain_cells
        FROM frame f LEFT JOIN agg a
             ON a.source_kind = f.source_kind AND a.season = f.season AND a.season_year = f.season_year
        ORDER BY f.source_kind, f.season_year, f.season
        """
    ).df()


def layer_events(con: duckdb.DuckDBPyConnection) -> pd.DataFrame:
    """Samples per source kind x season_year x season x depth layer."""
    return con.execute(
        """SELECT source_kind, season_year, season, depth_layer, sum(n)::BIGINT AS events
           FROM audit_cells WHERE effort_bearing GROUP BY ALL ORDER BY ALL"""
    ).df()


def stratum_events(con: duckdb.DuckDBPyConnection) -> pd.DataFrame:
    """Samples per source kind x season_year x season x stratum (events with a stratum)."""
    return con.execute(
        """SELECT source_kind, season_year, season, stratum, sum(n)::BIGINT AS events
           FROM audit_cells WHERE effort_bearing AND stratum IS NOT NULL GROUP BY ALL ORDER BY ALL"""
    ).df()


def source_years(con: duckdb.DuckDBPyConnection) -> pd.DataFrame:
    """Events (of any kind, presence-only included) per series and season year.

    A series is a protocol when the sources name one (a survey keeps its time series when a
    year's files come from another vessel or through another profile), else the source.
    """
    return con.execute(
        """SELECT coalesce(protocol, source_id) AS series, protocol IS NOT NULL AS is_protocol,
                  any_value(source_kind) AS source_kind, season_year, sum(n)::BIGINT AS events,
                  list_sort(list_distinct(list(source_id))) AS source_ids
           FROM audit_cells WHERE season_year IS NOT NULL
           GROUP BY coalesce(protocol, source_id), protocol IS NOT NULL, season_year ORDER BY ALL"""
    ).df()


def bio_providers(con: duckdb.DuckDBPyConnection) -> pd.DataFrame:
    """Biological events (samples and presence-only; ``samples`` the first) per season x layer x provider x kind."""
    return con.execute(
        """SELECT season, depth_layer, provider_type, source_kind, sum(n)::BIGINT AS events,
                  coalesce(sum(n) FILTER (WHERE effort_bearing), 0)::BIGINT AS samples,
                  count(DISTINCT season_year) AS "years"
           FROM audit_cells WHERE biological GROUP BY ALL ORDER BY ALL"""
    ).df()


#: Which quantity of a taxon stands for its records, when a source stores several.
_PREFERENCE = "CASE quantity WHEN 'count' THEN 0 WHEN 'presence' THEN 1 WHEN 'biomass' THEN 2 ELSE 3 END"


def encounters(con: duckdb.DuckDBPyConnection, max_year: int | None = None,
               records_table: str | None = None) -> pd.DataFrame:
    """Taxon records and encounters (records with a value above zero) by taxon and place in time.

    Grouped by variable, season, depth layer, season_year, source kind and provider type.
    A source that stores a taxon under several quantities (count and biomass of one
    catch) is counted in one of them only: count, else presence, else biomass. Each life
    stage or behaviour recorded is a record of its own. ``records_table`` holds the
    records and encounters per group computed elsewhere (the Dask engine).
    """
    g_sql = records_sql("observations", max_year)
    if records_table is not None:
        g_sql = f"""
                SELECT variable, season, depth_layer, CAST(season_year AS INTEGER) AS season_year, source_kind,
                       provider_type, source_id, quantity, records, encounters
                FROM {records_table}"""
    return con.execute(
        f"""WITH g AS ({g_sql}
            ),
            preferred AS (
                SELECT source_id, variable, arg_min(quantity, {_PREFERENCE}) AS quantity
                FROM g GROUP BY ALL
            )
            SELECT variable, season, depth_layer, season_year, source_kind, provider_type,
                   sum(encounters)::BIGINT AS encounters, sum(records)::BIGINT AS records
            FROM g SEMI JOIN preferred p
                 ON p.source_id = g.source_id AND p.variable = g.variable AND p.quantity = g.quantity
            GROUP BY ALL ORDER BY ALL"""
    ).df()


def comparisons(con: duckdb.DuckDBPyConnection, max_year: int | None = None) -> pd.DataFrame:
    """Offsets between sources of one physical variable, from matched pairs.

    Each in-situ value (a physical value of a non-gridded source: a haul's bottom
    temperature) is paired with the value of each gridded source of the same variable in its
    own cell and period, by the co-location rule (:func:`harmonize.colocate.match_sql`); two
    gridded sources are paired where they describe the same cell, period and layer. The
    difference (first minus second: in-situ first, then model and remote-sensing sources) is
    summarised per variable, gridded layer and source pair: its mean (the offset a
    delta-change correction would add to the second source), its sample standard deviation,
    the number of pairs and of distinct cell-periods. Averaging each source over a season
    first would report as bias what is only timing (sensors that sampled June against a model
    mean of June-August).
    """
    refs = ", ".join(f"'{p}'" for p in REFERENCE_PROVIDERS)
    kept = f"variable_kind = 'physical' AND value IS NOT NULL AND cell_id IS NOT NULL AND {_KEPT}"
    grid, in_situ = kinds_sql(grid_values=True), kinds_sql(negate=True, grid_values=True)
    return con.execute(
        f"""
        WITH fields AS (
            SELECT source_id, variable, {FIXED_LAYER_SQL} AS fixed_layer
            FROM observations WHERE {grid} GROUP BY ALL
        ),
        gridded AS (
            SELECT source_id, source_kind, provider_type, variable, unit, cell_id, event_start, event_end,
                   depth_layer, season_year, value, fixed_layer
            FROM observations JOIN fields USING (source_id, variable)
            WHERE {grid} AND {kept}
        ),
        in_situ AS (
            SELECT source_id, source_kind, provider_type, variable, unit, cell_id, event_start, depth_layer,
                   season_year, value
            FROM observations WHERE {in_situ} AND event_start IS NOT NULL AND {kept}
        ),
        pairs AS (
            SELECT s.variable, g.depth_layer, s.source_id AS source_a, g.source_id AS source_b,
                   s.source_kind AS kind_a, g.source_kind AS kind_b, s.unit,
                   s.value - g.value AS difference, s.season_year,
                   g.cell_id || '/' || CAST(g.event_start AS VARCHAR) AS cell_period
            FROM in_situ s JOIN gridded g ON g.variable = s.variable AND {match_sql('s', 'g', 'g.fixed_layer')}
            UNION ALL
            SELECT a.variable, b.depth_layer, a.source_id, b.source_id, a.source_kind, b.source_kind, a.unit,
                   a.value - b.value, a.season_year, b.cell_id || '/' || CAST(b.event_start AS VARCHAR)
            FROM gridded a JOIN gridded b
              ON a.variable = b.variable AND a.cell_id = b.cell_id AND a.event_start = b.event_start
                 AND a.event_end = b.event_end AND a.depth_layer = b.depth_layer
                 AND ((a.provider_type IN ({refs})) < (b.provider_type IN ({refs}))
                      OR ((a.provider_type IN ({refs})) = (b.provider_type IN ({refs})) AND a.source_id < b.source_id))
        )
        SELECT variable, depth_layer, source_a, source_b, kind_a, kind_b, any_value(unit) AS unit,
               count(*) AS n_pairs, count(DISTINCT cell_period) AS n_cell_periods,
               avg(difference) AS mean_difference, stddev_samp(difference) AS sd_difference,
               min(season_year) AS first_year, max(season_year) AS last_year
        FROM pairs WHERE TRUE{_year_filter(max_year)}
        GROUP BY variable, depth_layer, source_a, source_b, kind_a, kind_b ORDER BY ALL
        """
    ).df()


def cell_maps(con: duckdb.DuckDBPyConnection) -> pd.DataFrame:
    """Samples and presence-only events per source kind x season_year x (public) domain cell, for the maps.

    Cells outside the domain are never listed; ``events`` counts samples, ``presence_only_events``
    events without effort (a cell with only those is hatched on the maps).
    """
    return con.execute(
        """SELECT source_kind, season_year, cell_public AS cell_id,
                  coalesce(sum(n) FILTER (WHERE effort_bearing), 0)::BIGINT AS events,
                  coalesce(sum(n) FILTER (WHERE NOT effort_bearing), 0)::BIGINT AS presence_only_events
           FROM audit_cells WHERE in_domain AND cell_public IS NOT NULL AND season_year IS NOT NULL
           GROUP BY ALL ORDER BY ALL"""
    ).df()


def suppressed(con: duckdb.DuckDBPyConnection) -> pd.DataFrame:
    """Confidential effort events and the cells that are never named because of them."""
    return con.execute(
        """WITH c AS (SELECT source_kind, season_year, cell_id,
                             bool_and(confidential) AS all_confidential,
                             coalesce(sum(n) FILTER (WHERE confidential), 0) AS n_confidential
                      FROM audit_cells_all WHERE cell_id IS NOT NULL GROUP BY ALL)
           SELECT source_kind, count(*) FILTER (WHERE all_confidential) AS cell_years_suppressed,
                  count(DISTINCT cell_id) FILTER (WHERE all_confidential) AS cells_suppressed,
                  sum(n_confidential)::BIGINT AS events_suppressed
           FROM c GROUP BY ALL HAVING sum(n_confidential) > 0 ORDER BY ALL"""
    ).df()


def compute(con: duckdb.DuckDBPyConnection, domain_cells: pd.DataFrame, min_vessels: int,
            max_year: int | None = None, rules: Disclosure | None = None) -> Metrics:
    """All metrics of one audit.

    Parameters
    ----------
    con
        A store connection with the ``observations`` view.
    domain_cells
        The study's domain cells (``cell_id`` column).
    min_vessels
        The confidentiality threshold for effort cells.
    max_year
        Only season years up to this one (the annual audit); None for all.
    rules
        The disclosure rules (:mod:`harmonize.disclosure`); default ``min_vessels`` only.
    """
    build_event_table(con, domain_cells, min_vessels, max_year, rules=rules)
    n_cells = len(domain_cells)
    return Metrics(
        extent=extent(con),
        coverage=coverage(con, n_cells),
        layer_events=layer_events(con),
        stratum_events=stratum_events(con),
        source_years=source_years(con),
        bio_providers=bio_providers(con),
        encounters=encounters(con, max_year),
        comparisons=comparisons(con, max_year),
        cell_maps=cell_maps(con),
        suppressed=suppressed(con),
        n_domain_cells=n_cells,
    )
