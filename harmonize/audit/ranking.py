"""Findings grouped and ranked: one row per (code, source kind, depth layer), by what they put at risk.

A group collects the findings of one code about one source kind in one depth layer (the
combinations no biological source samples at all form one group of their own: they are one
problem, a gap in the design). Its *share at risk* is the share of the study's
domain x seasons x depth layers its findings touch, summed over its distinct places (a year
repeated at the same place counts once):

- space: the whole domain, or for a stratum its share of the domain's cells, or for
  ``coverage_drop`` the share of the usual coverage that was lost;
- seasons: 1 / number of seasons when the finding names one, else all of them;
- layers: 1 / number of depth layers when it names one, else all of them;
- a finding about one taxon is divided by the number of taxa in the store (it puts one
  taxon's estimates at risk, not the others').

Groups are ranked by their worst severity, then by share at risk, then by count.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

from harmonize.audit.findings import CODES, SEVERITIES, Finding, _plain

NEVER_SAMPLED = "never_sampled"

#: What each code says, for a group's headline.
CODE_TITLE = {
    "no_samples": "No samples where earlier years had them",
    "thin_samples": "Fewer samples than the study asks for",
    "coverage_drop": "Share of the domain sampled fell",
    "missing_year": "A series has no records in a year inside its span",
    "few_encounters": "Taxa encountered too rarely to fit",
    "volunteer_only": "Described only by volunteers",
    "source_disagreement": "Sources disagree on a physical variable",
}


@dataclass
class FindingGroup:
    """Findings of one code about one source kind in one layer, and what they put at risk."""

    code: str
    severity: str
    source_kind: str | None
    depth_layer: str | None
    findings: list[Finding] = field(default_factory=list)
    share_at_risk: float = 0.0
    never_sampled: bool = False

    @property
    def count(self) -> int:
        return len(self.findings)

    @property
    def years(self) -> list[int]:
        return sorted({f.season_year for f in self.findings if f.season_year is not None})

    def headline(self) -> str:
        """One sentence: the finding's own message when alone, else what the group holds."""
        if self.count == 1:
            return self.findings[0].message
        if self.never_sampled:
            places = _places(self.findings, with_year=False)
            return (f"{self.count} season x layer combinations are sampled by no biological source in any "
                    f"year ({places}); a model fitted to these data only extrapolates there.")
        if self.code == "source_disagreement":
            pairs = "; ".join(
                f"{f.details.get('source_a')} minus {f.details.get('source_b')}: "
                f"{float(f.details.get('mean_difference') or 0):+.2f} {f.details.get('unit') or ''}".rstrip()
                for f in self.findings)
            return f"{CODE_TITLE[self.code]}, {self.findings[0].variable}: {pairs}."
        sev = {s: sum(f.severity == s for f in self.findings) for s in SEVERITIES}
        mix = ", ".join(f"{n} {_sev_word(s, n)}" for s, n in sev.items() if n)
        return f"{CODE_TITLE.get(self.code, self.code)}: {self.count} findings ({mix}): {_places(self.findings)}."

    def to_dict(self) -> dict[str, Any]:
        return {"code": self.code, "severity": self.severity, "source_kind": self.source_kind,
                "depth_layer": self.depth_layer, "count": self.count, "share_at_risk": _plain(self.share_at_risk),
                "never_sampled": self.never_sampled, "season_years": self.years, "headline": self.headline()}


def _sev_word(severity: str, n: int) -> str:
    word = {"error": "error", "warning": "warning", "info": "note"}[severity]
    return word + ("" if n == 1 else "s")


def _places(findings: Sequence[Finding], with_year: bool = True, limit: int = 6) -> str:
    out: list[str] = []
    for f in findings:
        bits = [str(x) for x in ((f.season_year if with_year else None), f.season,
                                 f.depth_layer if not with_year else None,
                                 f.stratum, f.variable) if x not in (None, "")]
        text = " ".join(bits) or "all seasons"
        if text not in out:
            out.append(text)
    more = f" and {len(out) - limit} more" if len(out) > limit else ""
    return "; ".join(out[:limit]) + more


def finding_share(f: Finding, n_seasons: int, n_layers: int, n_taxa: int,
                  stratum_share: Mapping[str, float]) -> float:
    """Share of domain x seasons x layers one finding touches (see module doc)."""
    space = 1.0
    if f.stratum is not None:
        space = float(stratum_share.get(f.stratum, 0.0))
    if f.code == "coverage_drop":
        med = float(f.details.get("earlier_median") or 0.0)
        now = float(f.details.get("coverage_fraction") or 0.0)
        space = max(0.0, 1.0 - now / med) if med > 0 else 0.0
    seasons = 1.0 / max(n_seasons, 1) if f.season is not None else 1.0
    layers = 1.0 / max(n_layers, 1) if f.depth_layer is not None else 1.0
    taxa = 1.0 / max(n_taxa, 1) if f.variable is not None and f.code in ("few_encounters", "volunteer_only") else 1.0
    return space * seasons * layers * taxa


def group_findings(findings: Sequence[Finding], n_seasons: int, n_layers: int, n_taxa: int,
                   stratum_share: Mapping[str, float]) -> list[FindingGroup]:
    """Group ``findings`` and rank the groups (see module doc)."""
    groups: dict[tuple[Any, ...], FindingGroup] = {}
    for f in findings:
        never = f.details.get("level") == NEVER_SAMPLED
        key = (f.code, f.source_kind, NEVER_SAMPLED) if never else (f.code, f.source_kind, f.depth_layer)
        g = groups.get(key)
        if g is None:
            g = groups[key] = FindingGroup(f.code, f.severity, f.source_kind, None if never else f.depth_layer,
                                           never_sampled=never)
        g.findings.append(f)
        if SEVERITIES.index(f.severity) < SEVERITIES.index(g.severity):
            g.severity = f.severity
    for g in groups.values():
        seen: dict[tuple[Any, ...], float] = {}
        for f in g.findings:
            place = (f.season, f.depth_layer, f.stratum, f.variable, f.details.get("source_b"))
            seen[place] = max(seen.get(place, 0.0), finding_share(f, n_seasons, n_layers, n_taxa, stratum_share))
        g.share_at_risk = min(1.0, sum(seen.values()))
        g.findings.sort(key=lambda f: (SEVERITIES.index(f.severity), f.season_year or 0, f.season or "",
                                       f.stratum or "", f.variable or ""))
    return sorted(groups.values(), key=lambda g: (SEVERITIES.index(g.severity), -g.share_at_risk, -g.count,
                                                  CODES.index(g.code), g.source_kind or "", g.depth_layer or ""))
