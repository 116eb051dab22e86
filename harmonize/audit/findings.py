"""Findings of the coverage audit: gaps and problems, each with a place and a sentence to act on.

Findings are derived from the aggregated tables of :mod:`harmonize.audit.metrics` (small
frames; the observation rows stay in DuckDB). The codes and their rules:

no_samples (error when chance does not explain the gap, else info; see docs/audit.md)
    A source kind sampled a season (or a depth layer, or a stratum, of that season) in
    most of its earlier years with data (more than half, at least two) and has no sample
    there in a year when it has data otherwise. Reported at the coarsest level that is
    empty: the whole season, else the layer, else the stratum (not for opportunistic or
    effort data). In a kind's last year, seasons after the latest one sampled are not
    reported (the year may not be over). Also (warning): a season x depth layer that no
    biological source samples in any year.
thin_samples (error when chance does not explain it, else info; see docs/audit.md)
    A source kind has some, but fewer than ``[audit] min_events``, samples in a
    season_year x season x depth layer; or a planned stratum kept less than half of its
    earlier mean. Not applied to fishing effort, nor to incomplete seasons.
coverage_drop (warning; a note when chance explains it)
    The share of domain cells a source kind sampled in a season is below
    ``[audit] coverage_drop`` times the median share of its earlier years (at least two).
    Not applied to fishing effort, nor to incomplete seasons (:mod:`harmonize.audit.periods`).
missing_year (error)
    A source has no records in a season year between its first and last year (with
    ``--year Y``: also when it had records in Y-1 and none in Y).
few_encounters (warning)
    A taxon has fewer than ``[audit] min_encounters`` encounters in every source kind x
    season x depth layer, all years together: too sparse to model alone (one finding per
    taxon; the per-cell counts are in the model readiness table, :mod:`harmonize.audit.readiness`).
volunteer_only (warning)
    Every biological event in a season x depth layer, or every encounter of a taxon
    there, comes from volunteer providers.
source_disagreement (warning; info where no tolerance is known)
    Two sources of one physical variable, paired by cell, season year, season and depth
    layer, differ on average by more than the variable's tolerance.
resolution_change (warning)
    A taxon is recorded as itself in some season years or sources and through its finer
    taxa (taxa.csv parents) in others; built by :mod:`harmonize.audit.readiness`.

Tolerances live in study.toml, ``[audit.tolerance]`` (variable = tolerance in the
variable's canonical unit), and fall back to :data:`DEFAULT_TOLERANCES`.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from harmonize.audit.metrics import ALL_BIOLOGICAL, Metrics
from harmonize.audit.periods import incomplete_keys
from harmonize.errors import ConfigError
from harmonize.study import Study
from harmonize.tagging import season_year_offsets

CODES = ("no_samples", "thin_samples", "coverage_drop", "missing_year", "few_encounters",
         "volunteer_only", "source_disagreement", "resolution_change")
SEVERITIES = ("error", "warning", "info")
#: Kinds that describe where fishing happened, not where anyone sampled.
EFFORT_KINDS = ("effort",)
#: Kinds without a sampling design: their gaps are warnings, and strata are not checked.
UNDESIGNED_KINDS = ("opportunistic", "effort")
VOLUNTEER = "volunteer"
#: A gap or shortfall whose probability under the earlier years' mean (Poisson) is below this
#: is an error; above it, chance explains it and it is a note. 1 % is the conventional "highly
#: significant" level (Fisher 1925, Statistical Methods for Research Workers).
CHANCE_P = 0.01
#: A planned stratum (sampled in every earlier year) that keeps less than this share of its
#: earlier mean lost most of its samples: an error whatever the probability.
LOST_MOST = 0.5

#: Default tolerances (canonical unit of the variable) for source_disagreement. A judgement,
#: not a standard: 0.5 degC is the order of the differences between in-situ temperatures and
#: ocean-model or satellite fields that users usually accept before correcting (common
#: practice). Set your own in study.toml [audit.tolerance].
DEFAULT_TOLERANCES: dict[str, float] = {
    "sea_surface_temperature": 0.5,
    "sea_water_temperature": 0.5,
    "sea_water_temperature_at_sea_floor": 0.5,
    # the CF standard names the gridded adapter stores (harmonize.gridded.cf)
    "sea_water_practical_salinity": 0.2,
    "sea_water_practical_salinity_at_sea_floor": 0.2,
    "mass_concentration_of_chlorophyll_a_in_sea_water": 0.5,
}


@dataclass(frozen=True)
class Finding:
    """One finding: what (code, severity), where, and what to do (message)."""

    code: str
    severity: str
    message: str
    source_kind: str | None = None
    season_year: int | None = None
    season: str | None = None
    depth_layer: str | None = None
    stratum: str | None = None
    variable: str | None = None
    details: Mapping[str, Any] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        """The contract's finding object (section 6), with ``details`` as an extra key."""
        return {
            "code": self.code, "severity": self.severity, "source_kind": self.source_kind,
            "season_year": self.season_year, "season": self.season, "depth_layer": self.depth_layer,
            "stratum": self.stratum, "variable": self.variable, "message": self.message,
            "details": {k: _plain(v) for k, v in self.details.items()},
        }


def _plain(value: Any) -> Any:
    """numpy scalars and NaN -> JSON-friendly Python values."""
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not np.isfinite(value):
        return None
    if isinstance(value, list | tuple):
        return [_plain(v) for v in value]
    return value


def _int(value: Any) -> int | None:
    return None if value is None or pd.isna(value) else int(value)


def _str(value: Any) -> str | None:
    return None if value is None or pd.isna(value) else str(value)


def _count(n: int, noun: str) -> str:
    return f"{n:,} {noun}{'' if n == 1 else 's'}"


def _layer(name: str | None) -> str:
    return f"the {name} layer" if name else "samples with no depth layer"


def _years_text(years: Iterable[int]) -> str:
    ys = sorted(int(y) for y in years)
    if not ys:
        return "none"
    if ys == list(range(ys[0], ys[-1] + 1)) and len(ys) > 2:
        return f"{ys[0]}-{ys[-1]}"
    return ", ".join(str(y) for y in ys)


# --------------------------------------------------------------------------- tolerances
def tolerances(study: Study) -> dict[str, float]:
    """Tolerances per physical variable: the defaults overlaid with study.toml [audit.tolerance].

    Raises
    ------
    ConfigError
        When a tolerance is not a positive number.
    """
    out = dict(DEFAULT_TOLERANCES)
    section = (study.raw.get("audit") or {}).get("tolerance") or {}
    if not isinstance(section, Mapping):
        raise ConfigError(study.file, "audit.tolerance", "expected a table of variable = tolerance")
    for name, value in section.items():
        if isinstance(value, bool) or not isinstance(value, int | float) or not value > 0:
            raise ConfigError(study.file, f"audit.tolerance.{name}",
                              f"expected a number above 0 in the variable's canonical unit, got {value!r}")
        out[str(name)] = float(value)
    return out


def tolerance_for(variable: str, table: Mapping[str, float]) -> float | None:
    """The tolerance of ``variable``; temperatures without their own entry take 0.5 degC."""
    if variable in table:
        return table[variable]
    if "temperature" in variable:
        return DEFAULT_TOLERANCES["sea_water_temperature"]
    return None


# --------------------------------------------------------------------------- the rules
def _history(frame: pd.DataFrame, kind_years: pd.DataFrame, keys: list[str]) -> pd.DataFrame:
    """For each combination (keys) and each year its kind has data: samples now and before.

    ``frame`` holds source_kind, season_year, *keys and events for sampled combinations;
    ``kind_years`` the (source_kind, season_year) pairs with any data of the kind. A year of
    the kind without the combination counts as 0 samples. Adds ``sampled``, ``events``,
    ``earlier_years`` (years of the kind before this one), ``earlier_sampled`` (of those,
    years with the combination sampled) and ``earlier_mean`` (mean samples per earlier year).
    """
    hit = (frame.groupby(["source_kind", "season_year", *keys], dropna=False)["events"].sum()
           .reset_index())
    combos = hit[["source_kind", *keys]].drop_duplicates()
    grid = combos.merge(kind_years, on="source_kind")
    grid = grid.merge(hit, on=["source_kind", "season_year", *keys], how="left")
    grid["events"] = grid["events"].fillna(0).astype("int64")
    grid["sampled"] = grid["events"] > 0
    grid = grid.sort_values(["source_kind", *keys, "season_year"], kind="stable")
    by = grid.groupby(["source_kind", *keys], sort=False, dropna=False)
    grid["earlier_years"] = by.cumcount()
    grid["earlier_sampled"] = by["sampled"].cumsum() - grid["sampled"].astype(int)
    earlier_events = by["events"].cumsum() - grid["events"]
    grid["earlier_mean"] = (earlier_events / grid["earlier_years"].where(grid["earlier_years"] > 0)).astype(float)
    return grid


def _usually_sampled_but_not(grid: pd.DataFrame) -> pd.DataFrame:
    return grid[~grid["sampled"] & (grid["earlier_years"] >= 2)
                & (grid["earlier_sampled"] * 2 > grid["earlier_years"])]


def poisson_cdf(k: np.ndarray | int, mean: np.ndarray | float) -> np.ndarray:
    """P(X <= k) for X ~ Poisson(mean), element-wise: the chance of so few samples at that mean.

    Sums exp(-mean) mean^i / i! for i = 0..k in log space (k is small here: fewer than
    ``min_events``); NaN where the mean is unknown.
    """
    k_arr = np.atleast_1d(np.asarray(k, dtype="int64"))
    lam = np.atleast_1d(np.asarray(mean, dtype=float))
    k_arr, lam = np.broadcast_arrays(k_arr, lam)
    out = np.full(lam.shape, np.nan)
    ok = np.isfinite(lam) & (lam >= 0)
    if not ok.any():
        return out
    top = int(k_arr[ok].max()) if ok.any() else 0
    i = np.arange(top + 1)
    log_fact = np.cumsum(np.log(np.maximum(i, 1)))
    with np.errstate(divide="ignore", invalid="ignore"):
        log_terms = -lam[ok, None] + i[None, :] * np.log(lam[ok, None]) - log_fact[None, :]
    log_terms = np.where(np.isnan(log_terms), np.where(i[None, :] == 0, -lam[ok, None], -np.inf), log_terms)
    terms = np.where(i[None, :] <= k_arr[ok, None], np.exp(log_terms), 0.0)
    out[ok] = np.minimum(terms.sum(axis=1), 1.0)
    return out


def _complete_only(frame: pd.DataFrame, m: Metrics) -> pd.DataFrame:
    """Rows (source_kind, season_year, season) outside the incomplete periods of the data's end."""
    keys = incomplete_keys(m.periods) if len(m.periods) else set()
    if not keys or frame.empty:
        return frame
    inside = [(str(k), int(y), str(s)) in keys for k, y, s in
              zip(frame["source_kind"], frame["season_year"], frame["season"], strict=True)]
    return frame[~np.asarray(inside, dtype=bool)]


def _evidence_severity(p_chance: float, designed: bool, lost_most: bool = False) -> str:
    """Error when chance does not explain a shortfall (or a planned stratum lost most of its samples).

    Without a sampling design (volunteers, fishing) the worst is a warning.
    """
    serious = (np.isfinite(p_chance) and p_chance < CHANCE_P) or lost_most
    if not serious:
        return "info"
    return "error" if designed else "warning"


def _chance_text(p_chance: float, mean: float, observed: int) -> str:
    if not np.isfinite(p_chance):
        return "there are no earlier years to compare with"
    seen = "none" if observed == 0 else f"{observed} or fewer"
    return (f"earlier years averaged {mean:.1f}, so seeing {seen} by chance has probability "
            f"{_p_text(p_chance)} (Poisson)")


def _p_text(p: float) -> str:
    return f"{p:.2f}" if p >= 0.01 else ("< 0.0001" if p < 1e-4 else f"{p:.4f}")


def season_order(study: Study) -> dict[str, int]:
    """Position of each season within its season year (a December-January season comes first)."""
    offsets = season_year_offsets(study.seasons)
    return {name: min(m - 12 * int(offsets[m]) for m in months) for name, months in study.seasons.items()}


def no_samples(m: Metrics, study: Study, year: int | None) -> list[Finding]:
    """Combinations sampled in most earlier years but empty this year; never-sampled season x layer."""
    out: list[Finding] = []
    le = m.layer_events[m.layer_events["season_year"].notna() & m.layer_events["season"].notna()]
    kind_years = le[["source_kind", "season_year"]].drop_duplicates()
    # A kind's last year may simply not be over (or its files not yet in): seasons after the
    # latest one it sampled that year are not gaps.
    order = season_order(study)
    last = le.assign(pos=le["season"].map(order)).groupby("source_kind").agg(
        last_year=("season_year", "max"))
    last_pos = (le.assign(pos=le["season"].map(order)).merge(last, on="source_kind")
                .query("season_year == last_year").groupby("source_kind")["pos"].max())
    empty_seasons: set[tuple[str, int, str]] = set()
    levels = (("season", []), ("layer", ["depth_layer"]), ("stratum", ["stratum"]))
    for level, extra in levels:
        frame = m.stratum_events if level == "stratum" else le
        frame = frame[frame["season_year"].notna() & frame["season"].notna()]
        if level == "layer":
            frame = frame[frame["depth_layer"].notna()]
        if level == "stratum":  # volunteers and fleets choose where they go: no stratum design
            frame = frame[~frame["source_kind"].isin(UNDESIGNED_KINDS)]
        grid = _complete_only(_usually_sampled_but_not(_history(frame, kind_years, ["season", *extra])), m)
        if year is not None:
            grid = grid[grid["season_year"] == year]
        unfinished = (grid["season_year"] == grid["source_kind"].map(last["last_year"])) & (
            grid["season"].map(order) > grid["source_kind"].map(last_pos))
        grid = grid[~unfinished]
        p_none = poisson_cdf(0, grid["earlier_mean"].to_numpy(float))
        for r, p in zip(grid.itertuples(index=False), p_none, strict=True):
            key = (r.source_kind, int(r.season_year), r.season)
            if level == "season":
                empty_seasons.add(key)
            elif key in empty_seasons:
                continue
            planned = level == "stratum" and r.earlier_sampled == r.earlier_years
            severity = _evidence_severity(float(p), r.source_kind not in UNDESIGNED_KINDS,
                                          lost_most=planned and r.earlier_mean >= study.audit.min_events)
            where = {"season": f"{r.season}", "layer": f"{_layer(getattr(r, 'depth_layer', None))} in {r.season}",
                     "stratum": f"stratum {getattr(r, 'stratum', '')} in {r.season}"}[level]
            act = ("find and ingest the missing records, or treat this gap as unknown in any model of that year."
                   if severity != "info" else "chance explains it; no action needed beyond pooling years there.")
            out.append(Finding(
                "no_samples", severity,
                f"No {r.source_kind} samples in {where} {int(r.season_year)}, although the "
                f"{r.source_kind} data sampled it in {int(r.earlier_sampled)} of the {int(r.earlier_years)} "
                f"earlier years with data; {_chance_text(float(p), float(r.earlier_mean), 0)}; {act}",
                source_kind=r.source_kind, season_year=int(r.season_year), season=r.season,
                depth_layer=_str(getattr(r, "depth_layer", None)), stratum=_str(getattr(r, "stratum", None)),
                details={"level": level, "earlier_years": int(r.earlier_years),
                         "earlier_years_sampled": int(r.earlier_sampled),
                         "earlier_mean_samples": float(r.earlier_mean), "p_chance": float(p)},
            ))
    out += _never_sampled(m, study)
    return out


def _never_sampled(m: Metrics, study: Study) -> list[Finding]:
    """Season x layer combinations that no biological source samples in any year."""
    bio = m.extent[(m.extent["source_kind"] == ALL_BIOLOGICAL) & (m.extent["events"] > 0)]
    if not len(m.extent[m.extent["source_kind"] != ALL_BIOLOGICAL]):
        return []
    sampled = set(zip(bio["season"], bio["depth_layer"], strict=True))
    layers = [layer.name for layer in study.depth_layers] + ["near_bottom"]
    seasons = list(study.seasons)
    # Report a season or a layer that is empty throughout once, and the remaining combinations one by one.
    empty_seasons = [s for s in seasons if not any((s, x) in sampled for x in layers)]
    empty_layers = [x for x in layers if not any((s, x) in sampled for s in seasons)]
    out = []
    for season in empty_seasons:
        out.append(Finding(
            "no_samples", "warning",
            f"No biological source samples any depth layer in {season}, in any year; a model "
            f"fitted to these data will only extrapolate into {season}, so treat its predictions "
            "there as assumptions, or add a source that samples that season.",
            source_kind=ALL_BIOLOGICAL, season=season, details={"level": "never_sampled"},
        ))
    for layer in empty_layers:
        out.append(Finding(
            "no_samples", "warning",
            f"No biological source samples {_layer(layer)} in any season or year; a model "
            "will extrapolate there from other layers, so treat its predictions for that "
            "layer as assumptions, or add a source that samples it.",
            source_kind=ALL_BIOLOGICAL, depth_layer=layer, details={"level": "never_sampled"},
        ))
    for season in seasons:
        for layer in layers:
            if season in empty_seasons or layer in empty_layers or (season, layer) in sampled:
                continue
            out.append(Finding(
                "no_samples", "warning",
                f"No biological source samples {_layer(layer)} in {season} in any year; a model "
                "will extrapolate there from other seasons or layers, so treat its predictions for "
                f"{season} in that layer as assumptions, or add a source that samples it.",
                source_kind=ALL_BIOLOGICAL, season=season, depth_layer=layer,
                details={"level": "never_sampled"},
            ))
    return out


def thin_samples(m: Metrics, study: Study, year: int | None) -> list[Finding]:
    """Too few samples: in a season_year x season x layer, or in a planned stratum that lost most.

    Severity from the earlier years (see :func:`poisson_cdf`): an error when so few samples
    are unlikely at the earlier mean (p < :data:`CHANCE_P`), a note when chance explains them
    or there is nothing earlier to compare with.
    """
    need = study.audit.min_events
    le = m.layer_events[m.layer_events["season_year"].notna() & m.layer_events["season"].notna()
                        & ~m.layer_events["source_kind"].isin(EFFORT_KINDS)]
    kind_years = le[["source_kind", "season_year"]].drop_duplicates()
    grid = _history(le, kind_years, ["season", "depth_layer"])
    thin = _complete_only(grid[(grid["events"] > 0) & (grid["events"] < need)], m)
    if year is not None:
        thin = thin[thin["season_year"] == year]
    p_few = poisson_cdf(thin["events"].to_numpy("int64"), thin["earlier_mean"].to_numpy(float))
    out = []
    for r, p in zip(thin.itertuples(index=False), p_few, strict=True):
        severity = _evidence_severity(float(p), r.source_kind not in UNDESIGNED_KINDS)
        out.append(Finding(
            "thin_samples", severity,
            f"Only {int(r.events)} {r.source_kind} sample{'s' if r.events != 1 else ''} in "
            f"{_layer(_str(r.depth_layer))} in {r.season} {int(r.season_year)} (the study asks for at "
            f"least {need}); {_chance_text(float(p), float(r.earlier_mean), int(r.events))}; "
            + ("estimates there will be uncertain, so find missing records, add samples or pool this with "
               "a neighbouring season or layer." if severity != "info" else
               "this is how thin that layer usually is: pool it with a neighbouring season, layer or year."),
            source_kind=r.source_kind, season_year=int(r.season_year), season=_str(r.season),
            depth_layer=_str(r.depth_layer),
            details={"level": "layer", "events": int(r.events), "min_events": need,
                     "earlier_years": int(r.earlier_years), "earlier_mean_samples": _plain(float(r.earlier_mean)),
                     "p_chance": _plain(float(p))},
        ))
    # planned strata (a designed kind sampled them in every one of at least two earlier years,
    # at least min_events a year on average) that kept less than LOST_MOST of their samples
    se = m.stratum_events[m.stratum_events["season_year"].notna() & m.stratum_events["season"].notna()
                          & ~m.stratum_events["source_kind"].isin(UNDESIGNED_KINDS)]
    sg = _history(se, kind_years, ["season", "stratum"])
    lost = sg[(sg["events"] > 0) & (sg["earlier_years"] >= 2) & (sg["earlier_sampled"] == sg["earlier_years"])
              & (sg["earlier_mean"] >= need) & (sg["events"] < LOST_MOST * sg["earlier_mean"])]
    lost = _complete_only(lost, m)
    if year is not None:
        lost = lost[lost["season_year"] == year]
    p_lost = poisson_cdf(lost["events"].to_numpy("int64"), lost["earlier_mean"].to_numpy(float))
    for r, p in zip(lost.itertuples(index=False), p_lost, strict=True):
        out.append(Finding(
            "thin_samples", "error",
            f"Only {int(r.events)} {r.source_kind} samples in stratum {r.stratum} in {r.season} "
            f"{int(r.season_year)}, against {float(r.earlier_mean):.1f} a year before: the planned stratum lost "
            f"most of its samples ({_chance_text(float(p), float(r.earlier_mean), int(r.events))}); find the "
            "missing records, or treat that stratum as under-sampled in any model of that year.",
            source_kind=r.source_kind, season_year=int(r.season_year), season=_str(r.season),
            stratum=_str(r.stratum),
            details={"level": "stratum", "events": int(r.events), "earlier_years": int(r.earlier_years),
                     "earlier_mean_samples": float(r.earlier_mean), "p_chance": _plain(float(p)),
                     "lost_most_below": LOST_MOST},
        ))
    return out


def coverage_drop(m: Metrics, study: Study, year: int | None) -> list[Finding]:
    """Seasons whose share of domain cells fell below the study's fraction of the earlier median."""
    share = study.audit.coverage_drop
    cov = m.coverage[(m.coverage["events"] > 0) & ~m.coverage["source_kind"].isin(EFFORT_KINDS)]
    if "complete" in cov:  # a season the data do not cover to its end is no drop
        cov = cov[cov["complete"].astype(bool)]
    out: list[Finding] = []
    for (kind, season), g in cov.groupby(["source_kind", "season"], sort=True):
        g = g.sort_values("season_year")
        fractions = g["coverage_fraction"].to_numpy(float)
        for i in range(2, len(g)):
            y = int(g["season_year"].iloc[i])
            if year is not None and y != year:
                continue
            median = float(np.median(fractions[:i]))
            if fractions[i] < share * median:
                row = g.iloc[i]
                cells, domain = int(row["cells_sampled"]), int(row["domain_cells"])
                # severity from evidence, as for no_samples: as few cells as this at the earlier
                # median's expected number of cells, by chance (Poisson)? Then a note, not a warning.
                expected = median * domain
                p = float(poisson_cdf(cells, expected)[0])
                chance = p >= CHANCE_P
                out.append(Finding(
                    "coverage_drop", "info" if chance else "warning",
                    f"{kind} samples in {season} {y} cover {fractions[i]:.0%} of the domain's cells "
                    f"({cells} of {domain}), below {share:g} x the "
                    f"median of the {i} earlier years ({median:.0%}, about {expected:.0f} cells); "
                    + (f"so few cells by chance has probability {p:.2f} (Poisson), so this may be chance; "
                       if chance else "")
                    + f"check for missing files or a reduced survey before comparing {y} with earlier years.",
                    source_kind=str(kind), season_year=y, season=str(season),
                    details={"coverage_fraction": fractions[i], "earlier_median": median,
                             "earlier_years": i, "cells_sampled": cells,
                             "domain_cells": domain, "threshold": share, "p_chance": _plain(p)},
                ))
    return out


def missing_year(m: Metrics, study: Study, year: int | None) -> list[Finding]:
    """Series (protocols, or sources without one) silent for a season year inside their span."""
    out: list[Finding] = []
    sy = m.source_years
    for (series, is_protocol, kind), g in sy.groupby(["series", "is_protocol", "source_kind"], sort=True):
        sources = sorted({s for ids in g["source_ids"] for s in ids})
        who = (f"Protocol {series} ({kind}; sources {', '.join(sources)})" if is_protocol
               else f"Source {series} ({kind})")
        years = {int(y) for y in g["season_year"]}
        first, last = min(years), max(years)
        gaps = [y for y in range(first, last + 1) if y not in years]
        if year is not None:
            gaps = [y for y in gaps if y == year]
            if year == last + 1 and last in years:
                gaps.append(year)
        for y in gaps:
            out.append(Finding(
                "missing_year", "error",
                f"{who} has no records in season year {y}, although it has "
                f"records in {_years_text(years)}; ingest that year's files, or record why the "
                "survey did not run, before fitting a model across those years.",
                source_kind=str(kind), season_year=y,
                details={("protocol" if is_protocol else "source_id"): series, "source_ids": sources,
                         "years_with_records": sorted(years)},
            ))
    return out


def volunteer_only(m: Metrics, study: Study) -> list[Finding]:
    """Season x layer combinations (or taxa in them) described only by volunteers."""
    out: list[Finding] = []
    bp = m.bio_providers
    flagged: set[tuple[Any, Any]] = set()
    if not bp.empty:
        is_vol = bp["provider_type"] == VOLUNTEER
        by = bp.assign(vol=bp["events"].where(is_vol, 0)).groupby(["season", "depth_layer"], dropna=False)
        samples = bp["samples"] if "samples" in bp else bp["events"]
        g = by.agg(events=("events", "sum"), vol=("vol", "sum"), years=("years", "max"),
                   kinds=("source_kind", lambda s: sorted(set(s)))).reset_index()
        g = g.merge(bp.assign(samples=samples).groupby(["season", "depth_layer"], dropna=False)["samples"].sum()
                    .reset_index(), on=["season", "depth_layer"], how="left")
        for r in g[(g["events"] > 0) & (g["vol"] == g["events"])].itertuples(index=False):
            flagged.add((_str(r.season), _str(r.depth_layer)))
            presence = int(r.events) - int(r.samples)
            out.append(Finding(
                "volunteer_only", "warning",
                f"Every biological record in {_layer(_str(r.depth_layer))} in {r.season} "
                f"({_count(int(r.samples), 'sample')} and {_count(presence, 'presence-only event')}) comes "
                "from volunteers, whose effort is not standardised; use a model that accounts for observer "
                "effort there, or treat it as presence-only.",
                source_kind=r.kinds[0] if len(r.kinds) == 1 else ALL_BIOLOGICAL, season=_str(r.season),
                depth_layer=_str(r.depth_layer),
                details={"events": int(r.events), "samples": int(r.samples), "presence_only_events": presence,
                         "source_kinds": r.kinds},
            ))
    enc = m.encounters
    if enc.empty:
        return out
    is_vol = enc["provider_type"] == VOLUNTEER
    g = (enc.assign(vol=enc["encounters"].where(is_vol, 0))
         .groupby(["variable", "season", "depth_layer"], dropna=False)
         .agg(encounters=("encounters", "sum"), vol=("vol", "sum"),
              kinds=("source_kind", lambda s: sorted(set(s))))
         .reset_index())
    g = g[(g["encounters"] > 0) & (g["vol"] == g["encounters"])]
    for r in g.itertuples(index=False):
        if (_str(r.season), _str(r.depth_layer)) in flagged:
            continue
        vol_kinds = sorted(set(enc.loc[is_vol & (enc["variable"] == r.variable), "source_kind"]))
        out.append(Finding(
            "volunteer_only", "warning",
            f"All {int(r.encounters)} encounters of {r.variable} in {_layer(_str(r.depth_layer))} in "
            f"{r.season} come from volunteers, although other sources sample there; check whether "
            "the survey protocols record this taxon, and model those records with their own effort.",
            source_kind=vol_kinds[0] if len(vol_kinds) == 1 else ALL_BIOLOGICAL, season=_str(r.season),
            depth_layer=_str(r.depth_layer), variable=str(r.variable),
            details={"encounters": int(r.encounters)},
        ))
    return out


def source_disagreement(m: Metrics, study: Study) -> list[Finding]:
    """Physical variables on which two sources differ beyond the tolerance."""
    table = tolerances(study)
    out: list[Finding] = []
    for r in m.comparisons.itertuples(index=False):
        tol = tolerance_for(str(r.variable), table)
        mean, sd = float(r.mean_difference), r.sd_difference
        sd_text = "n/a" if pd.isna(sd) else f"{float(sd):.2f}"
        unit = _str(r.unit) or ""
        base = (f"{r.variable} from {r.source_a} ({r.kind_a}) and {r.source_b} ({r.kind_b}) differ by "
                f"{mean:+.2f} {unit} on average over {int(r.n_pairs)} matched pairs, each value beside the other "
                f"source's value of its own cell and period (sd {sd_text}, {int(r.n_cell_periods)} cell-periods, "
                f"{_layer(_str(r.depth_layer))})")
        details = {"source_a": r.source_a, "source_b": r.source_b, "kind_b": r.kind_b,
                   "mean_difference": mean, "sd_difference": None if pd.isna(sd) else float(sd),
                   "n_pairs": int(r.n_pairs), "n_cell_periods": int(r.n_cell_periods), "unit": unit,
                   "tolerance": tol, "delta_change_offset": mean}
        if tol is None:
            out.append(Finding(
                "source_disagreement", "info",
                base + f"; no tolerance is set for {r.variable}, so add one under [audit.tolerance] "
                "in study.toml to have this checked.",
                source_kind=str(r.kind_a), depth_layer=_str(r.depth_layer), variable=str(r.variable),
                details=details))
        elif abs(mean) > tol:
            out.append(Finding(
                "source_disagreement", "warning",
                base + f", more than the tolerance of {tol:g} {unit}; correct one source before pooling "
                f"them (a delta-change correction adds {mean:+.2f} {unit} to {r.source_b}), or raise "
                "[audit.tolerance] in study.toml if the difference is expected.",
                source_kind=str(r.kind_a), depth_layer=_str(r.depth_layer), variable=str(r.variable),
                details=details))
    return out


def all_findings(m: Metrics, study: Study, year: int | None = None) -> list[Finding]:
    """The findings computed from the metrics, sorted by severity, code and place.

    ``few_encounters`` and ``resolution_change`` come from :mod:`harmonize.audit.readiness`
    (they need the taxa hierarchy and a pass over the store); :func:`harmonize.audit.run.audit`
    adds them.

    Parameters
    ----------
    m
        The audit's metrics.
    study
        The study (thresholds, layers, seasons, tolerances).
    year
        With a year, findings tied to a season year are reported for that year only.
    """
    found = (no_samples(m, study, year) + thin_samples(m, study, year) + coverage_drop(m, study, year)
             + missing_year(m, study, year) + volunteer_only(m, study)
             + source_disagreement(m, study))
    return sort_findings(found)


def sort_findings(found: Iterable[Finding]) -> list[Finding]:
    """Errors first, then warnings, then information; then by code and place."""
    def key(f: Finding) -> tuple[Any, ...]:
        return (SEVERITIES.index(f.severity), CODES.index(f.code), f.source_kind or "",
                f.season_year or 0, f.season or "", f.depth_layer or "", f.stratum or "", f.variable or "")
    return sorted(found, key=key)
