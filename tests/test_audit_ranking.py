"""Grouped, ranked findings: one row per (code, source kind, layer), ranked by severity and share at risk."""

from __future__ import annotations

import pytest

from harmonize.audit.findings import Finding
from harmonize.audit.ranking import group_findings

SEASONS, LAYERS, TAXA = 4, 4, 10
STRATA = {"North": 0.25, "South": 0.75}


def _f(code: str, severity: str, kind: str, **kw) -> Finding:  # type: ignore[no-untyped-def]
    return Finding(code, severity, f"{code} {kind} {kw}.", source_kind=kind, **kw)


def test_repetitive_findings_collapse_into_one_row_per_code_kind_layer() -> None:
    found = [_f("thin_samples", "info", "plankton", season_year=y, season=s, depth_layer="mesopelagic")
             for y in (2019, 2020, 2021) for s in ("spring", "autumn")]
    found += [_f("thin_samples", "info", "plankton", season_year=2020, season="spring", depth_layer="surface")]
    groups = group_findings(found, SEASONS, LAYERS, TAXA, STRATA)
    assert [(g.code, g.source_kind, g.depth_layer, g.count) for g in groups] == [
        ("thin_samples", "plankton", "mesopelagic", 6), ("thin_samples", "plankton", "surface", 1)]
    # share at risk: 2 distinct season x layer places of 4 x 4 (the three years repeat them)
    assert groups[0].share_at_risk == pytest.approx(2 / (SEASONS * LAYERS))
    assert groups[1].share_at_risk == pytest.approx(1 / (SEASONS * LAYERS))
    assert groups[0].years == [2019, 2020, 2021]


def test_rank_by_severity_then_share_at_risk() -> None:
    found = [
        # a note touching a whole season (all layers): large share, but only a note
        _f("no_samples", "info", "plankton", season_year=2020, season="spring"),
        # an error in one stratum (a quarter of the domain) of one season, all layers
        _f("no_samples", "error", "trawl", season_year=2022, season="summer", stratum="North"),
        # warnings: one layer in all seasons, vs one season x layer of one taxon
        _f("source_disagreement", "warning", "trawl", depth_layer="near_bottom", variable="t"),
        _f("few_encounters", "warning", "plankton", season="spring", depth_layer="surface", variable="Copelix"),
        # a drop that lost 60 % of the usual coverage in one season
        Finding("coverage_drop", "warning", "drop.", source_kind="trawl", season_year=2022, season="summer",
                details={"coverage_fraction": 0.04, "earlier_median": 0.10}),
    ]
    groups = group_findings(found, SEASONS, LAYERS, TAXA, STRATA)
    order = [(g.severity, g.code) for g in groups]
    assert order == [("error", "no_samples"), ("warning", "source_disagreement"), ("warning", "coverage_drop"),
                     ("warning", "few_encounters"), ("info", "no_samples")]
    shares = [g.share_at_risk for g in groups]
    # by hand: space x seasons x layers (x 1 / taxa for a taxon's finding)
    assert shares == pytest.approx([0.25 * 1 / 4, 1 / 4, 0.6 * 1 / 4, 1 / 16 / 10, 1 / 4])


def test_never_sampled_combinations_are_one_group() -> None:
    found = [Finding("no_samples", "warning", "none.", source_kind="all_biological", season=s, depth_layer=x,
                     details={"level": "never_sampled"})
             for s, x in (("winter", "epipelagic"), ("winter", "mesopelagic"), ("summer", "mesopelagic"))]
    groups = group_findings(found, SEASONS, LAYERS, TAXA, STRATA)
    assert len(groups) == 1 and groups[0].never_sampled and groups[0].count == 3
    assert groups[0].share_at_risk == pytest.approx(3 / 16)
    assert "3 season x layer combinations" in groups[0].headline()
