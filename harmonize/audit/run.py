"""The coverage audit of a study's store: metrics, findings, JSON and the HTML report."""

from __future__ import annotations

import json
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from harmonize import __version__
from harmonize.audit.engines import AuditInputs, audit_engine
from harmonize.audit.findings import (
    CODES,
    SEVERITIES,
    Finding,
    all_findings,
    sort_findings,
    tolerances,
)
from harmonize.audit.metrics import Metrics
from harmonize.audit.periods import incomplete_keys, incomplete_periods, last_samples
from harmonize.audit.ranking import FindingGroup, group_findings
from harmonize.audit.readiness import ModelReadiness, model_readiness, readiness_findings
from harmonize.audit.received import Received, received
from harmonize.audit.since import (
    AUDIT_FORMAT,
    AUDIT_SCHEMA_VERSION,
    Since,
    check_previous,
    compare,
    finding_key,
    load_previous,
    store_basis,
)
from harmonize.contract import CONTRACT_VERSION
from harmonize.disclosure import Disclosure
from harmonize.engines import EngineChoice, check_engine, current_engine
from harmonize.errors import HarmonizeError
from harmonize.store import Store
from harmonize.study import Study
from harmonize.tagging import Grid, assign_strata

#: Shown in the report and the JSON: what this audit is and is not.
CAUTION = (
    "harmonize prepares data; it does not assess stocks. This audit describes where and when "
    "the store holds samples, not the state of any population. Official survey protocols and "
    "local rules on confidential data prevail."
)


@dataclass
class AuditResult:
    """The outcome of :func:`audit`.

    Attributes
    ----------
    extent, coverage
        The contract's extent and coverage tables (with a few extra columns).
    findings
        Sorted by severity (errors first).
    metrics
        All aggregated tables, for the report.
    domain_cells
        The study's domain cells (cell_id, ix, iy, lon, lat).
    """

    study_name: str
    generated_at: str
    year: int | None
    metrics: Metrics
    findings: list[Finding]
    domain_cells: pd.DataFrame
    settings: dict[str, Any] = field(default_factory=dict)
    #: What the next audit compares with (:func:`harmonize.audit.since.store_basis`).
    basis: dict[str, Any] = field(default_factory=dict)
    #: The comparison with a previous audit, when one was given (``audit(since=...)``).
    since: Since | None = None
    #: A sampling plan to show in the report (:func:`harmonize.audit.plan.plan_samples`), if set.
    plan: Any = None
    readiness: ModelReadiness | None = None
    #: What the store received, from where, and the effort totals (None: not computed).
    received: Received | None = None

    @property
    def extent(self) -> pd.DataFrame:
        return self.metrics.extent

    @property
    def coverage(self) -> pd.DataFrame:
        return self.metrics.coverage

    def codes(self) -> set[str]:
        """Codes of the findings present."""
        return {f.code for f in self.findings}

    def has_any(self, codes: Iterable[str]) -> bool:
        """True when a finding with one of ``codes`` exists."""
        wanted = set(codes)
        return any(f.code in wanted for f in self.findings)

    def groups(self) -> list[FindingGroup]:
        """The findings grouped by (code, source kind, layer) and ranked by what they put at risk."""
        cells = self.domain_cells
        n = max(len(cells), 1)
        shares = (cells["stratum"].dropna().value_counts() / n).to_dict() if "stratum" in cells else {}
        layers = [x for x in self.settings.get("depth_layers", []) if x != "integrated"]
        enc = self.metrics.encounters
        n_taxa = int(enc["variable"].nunique()) if len(enc) else 1
        return group_findings(self.findings, len(self.settings.get("seasons", {})) or 1, len(layers) or 1,
                              n_taxa, shares)

    def counts(self) -> dict[str, int]:
        """Number of findings per severity."""
        return {s: sum(f.severity == s for f in self.findings) for s in SEVERITIES}

    def suppression(self) -> dict[str, Any]:
        """Confidential effort cells: the threshold and how many cells are never named."""
        s = self.metrics.suppressed
        return {
            "min_vessels": self.settings.get("min_vessels"),
            "cells_suppressed": int(s["cells_suppressed"].sum()) if len(s) else 0,
            "cell_years_suppressed": int(s["cell_years_suppressed"].sum()) if len(s) else 0,
            "events_suppressed": int(s["events_suppressed"].sum()) if len(s) else 0,
        }

    def to_json_dict(self) -> dict[str, Any]:
        """The audit as the contract's JSON object (section 6), plus extra keys."""
        extent_cols = ["source_kind", "season", "depth_layer", "events", "years"]
        coverage_cols = ["source_kind", "season_year", "season", "events", "cells_sampled", "coverage_fraction"]
        ext = self.extent
        cov = self.coverage
        out = {
            "format": AUDIT_FORMAT,
            "schema_version": AUDIT_SCHEMA_VERSION,
            "study": self.study_name,
            "generated_at": self.generated_at,
            "extent": _records(ext, extent_cols + ["first_year", "last_year", "presence_only_events"]),
            "coverage": _records(cov, coverage_cols + ["strata_sampled", "cells_suppressed",
                                                      "presence_only_events", "domain_cells", "complete"]),
            "incomplete_periods": _records(self.metrics.periods, list(self.metrics.periods.columns)),
            "findings": [{**f.to_dict(), "key": finding_key(f)} for f in self.findings],
            "finding_groups": [dict(g.to_dict(), rank=i + 1) for i, g in enumerate(self.groups())],
            "audited_year": self.year,
            "settings": self.settings,
            "confidentiality": self.suppression(),
            "source_comparisons": _records(self.metrics.comparisons, list(self.metrics.comparisons.columns)),
            "model_readiness": self.readiness.to_json_dict() if self.readiness is not None else None,
            **({"received": _records(self.received.by_source, list(self.received.by_source.columns)),
                "quarantine_reasons": _records(self.received.reasons, list(self.received.reasons.columns)),
                "effort_totals": _records(self.received.effort, list(self.received.effort.columns)),
                "ingests": [{**r, "files": list(r["files"] or [])} for r in
                            _records(self.received.ingests.astype({"started_at": str}),
                                     list(self.received.ingests.columns))]}
               if self.received is not None else {}),
            "caution": CAUTION,
            "tool_version": __version__,
            "contract_version": CONTRACT_VERSION,
            **self.basis,
        }
        if self.since is not None:
            out["since_last_audit"] = self.since.to_json_dict()
        if self.plan is not None:
            out["sampling_plan"] = self.plan.to_json_dict()
        return out

    def write_json(self, path: str | Path) -> Path:
        """Write :meth:`to_json_dict` to ``path`` (UTF-8, indented)."""
        from harmonize.export.atomic import atomic_file

        path = Path(path)
        text = json.dumps(self.to_json_dict(), indent=2, ensure_ascii=False) + "\n"
        with atomic_file(path) as tmp:  # all or nothing: an earlier file stays until this one is complete
            tmp.write_text(text, encoding="utf-8")
        return path

    def write_html(self, path: str | Path) -> Path:
        """Write the self-contained HTML report to ``path``."""
        from harmonize.audit.report import render_html
        from harmonize.export.atomic import atomic_file

        path = Path(path)
        text = render_html(self)
        with atomic_file(path) as tmp:  # all or nothing: an earlier file stays until this one is complete
            tmp.write_text(text, encoding="utf-8")
        return path


def _records(frame: pd.DataFrame, columns: Sequence[str]) -> list[dict[str, Any]]:
    cols = [c for c in columns if c in frame.columns]
    out = []
    for row in frame[cols].itertuples(index=False, name=None):
        out.append({c: _value(v) for c, v in zip(cols, row, strict=True)})
    return out


def _value(v: Any) -> Any:
    if isinstance(v, np.ndarray):
        v = v.tolist()
    if v is None or (not isinstance(v, str | list) and pd.isna(v)):
        return None
    if isinstance(v, np.generic):
        return v.item()
    return v


def domain_cells(study: Study) -> pd.DataFrame:
    """The study's grid cells whose centre lies in the domain (cell_id, ix, iy, lon, lat, stratum)."""
    cells = Grid(study.crs, study.cell_size_km).cells_covering(study.domain)
    cells["stratum"] = assign_strata(study.strata, cells["lon"].to_numpy(), cells["lat"].to_numpy())
    return cells


def audit(study: Study, year: int | None = None, engine: str | None = None,
          scheduler: str | None = None, since: str | Path | dict[str, Any] | None = None) -> AuditResult:
    """Audit the coverage of everything in the study's store.

    Parameters
    ----------
    study
        The study; its store is opened read-only.
    year
        Audit this season year against the earlier ones (the annual audit): later years are
        ignored and findings tied to a year are reported for this year only.
    engine
        "duckdb" or "dask": where the heavy aggregations run (default: ``HARMONIZE_ENGINE``
        or "duckdb"); the result is the same (see :mod:`harmonize.engines`).
    scheduler
        Address of a Dask scheduler for ``engine="dask"`` (default: a local cluster).
    since
        A previous audit JSON of this study (its path, or the parsed object): the result then
        holds what changed since (``result.since``, :mod:`harmonize.audit.since`).

    Returns
    -------
    AuditResult

    Raises
    ------
    StoreError
        When the study has no store yet.
    HarmonizeError
        When ``year`` is outside the years the store holds, or ``since`` is not an audit JSON
        of this study in this version's format.
    """
    previous = None
    if since is not None:
        previous = (check_previous(since, "the previous audit", study.name) if isinstance(since, dict)
                    else load_previous(since, study.name))
    cells = domain_cells(study)
    store = Store(study.store_dir)
    with store.connect() as con:
        if year is not None:
            lo, hi = con.execute("SELECT min(season_year), max(season_year) FROM observations").fetchall()[0]
            if lo is None or not lo <= year <= hi:
                span = "no records" if lo is None else f"records for season years {lo}-{hi}"
                raise HarmonizeError(f"cannot audit season year {year}: the store holds {span}; "
                                     "pass a year inside that range")
        choice = current_engine() if engine is None else EngineChoice(check_engine(engine), scheduler)
        metrics = audit_engine(choice.name)(AuditInputs(
            con, [str(store.directory / p) for p in store.live_paths(con)], cells, study.min_vessels, year, Disclosure.for_study(study),
            scheduler or choice.scheduler))
        metrics.periods = incomplete_periods(last_samples(con, year), study.seasons)
        accounts = received(con, year, Disclosure.for_study(study))
        incomplete = incomplete_keys(metrics.periods)
        metrics.coverage["complete"] = [
            (k, int(y), s) not in incomplete for k, y, s in
            zip(metrics.coverage["source_kind"], metrics.coverage["season_year"], metrics.coverage["season"],
                strict=True)]
        readiness = model_readiness(con, study, year)
        basis = store_basis(con, len(cells), year)
        # incomplete seasons are known before the findings, which leave them out of drops and gaps
        findings = sort_findings(all_findings(metrics, study, year) + readiness_findings(readiness))
        compared = None if previous is None else compare(previous, basis, findings, con, store.directory)
    settings = {
        "min_events": study.audit.min_events, "coverage_drop": study.audit.coverage_drop,
        "min_encounters": study.audit.min_encounters, "min_vessels": study.min_vessels,
        "generalise_deg": study.generalise_deg,
        "cell_size_km": study.cell_size_km, "crs": study.crs, "domain_cells": len(cells),
        "seasons": {k: list(v) for k, v in study.seasons.items()},
        "depth_layers": [layer.name for layer in study.depth_layers] + ["near_bottom", "integrated"],
        "depth_layer_bounds": {layer.name: [layer.top_m, layer.bottom_m] for layer in study.depth_layers},
        "near_bottom_m": study.near_bottom_m,
        "tolerances": tolerances(study),
    }
    return AuditResult(
        study_name=study.name,
        generated_at=pd.Timestamp.now("UTC").isoformat(timespec="seconds"),
        year=year,
        metrics=metrics,
        findings=findings,
        domain_cells=cells,
        settings=settings,
        basis=basis,
        since=compared,
        readiness=readiness,
        received=accounts,
    )


def parse_codes(text: str | None) -> list[str]:
    """``"a,b"`` -> ["a", "b"], refusing unknown finding codes.

    Raises
    ------
    HarmonizeError
        Naming the unknown code and the valid ones.
    """
    if not text:
        return []
    codes = [c.strip() for c in text.split(",") if c.strip()]
    unknown = [c for c in codes if c not in CODES]
    if unknown:
        raise HarmonizeError(f"unknown finding code(s) {', '.join(unknown)}; valid codes are {', '.join(CODES)}")
    return codes


def demo_outputs(study: Study, out_dir: Path, result: AuditResult | None = None) -> dict[str, Path]:
    """Audit the demo study (unless ``result`` is given) and write its JSON and HTML report."""
    result = result if result is not None else audit(study)
    out_dir = Path(out_dir)
    return {
        "audit JSON": result.write_json(out_dir / "audit.json"),
        "audit report": result.write_html(out_dir / "audit.html"),
    }
