"""Model readiness: which taxa the data can carry, and where their identification level changes.

Two things a multivariate model of the whole community silently depends on:

Encounters per taxon
    For each taxon (as recorded, or rolled up to a rank or to a consistent level, see
    :mod:`harmonize.taxonomy`) and each source kind x season x depth layer, over every
    season year audited: **samples** (events with a count or biomass of any taxon, the
    audit's definition of a sample), **encounters** (samples in which the taxon has a
    count or biomass above zero), the **share of zeros** (1 - encounters / samples: a
    sample without a record of the taxon counts as a zero, which is how a model of that
    kind's samples sees it), the **season years with at least one encounter**, and
    presence-only records apart. A cell is *enough* when its encounters and presence-only
    records together reach ``[audit] min_encounters`` (default 10, common practice: a
    spatial field needs at least about ten non-zero observations). A taxon with no cell
    that is enough, in any source kind x season x layer, is **too sparse to model alone:
    merge, roll up or drop**; it is reported once, as a ``few_encounters``
    finding, and the cells below the threshold are marked in the table.
Identification changes
    A taxon recorded as itself in some season years or sources and through its finer
    taxa in others (a genus recorded until 2019 and its species from 2020) is a
    ``resolution_change`` finding, with the years, the sources and the roll-up that makes
    the series continuous (``harmonize export ... --consistent-taxa``).

The heavy part is one SQL pass over the store's taxon rows; the rest works on the small
aggregate.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from html import escape
from typing import Any

import duckdb
import pandas as pd

from harmonize.audit.findings import Finding
from harmonize.audit.metrics import ALL_BIOLOGICAL
from harmonize.errors import HarmonizeError
from harmonize.study import Study
from harmonize.taxonomy import (
    RANKS,
    Hierarchy,
    coarsest_targets,
    consistent_targets,
    resolution_changes,
)

DUPLICATE_FLAG = "probable_duplicate"
_KEPT = f"NOT list_contains(coalesce(o.flags, []::VARCHAR[]), '{DUPLICATE_FLAG}')"
SPARSE_ADVICE = "too sparse to model alone: merge, roll up or drop"
TABLE_COLUMNS = ["taxon", "source_kind", "season", "depth_layer", "samples", "encounters", "share_zeros",
                 "years_with_encounters", "first_year", "last_year", "presence_only_records", "enough"]


@dataclass
class ModelReadiness:
    """The readiness table, the taxa too sparse to model alone, and identification changes."""

    table: pd.DataFrame
    too_sparse: pd.DataFrame
    resolution_changes: pd.DataFrame
    min_encounters: int
    taxon_level: str | None = None
    consistent_taxa: bool = False
    rolled_into: Mapping[str, str] = field(default_factory=dict)

    def to_json_dict(self) -> dict[str, Any]:
        """JSON-ready form (the audit JSON's ``model_readiness``)."""
        return {
            "min_encounters": self.min_encounters, "taxon_level": self.taxon_level,
            "consistent_taxa": self.consistent_taxa, "rolled_into": dict(self.rolled_into),
            "advice": SPARSE_ADVICE,
            "table": _records(self.table), "too_sparse": _records(self.too_sparse),
        }


def _records(frame: pd.DataFrame) -> list[dict[str, Any]]:
    out = []
    for rec in frame.to_dict("records"):
        out.append({k: _plain(v) for k, v in rec.items()})
    return out


def _plain(v: Any) -> Any:
    if isinstance(v, list | tuple):
        return [_plain(x) for x in v]
    if v is None or (not isinstance(v, str) and pd.isna(v)):
        return None
    return v.item() if hasattr(v, "item") else v


def _year_filter(max_year: int | None) -> str:
    return "" if max_year is None else f" AND o.season_year <= {int(max_year)}"


def taxon_places(con: duckdb.DuckDBPyConnection, max_year: int | None = None) -> pd.DataFrame:
    """Where each taxon has records (zeros included): one row per distinct variable, source_id,
    source_kind, season, depth_layer and season_year (a small table; one pass over the store)."""
    return con.execute(
        f"""SELECT DISTINCT o.variable, o.source_id, o.source_kind, o.season, o.depth_layer, o.season_year
            FROM observations o WHERE o.variable_kind = 'taxon' AND {_KEPT}{_year_filter(max_year)}""").df()


def recorded_groups(places: pd.DataFrame) -> pd.DataFrame:
    """(variable, season_year, source_id, source_kind) holding taxon records, from :func:`taxon_places`."""
    return places[["variable", "season_year", "source_id", "source_kind"]].drop_duplicates()


_PLACE = ["source_kind", "season", "depth_layer"]


def _keys(frame: pd.DataFrame, year: bool = True) -> pd.DataFrame:
    """Join keys with one dtype whatever the frame's nulls: text as objects, years as Int64."""
    frame = frame.copy()
    for col in ("taxon", *_PLACE):
        if col in frame:
            frame[col] = frame[col].astype(object).where(frame[col].notna(), None)
    if year and "season_year" in frame:
        frame["season_year"] = frame["season_year"].astype("Int64")
    return frame


def readiness_table(con: duckdb.DuckDBPyConnection, targets: Mapping[str, str], min_encounters: int,
                    places: pd.DataFrame, max_year: int | None = None) -> pd.DataFrame:
    """Samples, encounters, share of zeros and years with encounters per taxon x kind x season x layer.

    ``targets`` maps a stored taxon to the taxon it is counted as (others count as
    themselves); ``places`` comes from :func:`taxon_places`. Samples are read from the
    audit's event table ``audit_cells`` (:func:`harmonize.audit.metrics.build_event_table`,
    which must exist on ``con``): events with effort that hold taxon records. Probable twins
    are left out, as everywhere in the audit.
    """
    per_year = con.execute(
        """SELECT source_kind, season, depth_layer, season_year, sum(n)::BIGINT AS n
           FROM audit_cells WHERE effort_bearing AND biological GROUP BY ALL""").df()
    taxon_years = places.assign(taxon=places["variable"].map(lambda v: targets.get(v, v)))
    taxon_years = taxon_years[["taxon", *_PLACE, "season_year"]].drop_duplicates()
    # a taxon's samples: those of the season years in which the kind recorded it at all
    samples = (_keys(taxon_years).merge(_keys(per_year), on=[*_PLACE, "season_year"], how="left")
               .groupby(["taxon", *_PLACE], dropna=False)["n"].sum().rename("samples").reset_index())
    con.register("_readiness_targets", pd.DataFrame({"taxon": list(targets), "target": list(targets.values())},
                                                    dtype=object))
    try:
        # one row per taxon present at an event, grouped on a hash of the event key (far cheaper
        # than the two strings, as in metrics.build_event_table), over present rows only
        present = con.execute(f"""
            WITH present AS (
                SELECT coalesce(m.target, o.variable) AS taxon, hash(o.source_id, o.event_id) AS ev,
                       any_value(o.source_kind) AS source_kind, any_value(o.season) AS season,
                       any_value(o.depth_layer) AS depth_layer, any_value(o.season_year) AS season_year,
                       bool_or(o.quantity <> 'presence') AS in_sample
                FROM observations o LEFT JOIN _readiness_targets m ON m.taxon = o.variable
                WHERE o.variable_kind = 'taxon' AND (o.value > 0 OR o.quantity = 'presence')
                      AND {_KEPT}{_year_filter(max_year)}
                GROUP BY coalesce(m.target, o.variable), ev
            )
            SELECT taxon, source_kind, season, depth_layer,
                   count(*) FILTER (WHERE in_sample) AS encounters,
                   count(DISTINCT season_year) FILTER (WHERE in_sample) AS years_with_encounters,
                   min(season_year) FILTER (WHERE in_sample) AS first_year,
                   max(season_year) FILTER (WHERE in_sample) AS last_year,
                   count(*) FILTER (WHERE NOT in_sample) AS presence_only_records
            FROM present GROUP BY ALL""").df()
    finally:
        con.unregister("_readiness_targets")
    frame = _keys(samples).merge(_keys(present, year=False), on=["taxon", *_PLACE], how="left")
    for col in ("samples", "encounters", "years_with_encounters", "presence_only_records"):
        frame[col] = frame[col].fillna(0).astype("int64")
    for col in ("first_year", "last_year"):
        frame[col] = frame[col].astype("Int64")
    samples_known = frame["samples"].where(frame["samples"] > 0)
    frame["share_zeros"] = 1.0 - frame["encounters"] / samples_known
    frame["enough"] = frame["encounters"] + frame["presence_only_records"] >= int(min_encounters)
    return frame.sort_values(["taxon", *_PLACE], kind="stable", na_position="last")[TABLE_COLUMNS] \
        .reset_index(drop=True)


def sparse_taxa(table: pd.DataFrame, min_encounters: int, hierarchy: Hierarchy) -> pd.DataFrame:
    """Taxa below ``min_encounters`` in every source kind x season x layer, with what to do.

    One row per taxon, describing its best cell (most encounters and presence-only records).
    """
    cols = ["taxon", "encounters", "best_source_kind", "best_season", "best_depth_layer", "samples",
            "presence_only_records", "parent", "advice"]
    if table.empty:
        return pd.DataFrame(columns=cols)
    present = table.assign(present=table["encounters"] + table["presence_only_records"])
    best = present.sort_values(["taxon", "present", "samples"], ascending=[True, False, False]) \
        .drop_duplicates("taxon")
    best = best[best["present"] < int(min_encounters)]
    parent_of = {n: hierarchy.names[p] for n, p in zip(hierarchy.names, hierarchy.parent, strict=True) if p >= 0}
    rows = []
    for r in best.itertuples(index=False):
        parent = parent_of.get(r.taxon)
        how = f"roll it up into {parent} (--taxon-level or --consistent-taxa)" if parent else \
            "merge it with related taxa (give it a parent in taxa.csv) or drop it"
        rows.append({"taxon": r.taxon, "encounters": int(r.encounters), "best_source_kind": r.source_kind,
                     "best_season": r.season, "best_depth_layer": r.depth_layer, "samples": int(r.samples),
                     "presence_only_records": int(r.presence_only_records), "parent": parent,
                     "advice": f"{SPARSE_ADVICE}; {how}"})
    return pd.DataFrame(rows, columns=cols)


def model_readiness(con: duckdb.DuckDBPyConnection, study: Study, max_year: int | None = None,
                    taxon_level: str | None = None, consistent_taxa: bool = False) -> ModelReadiness:
    """The readiness of the store's taxa for a model, at the level asked for.

    Parameters
    ----------
    con
        A store connection with the ``observations`` view; the audit's event table
        ``audit_cells`` is used when the audit built it (with the same ``max_year``), else
        built here.
    study
        The study (taxa hierarchy, ``[audit] min_encounters``).
    max_year
        Only season years up to this one (the annual audit).
    taxon_level
        Count taxa as their ancestor of this rank (one of :data:`harmonize.taxonomy.RANKS`).
    consistent_taxa
        Count taxa at the finest level recorded the same way in every year and source.
    """
    if taxon_level is not None and taxon_level.strip().casefold() not in RANKS:
        raise HarmonizeError(f"taxon level {taxon_level!r} is not a rank; choose from {', '.join(RANKS)}")
    hierarchy = Hierarchy.from_taxa(study.taxa)
    if not _has_event_table(con):
        from harmonize.audit.metrics import build_event_table
        from harmonize.audit.run import domain_cells

        build_event_table(con, domain_cells(study), study.min_vessels, max_year)
    places = taxon_places(con, max_year)
    recorded = recorded_groups(places)
    changes = resolution_changes(recorded, hierarchy)
    maps = []
    if taxon_level:
        maps.append(hierarchy.at_rank(taxon_level))
    if consistent_taxa:
        maps.append(consistent_targets(recorded, hierarchy))
    targets = coarsest_targets(hierarchy, *maps) if maps else {}
    need = study.audit.min_encounters
    table = readiness_table(con, targets, need, places, max_year)
    return ModelReadiness(table, sparse_taxa(table, need, hierarchy), changes, need,
                          taxon_level.strip().casefold() if taxon_level else None, consistent_taxa,
                          {t: x for t, x in sorted(targets.items()) if t != x})


def _has_event_table(con: duckdb.DuckDBPyConnection) -> bool:
    return bool(con.execute("SELECT count(*) FROM duckdb_tables() WHERE table_name = 'audit_cells' "
                            "AND temporary").fetchall()[0][0])


# --------------------------------------------------------------------------- findings
def _years(years: list[int]) -> str:
    ys = sorted(years)
    if len(ys) > 2 and ys == list(range(ys[0], ys[-1] + 1)):
        return f"{ys[0]}-{ys[-1]}"
    return ", ".join(str(y) for y in ys)


def readiness_findings(readiness: ModelReadiness) -> list[Finding]:
    """``resolution_change`` per identification change, ``few_encounters`` per taxon too sparse."""
    out: list[Finding] = []
    for r in readiness.resolution_changes.itertuples(index=False):
        kinds = list(r.source_kinds)
        finer = ", ".join(r.finer)
        rank = f", or --taxon-level {r.rank}" if r.rank else ""
        out.append(Finding(
            "resolution_change", "warning",
            f"{r.taxon} is recorded as itself in {_years(r.own_years)} ({', '.join(r.own_sources)}) and through "
            f"its finer taxa {finer} in {_years(r.finer_years)} ({', '.join(r.finer_sources)}): its series "
            f"breaks where the identification changed; roll {finer} up into {r.taxon} for a continuous series "
            f"(harmonize export ... --consistent-taxa{rank}).",
            source_kind=kinds[0] if len(kinds) == 1 else ALL_BIOLOGICAL, variable=str(r.taxon),
            details={"own_years": list(r.own_years), "own_sources": list(r.own_sources),
                     "finer_taxa": list(r.finer), "finer_years": list(r.finer_years),
                     "finer_sources": list(r.finer_sources), "only_own": list(r.only_own),
                     "only_finer": list(r.only_finer), "rank": r.rank or None,
                     "suggested_rollup": {t: str(r.taxon) for t in r.finer}},
        ))
    need = readiness.min_encounters
    for r in readiness.too_sparse.itertuples(index=False):
        pres = f" and {r.presence_only_records} presence-only records" if r.presence_only_records else ""
        out.append(Finding(
            "few_encounters", "warning",
            f"{r.taxon} has at most {r.encounters} encounters in {r.samples} samples{pres} in any one source "
            f"kind x season x layer (best: {r.best_source_kind} in {r.best_season}, "
            f"{r.best_depth_layer or 'no depth layer'}), all years together; the study asks for at least {need}, "
            f"so it is {r.advice}. See the model readiness table.",
            source_kind=str(r.best_source_kind),
            season=None if pd.isna(r.best_season) else str(r.best_season),
            depth_layer=None if pd.isna(r.best_depth_layer) else str(r.best_depth_layer), variable=str(r.taxon),
            details={"encounters": int(r.encounters), "min_encounters": need, "samples": int(r.samples),
                     "presence_only_records": int(r.presence_only_records), "parent": r.parent},
        ))
    return out


# --------------------------------------------------------------------------- HTML
def _e(value: object) -> str:
    return "" if value is None or (not isinstance(value, str) and pd.isna(value)) else escape(str(value))


def readiness_html(readiness: ModelReadiness | None) -> str:
    """The report section: taxa too sparse to model alone, identification changes, and the table."""
    if readiness is None or readiness.table.empty:
        return "<p>The store holds no taxon records.</p>"
    need = readiness.min_encounters
    level = (f"rolled up to {readiness.taxon_level}" if readiness.taxon_level else "as recorded") + \
        (", at the finest consistent level" if readiness.consistent_taxa else "")
    parts = [f'<p class="lead">Per taxon ({_e(level)}) and source kind x season x depth layer, all season years '
             f"together: samples, encounters (samples with the taxon above zero), share of zeros and the years with "
             f"an encounter. A cell with fewer than {need} encounters (study.toml [audit] min_encounters; common "
             "practice) is marked; a taxon with no cell reaching it is too sparse to model alone.</p>"]
    sparse = readiness.too_sparse
    if len(sparse):
        items = "".join(f"<li><b>{_e(r.taxon)}</b>: at most {r.encounters} encounters"
                        f"{f' and {r.presence_only_records} presence-only records' if r.presence_only_records else ''}"
                        f" ({_e(r.best_source_kind)}, {_e(r.best_season)}, {_e(r.best_depth_layer)})"
                        f" — {_e(r.advice)}</li>" for r in sparse.itertuples(index=False))
        parts.append(f"<h3>Too sparse to model alone: merge, roll up or drop ({len(sparse)})</h3><ul>{items}</ul>")
    else:
        parts.append(f"<p>Every taxon reaches {need} encounters in at least one source kind x season x layer.</p>")
    ch = readiness.resolution_changes
    if len(ch):
        items = "".join(f"<li><b>{_e(r.taxon)}</b> recorded as itself in {_e(_years(r.own_years))}, as "
                        f"{_e(', '.join(r.finer))} in {_e(_years(r.finer_years))}: roll up into {_e(r.taxon)}</li>"
                        for r in ch.itertuples(index=False))
        parts.append(f"<h3>Identification level changes ({len(ch)})</h3><ul>{items}</ul>")
    rows = []
    for r in readiness.table.itertuples(index=False):
        style = "" if r.enough else ' style="color:#a15c00"'
        share = "" if pd.isna(r.share_zeros) else f"{r.share_zeros:.0%}"
        rows.append(f"<tr{style}><td>{_e(r.taxon)}</td><td>{_e(r.source_kind)}</td><td>{_e(r.season)}</td>"
                    f"<td>{_e(r.depth_layer)}</td><td class=\"num\">{r.samples:,}</td>"
                    f"<td class=\"num\">{r.encounters:,}</td><td class=\"num\">{share}</td>"
                    f"<td class=\"num\">{r.years_with_encounters}</td><td class=\"num\">{r.presence_only_records:,}</td>"
                    f"<td>{'yes' if r.enough else 'below ' + str(need)}</td></tr>")
    parts.append('<details><summary>Readiness table (every taxon, source kind, season and layer)</summary>'
                 '<table><thead><tr><th>taxon</th><th>source kind</th><th>season</th><th>layer</th>'
                 '<th class="num">samples</th><th class="num">encounters</th><th class="num">zeros</th>'
                 '<th class="num">years with encounters</th><th class="num">presence-only</th>'
                 f'<th>enough</th></tr></thead><tbody>{"".join(rows)}</tbody></table></details>')
    return "".join(parts)
