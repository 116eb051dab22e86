"""The one disclosure gate: what of the store may leave the tool.

Every public output (long, wide, grid, GeoPackage, Darwin Core Archive, co-location, the
twins and quarantine CSV files, the audit and the Python API) reads the store through this
module. Two rules hold in all of them, the same way:

- **Rule of three.** A fishing-effort row (one cell x period x gear x layer) resting on fewer
  than ``[confidentiality] min_vessels`` distinct vessels (default 3; publishing fishing data
  only where at least three vessels contribute is common practice of fisheries data
  agencies) is withheld whole: no row carries its event id, position, time, hours, ping or
  vessel count. An effort row without a vessel count cannot show that it meets the rule and
  is withheld too. Outputs state how many rows were withheld. ``fishing_aggregate`` is the
  standard remedy: effort is summed to coarser cells and longer periods (see
  :data:`AGGREGATE_LEVELS`) until the rule holds.
- **Sensitive taxa.** An event where a taxon marked ``sensitive`` in taxa.csv was recorded
  present has its coordinates rounded to ``[confidentiality] generalise_deg`` degrees
  (default 0.1) and its grid cell withheld, and says so in ``data_generalizations``
  (Darwin Core ``dataGeneralizations``); Chapman 2020, "Current Best Practices for
  Generalizing Sensitive Species Occurrence Data", GBIF, doi 10.15468/doc-5jp4-5g10.

``precise=True`` switches both rules off for internal use. It is never the default; the
library logs a warning and writes ``precise: true`` into the output's provenance.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Iterable
from dataclasses import dataclass, field, replace
from typing import Any

import duckdb
import numpy as np
import pandas as pd

from harmonize.adapters.registry import kinds as registered_kinds
from harmonize.adapters.registry import kinds_sql
from harmonize.sql import sql_text

log = logging.getLogger(__name__)

#: Start and end positions of an event's track (tow, transect segment): exact positions, so
#: withheld, not rounded, at an event with a sensitive taxon.
TRACK_COLUMNS = ("track_start_lat", "track_start_lon", "track_end_lat", "track_end_lon")
#: Fishing-effort rows resting on fewer vessels are withheld (the rule of three; common practice).
DEFAULT_MIN_VESSELS = 3
#: Chapman 2020 rounds to 1, 0.1, 0.01 or 0.001 degree by category; 0.1 degree is about 11 km.
DEFAULT_GENERALISE_DEG = 0.1
#: Column added to event-level outputs: how the event was generalised (null when it was not).
GENERALISATION_COLUMN = "data_generalizations"
#: Flag of effort rows summed to a coarser cell or period by ``fishing_aggregate``.
AGGREGATED_FLAG = "fishing_aggregated"
#: The coarser levels ``fishing_aggregate`` tries in turn: (k, period) = blocks of k x k grid
#: cells, over the row's season or its whole season year. The finest level at which every
#: block meets the rule is taken for the whole output (one level for all rows, so that no
#: coarse sum can be differenced against a finer one).
AGGREGATE_LEVELS: tuple[tuple[int, str], ...] = (
    (1, "year"), (2, "season"), (2, "year"), (4, "season"), (4, "year"), (8, "year"), (16, "year"),
)
PRECISE_WARNING = ("precise output: fishing values resting on fewer than {n} vessels and the exact positions of "
                   "sensitive taxa are included; for internal use only, never publish it")


def generalisation_text(generalise_deg: float) -> str:
    """The sentence that goes with every generalised event (dataGeneralizations)."""
    return (f"coordinates rounded to {generalise_deg:g} degree and grid cell withheld: a sensitive taxon was "
            "recorded at this event (Chapman 2020, GBIF)")


@dataclass(frozen=True)
class Disclosure:
    """The disclosure rules of one output.

    Parameters
    ----------
    min_vessels
        Effort rows with fewer distinct vessels are withheld.
    generalise_deg
        Rounding of the coordinates of events with a sensitive taxon, in degrees.
    sensitive_taxa
        Canonical names of the sensitive taxa (taxa.csv ``sensitive = true``).
    precise
        Apply neither rule (internal use only; recorded in provenance).
    fishing_aggregate
        Sum effort to coarser cells or periods until the rule of three holds.
    """

    min_vessels: int = DEFAULT_MIN_VESSELS
    generalise_deg: float = DEFAULT_GENERALISE_DEG
    sensitive_taxa: tuple[str, ...] = ()
    precise: bool = False
    fishing_aggregate: bool = False
    level: tuple[int, str] | None = field(default=None, compare=False)
    aggregate_withheld: int = field(default=0, compare=False)

    @classmethod
    def for_study(cls, study: Any, precise: bool = False, fishing_aggregate: bool = False,
                  generalise_deg: float | None = None) -> Disclosure:
        """The study's rules (``[confidentiality]`` and taxa.csv), with the output's options."""
        taxa = study.taxa
        sensitive = tuple(sorted(taxa.loc[taxa["sensitive"].astype(bool), "taxon"].astype(str)))
        deg = float(generalise_deg if generalise_deg is not None
                    else getattr(study, "generalise_deg", DEFAULT_GENERALISE_DEG))
        check_generalise_deg(deg)
        out = cls(int(study.min_vessels), deg, sensitive, bool(precise), bool(fishing_aggregate))
        if out.precise:
            log.warning(PRECISE_WARNING.format(n=out.min_vessels))
        return out

    # ------------------------------------------------------------------ SQL pieces
    def confidential_sql(self, prefix: str = "") -> str:
        """SQL condition: an effort row that does not meet the rule of three."""
        return (f"({kinds_sql(prefix + 'source_kind', locates_vessels=True)} AND ({prefix}n_vessels IS NULL "
                f"OR {prefix}n_vessels < {int(self.min_vessels)}))")

    def sensitive_present_sql(self) -> str:
        """SQL condition on observation rows: a sensitive taxon recorded present."""
        if not self.sensitive_taxa:
            return "FALSE"
        names = ", ".join(sql_text(t) for t in self.sensitive_taxa)
        return f"(variable IN ({names}) AND (quantity = 'presence' OR value > 0))"

    def rounded_sql(self, column: str) -> str:
        """SQL rounding of a coordinate to ``generalise_deg`` (and to its decimal digits)."""
        p = repr(float(self.generalise_deg))
        digits = max(0, -math.floor(math.log10(self.generalise_deg)) + 1) if self.generalise_deg < 1 else 0
        return f"round(round({column} / {p}) * {p}, {digits})"

    def public_sql(self, where: str = "TRUE", source: str = "observations") -> str:
        """SELECT of the public observation rows meeting ``where``.

        Columns: those of ``source`` plus :data:`GENERALISATION_COLUMN`. Withheld effort rows
        are absent (or summed to coarser levels, with ``fishing_aggregate``); rows of events
        with a sensitive taxon have rounded lat/lon, no cell id and no track ends. Which events are
        sensitive is decided on all of the event's rows in ``source``, whatever ``where``
        selects, so that a filter cannot un-generalise an event.
        """
        if self.precise:
            return f"SELECT *, CAST(NULL AS VARCHAR) AS {GENERALISATION_COLUMN} FROM {source} WHERE {where}"
        note = sql_text(generalisation_text(self.generalise_deg))
        sens = (f"SELECT DISTINCT source_id, event_id FROM {source} WHERE {self.sensitive_present_sql()}"
                if self.sensitive_taxa else
                "SELECT CAST(NULL AS VARCHAR) AS source_id, CAST(NULL AS VARCHAR) AS event_id WHERE FALSE")
        rows = f"""
            SELECT o.* REPLACE (
                       CASE WHEN s.event_id IS NULL THEN o.lat ELSE {self.rounded_sql('o.lat')} END AS lat,
                       CASE WHEN s.event_id IS NULL THEN o.lon ELSE {self.rounded_sql('o.lon')} END AS lon,
                       CASE WHEN s.event_id IS NULL THEN o.cell_id END AS cell_id,
                       {", ".join(f"CASE WHEN s.event_id IS NULL THEN o.{c} END AS {c}" for c in TRACK_COLUMNS)}),
                   CASE WHEN s.event_id IS NOT NULL THEN {note} END AS {GENERALISATION_COLUMN}
            FROM (SELECT * FROM {source} WHERE ({where}) AND NOT {self.confidential_sql()}) o
            LEFT JOIN ({sens}) s ON o.source_id = s.source_id AND o.event_id = s.event_id"""
        if not self.fishing_aggregate:
            return rows
        return f"""
            SELECT * FROM ({rows}) WHERE {kinds_sql(negate=True, locates_vessels=True)}
            UNION ALL BY NAME
            SELECT * FROM {AGGREGATED_VIEW}"""

    # ------------------------------------------------------------------ counts and metadata
    def withheld_counts(self, con: duckdb.DuckDBPyConnection, where: str = "TRUE",
                        source: str = "observations") -> dict[str, int]:
        """How much of the selection the rules withheld or generalised (one scan each)."""
        if self.precise:
            return {"effort_rows_withheld": 0, "events_generalised": 0}
        withheld = con.execute(
            f"SELECT count(*) FROM {source} WHERE ({where}) AND {self.confidential_sql()}").fetchall()[0][0]
        generalised = 0
        if self.sensitive_taxa:
            generalised = con.execute(f"""
                SELECT count(*) FROM (SELECT DISTINCT source_id, event_id FROM {source} WHERE {where}) e
                SEMI JOIN (SELECT DISTINCT source_id, event_id FROM {source} WHERE {self.sensitive_present_sql()}) s
                USING (source_id, event_id)""").fetchall()[0][0]
        out = {"effort_rows_withheld": int(withheld), "events_generalised": int(generalised)}
        if self.fishing_aggregate:
            out["effort_rows_withheld_after_aggregation"] = self.aggregate_withheld
        return out

    def metadata(self, counts: dict[str, int] | None = None) -> dict[str, Any]:
        """The ``confidentiality`` block of an output's provenance."""
        counts = dict(counts or {})
        return {
            "min_vessels": self.min_vessels,
            "generalise_deg": self.generalise_deg,
            "sensitive_taxa": len(self.sensitive_taxa),
            "precise": self.precise,
            "fishing_aggregate": (None if not self.fishing_aggregate or self.level is None
                                  else {"cells_per_block_side": self.level[0], "period": self.level[1]}),
            "rows_suppressed": counts.get("effort_rows_withheld", 0),
            **counts,
        }

    def notes(self, counts: dict[str, int]) -> list[str]:
        """Sentences for an output's notes: what was withheld and why."""
        if self.precise:
            return [PRECISE_WARNING.format(n=self.min_vessels)]
        out = [withheld_note(counts.get("effort_rows_withheld", 0), self.min_vessels)]
        if self.fishing_aggregate and self.level is not None:
            k, period = self.level
            out.append(f"fishing effort summed to blocks of {k} x {k} grid cells per "
                       f"{'season year' if period == 'year' else 'season'} (--fishing-aggregate); "
                       f"{counts.get('effort_rows_withheld_after_aggregation', 0)} summed rows still rest on fewer "
                       f"than {self.min_vessels} vessels and are withheld")
        out.append(f"{counts.get('events_generalised', 0)} events with a sensitive taxon have coordinates rounded to "
                   f"{self.generalise_deg:g} degree and no grid cell (column {GENERALISATION_COLUMN})")
        return out

    # ------------------------------------------------------------------ fishing aggregation
    def prepare(self, con: duckdb.DuckDBPyConnection, study: Any, where: str = "TRUE",
                source: str = "observations") -> Disclosure:
        """Define what :meth:`public_sql` needs on ``con`` (the aggregated effort view); returns
        the rules with the aggregation level chosen."""
        if self.precise or not self.fishing_aggregate:
            return self
        return _prepare_aggregate(self, con, study, where, source)


AGGREGATED_VIEW = "disclosure_aggregated_effort"


def withheld_note(n_withheld: int, min_vessels: int) -> str:
    """The sentence outputs carry about withheld fishing-effort rows."""
    rows = "row" if n_withheld == 1 else "rows"
    return (f"{n_withheld:,} fishing-effort {rows} (cell x period x gear x layer) rest on fewer than {min_vessels} "
            f"vessels and are withheld whole: no position, time, hours, ping or vessel count "
            f"([confidentiality] min_vessels = {min_vessels}); the store keeps them. Local confidentiality rules "
            "prevail.")


def check_generalise_deg(value: float) -> None:
    """Raise ValueError unless 0 < value <= 1 degree."""
    if not 0 < value <= 1:
        from harmonize.errors import HarmonizeError

        raise HarmonizeError(f"generalise_deg must be above 0 and at most 1 degree, got {value}")


def _block_sql(k: int, period: str, where: str, source: str) -> str:
    """Effort rows of the selection summed per gear x block of k x k cells x period x layer."""
    cell = "'^x(-?[0-9]+)_y(-?[0-9]+)$'"
    season = "season" if period == "season" else "CAST(NULL AS VARCHAR)"
    return f"""
        SELECT gear, block_x, block_y, season_year, {season} AS season, depth_layer,
               any_value(source_id) AS source_id, any_value(source_kind) AS source_kind,
               any_value(ingest_id) AS ingest_id,
               any_value(provider_type) AS provider_type, any_value(protocol) AS protocol,
               sum(value) AS value, sum(effort) AS effort, any_value(effort_unit) AS effort_unit,
               any_value(unit) AS unit, sum(n_values)::BIGINT AS n_values,
               max(n_vessels) AS n_vessels, min(event_start) AS event_start, max(event_end) AS event_end,
               count(*) AS parts
        FROM (SELECT *, CASE WHEN contains(event_id, '/') THEN split_part(event_id, '/', 1)
                             ELSE coalesce(protocol, '') END AS gear,
                     floor(CAST(regexp_extract(cell_id, {cell}, 1) AS BIGINT) / {k})::BIGINT AS block_x,
                     floor(CAST(regexp_extract(cell_id, {cell}, 2) AS BIGINT) / {k})::BIGINT AS block_y
              FROM {source} WHERE ({where}) AND {kinds_sql(locates_vessels=True)} AND cell_id IS NOT NULL)
        GROUP BY source_id, gear, block_x, block_y, season_year, {season}, depth_layer"""


def _prepare_aggregate(rules: Disclosure, con: duckdb.DuckDBPyConnection, study: Any, where: str,
                       source: str) -> Disclosure:
    from harmonize.tagging import Grid, season_year_bounds

    # The store keeps vessel counts, not vessel identities: distinct vessels across the parts
    # of a block cannot be counted, but the largest part is a proven lower bound.
    chosen = AGGREGATE_LEVELS[-1]
    for k, period in AGGREGATE_LEVELS:
        short = con.execute(f"SELECT count(*) FROM ({_block_sql(k, period, where, source)}) "
                            f"WHERE n_vessels IS NULL OR n_vessels < {int(rules.min_vessels)}").fetchall()[0][0]
        if short == 0:
            chosen = (k, period)
            break
    k, period = chosen
    blocks = con.sql(f"SELECT * FROM ({_block_sql(k, period, where, source)})").to_arrow_table().to_pandas()
    keep = blocks["n_vessels"].notna() & (blocks["n_vessels"] >= rules.min_vessels)
    withheld = int((~keep).sum())
    blocks = blocks[keep].reset_index(drop=True)
    grid = Grid(study.crs, study.cell_size_km)
    # the block's centre: cell_centres_lonlat takes fractional cell indices
    centre = blocks["block_x"].to_numpy(float) * k + k / 2 - 0.5
    lon, lat = grid.cell_centres_lonlat(centre, blocks["block_y"].to_numpy(float) * k + k / 2 - 0.5)
    blocks["lon"], blocks["lat"] = np.asarray(lon, float), np.asarray(lat, float)
    if period == "year" and len(blocks):
        start, end = season_year_bounds(blocks["season_year"], study.seasons, study.timezone)
        blocks["event_start"], blocks["event_end"] = start.dt.tz_localize("UTC"), end.dt.tz_localize("UTC")
    period_text = blocks["season_year"].astype(str) + "-" + (blocks["season"].fillna("all")
                                                             if period == "season" else "all")
    blocks["event_id"] = (blocks["gear"] + f"/k{k}_x" + blocks["block_x"].astype(str) + "_y"
                          + blocks["block_y"].astype(str)
                          + "/" + period_text + "/" + blocks["depth_layer"].astype(str))
    con.register("_disclosure_blocks", blocks)
    con.execute(f"""
        CREATE OR REPLACE TEMP VIEW {AGGREGATED_VIEW} AS
        SELECT 'agg:' || source_id || ':' || event_id AS record_id, ingest_id, source_id,
               source_kind, provider_type, protocol, event_id,
               CAST(event_start AS TIMESTAMPTZ) AS event_start, CAST(event_end AS TIMESTAMPTZ) AS event_end,
               CAST(year(CAST(event_start AS TIMESTAMPTZ)) AS INTEGER) AS year,
               CAST(season_year AS INTEGER) AS season_year, season, depth_layer, lat, lon,
               CAST(NULL AS VARCHAR) AS cell_id, CAST(NULL AS VARCHAR) AS stratum,
               CAST(NULL AS DOUBLE) AS depth_min_m, CAST(NULL AS DOUBLE) AS depth_max_m,
               CAST(NULL AS DOUBLE) AS bottom_depth_m, 'fishing_hours' AS variable, 'effort' AS variable_kind,
               CAST(NULL AS VARCHAR) AS life_stage, 'measurement' AS quantity, value, unit, effort, effort_unit,
               CASE WHEN effort > 0 THEN value / effort END AS density, FALSE AS zero_filled,
               CAST(n_vessels AS INTEGER) AS n_vessels, n_values,
               [{sql_text(AGGREGATED_FLAG)}] AS flags, CAST(NULL AS VARCHAR) AS source_file,
               CAST(NULL AS BIGINT) AS source_row, CAST(NULL AS VARCHAR) AS {GENERALISATION_COLUMN}
        FROM _disclosure_blocks""")
    return replace(rules, level=chosen, aggregate_withheld=withheld)


# ---------------------------------------------------------------------- frames outside the views

def sensitive_keys_sql(rules: Disclosure, source: str = "observations") -> str:
    """SELECT of the (source_id, event_id) of every event with a sensitive taxon recorded present."""
    return f"SELECT DISTINCT source_id, event_id FROM {source} WHERE {rules.sensitive_present_sql()}"


def sensitive_event_keys(con: duckdb.DuckDBPyConnection, rules: Disclosure,
                         source: str = "observations") -> pd.DataFrame:
    """(source_id, event_id) of every event with a sensitive taxon recorded present."""
    if rules.precise or not rules.sensitive_taxa:
        return pd.DataFrame({"source_id": pd.Series([], dtype=object), "event_id": pd.Series([], dtype=object)})
    return con.execute(f"SELECT DISTINCT source_id, event_id FROM {source} "
                       f"WHERE {rules.sensitive_present_sql()}").df()


def generalise_frame(frame: pd.DataFrame, sensitive: pd.DataFrame, rules: Disclosure,
                     source_col: str = "source_id", event_col: str = "event_id",
                     lat_col: str = "lat", lon_col: str = "lon",
                     cell_cols: Iterable[str] = ("cell_id",), note_col: str = GENERALISATION_COLUMN) -> pd.DataFrame:
    """Round the positions of the frame's rows whose event is in ``sensitive``; withhold cells.

    Adds ``note_col`` (null where the row was not generalised). Vectorised.
    """
    out = frame.copy()
    if rules.precise or not len(out):
        out[note_col] = pd.Series([None] * len(out), index=out.index, dtype=object)
        return out
    keys = pd.MultiIndex.from_frame(sensitive[["source_id", "event_id"]].astype(str))
    mine = pd.MultiIndex.from_arrays([out[source_col].astype(str), out[event_col].astype(str)])
    hit = np.asarray(mine.isin(keys))
    p = float(rules.generalise_deg)
    digits = max(0, -math.floor(math.log10(p)) + 1) if p < 1 else 0
    for col in (lat_col, lon_col):
        if col in out:
            vals = pd.to_numeric(out[col], errors="coerce").to_numpy(float)
            # half away from zero, as DuckDB's round() in :meth:`Disclosure.rounded_sql` does, so
            # that an event sits at the same rounded position in every output
            steps = np.sign(vals / p) * np.floor(np.abs(vals / p) + 0.5)
            out[col] = np.where(hit, np.round(steps * p, digits), vals)
    for col in cell_cols:
        if col in out:
            out[col] = out[col].where(~hit, None)
    out[note_col] = np.where(hit, generalisation_text(p), None)
    return out


def public_twins(con: duckdb.DuckDBPyConnection, rules: Disclosure) -> pd.DataFrame:
    """The twins frame (:func:`harmonize.twins.twins_frame`) with both records' positions
    generalised where their event holds a sensitive taxon."""
    from harmonize.twins import twins_frame

    pairs = twins_frame(con)
    if rules.precise or pairs.empty or "lat" not in pairs:
        return pairs
    sensitive = sensitive_event_keys(con, rules)
    out = generalise_frame(pairs, sensitive, rules)
    out = generalise_frame(out, sensitive, rules, source_col="twin_source_id", event_col="twin_event_id",
                           lat_col="twin_lat", lon_col="twin_lon", note_col="twin_" + GENERALISATION_COLUMN)
    return out


#: What replaces the raw text and message of a withheld quarantine row.
QUARANTINE_WITHHELD = {
    "effort": "withheld: a rejected fishing row locates a single vessel (rule of three); see the input file",
    "sensitive": "withheld: the row names a sensitive taxon and would locate it precisely; see the input file",
}


def public_quarantine(rows: pd.DataFrame, kinds: pd.Series, study: Any, rules: Disclosure,
                      sensitive_coordinates: Iterable[float] = ()) -> pd.DataFrame:
    """Quarantine rows as they may leave the tool.

    ``kinds`` is the source kind of each row. The raw text and message of a rejected
    fishing-effort row (one vessel's position and time), of a rejected row naming a
    sensitive taxon (or one of its aliases), and of a rejected row holding a number equal to
    a latitude or longitude in ``sensitive_coordinates`` (e.g. another species' row of a
    checklist where a sensitive bird was seen) are withheld; the file, row number and
    reason stay, so the user can find the row in their own file. A column ``withheld``
    says why.
    """
    out = rows.copy()
    out["withheld"] = pd.Series([None] * len(out), index=out.index, dtype=object)
    if rules.precise or out.empty:
        return out
    effort = kinds.reset_index(drop=True).isin(registered_kinds(locates_vessels=True)).to_numpy()
    names: list[str] = []
    taxa = study.taxa[study.taxa["sensitive"].astype(bool)]
    for taxon, aliases in zip(taxa["taxon"], taxa["aliases"], strict=True):
        names.append(str(taxon))
        names += [a for a in str(aliases or "").split("|") if a.strip()]
    sensitive = np.zeros(len(out), dtype=bool)
    if names:
        import re

        pattern = "|".join(re.escape(n.strip().casefold()) for n in names if n.strip())
        text = (out["raw"].astype("string").fillna("") + " " + out["message"].astype("string").fillna(""))
        sensitive = text.str.casefold().str.contains(pattern, regex=True).fillna(False).to_numpy(bool)
    coords = {float(c) for c in sensitive_coordinates if c is not None and np.isfinite(c)}
    if coords:
        text = (out["raw"].astype("string").fillna("") + " " + out["message"].astype("string").fillna(""))
        found = text.reset_index(drop=True).str.findall(r"-?\d+\.\d+").explode().dropna()
        hit = pd.to_numeric(found, errors="coerce").isin(coords)
        near = np.zeros(len(out), dtype=bool)
        near[np.unique(found.index[hit.to_numpy()]).astype(int)] = True
        sensitive |= near
    for mask, why in ((sensitive, QUARANTINE_WITHHELD["sensitive"]), (effort, QUARANTINE_WITHHELD["effort"])):
        if mask.any():
            idx = out.index[mask]
            out.loc[idx, "raw"] = None
            out.loc[idx, "message"] = why
            out.loc[idx, "withheld"] = why
    return out


def public_quarantine_rows(study: Any, rules: Disclosure, ingest_id: str | None = None, reason: str | None = None,
                           source_id: str | None = None, limit: int | None = None) -> pd.DataFrame:
    """The store's quarantine (:meth:`harmonize.store.Store.quarantine`) through :func:`public_quarantine`."""
    from harmonize.store import Store

    store = Store(study.store_dir)
    rows = store.quarantine(ingest_id=ingest_id, reason=reason, source_id=source_id, limit=limit)
    if rows.empty or rules.precise:
        return public_quarantine(rows, pd.Series([], dtype=object), study, rules)
    kinds = store.ingests().set_index("ingest_id")["source_kind"]
    coords: list[float] = []
    if rules.sensitive_taxa:
        with store.connect() as con:
            exact = con.execute(f"""SELECT DISTINCT lat, lon FROM observations SEMI JOIN
                                    ({sensitive_keys_sql(rules)}) USING (source_id, event_id)""").df()
        coords = pd.concat([exact["lat"], exact["lon"]]).dropna().tolist()
    return public_quarantine(rows, rows["ingest_id"].map(kinds), study, rules, coords)
