"""The demo's report as a reader meets it: planted problems on top, 2024 marked incomplete, and a real browser.

The demo (harmonize.demo) plants: a 2022 trawl survey that fished only the northern stations,
almost no winter sampling, and an ocean model running colder at the sea floor than the trawl
sensors. Its satellite and volunteer data stop in December 2023, the first month of winter 2024.
"""

from __future__ import annotations

import re
from pathlib import Path

import pytest
from audit_browser import browser, load_page

from harmonize.audit.run import audit
from harmonize.demo.build import build_demo
from harmonize.study import load_study

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory):  # type: ignore[no-untyped-def]
    folder = tmp_path_factory.mktemp("demo") / "demo-study"
    build_demo(folder)
    result = audit(load_study(folder))
    return result, result.write_html(folder / "outputs" / "audit-test.html")


def test_planted_problems_are_the_top_findings(demo) -> None:  # type: ignore[no-untyped-def]
    result, _ = demo
    top = [(g.severity, g.code, g.source_kind, g.never_sampled) for g in result.groups()[:5]]
    # 1: the 2022 trawl survey missed the southern strata (errors); then, among warnings, the
    # winter gap (season x layers no biological source samples), the colder model, the
    # trawl's coverage drop and the genus split into species in 2021 (resolution_change): every
    # one a problem planted in the demo
    assert top[0][:3] == ("error", "no_samples", "trawl")
    first = result.groups()[0]
    assert {(f.season_year, f.stratum) for f in first.findings} == {(2022, "Thorne Deep"), (2022, "Vossa Bank")}
    assert set(top[1:]) == {("warning", "no_samples", "all_biological", True),
                            ("warning", "source_disagreement", "trawl", False),
                            ("warning", "coverage_drop", "trawl", False),
                            ("warning", "resolution_change", "trawl", False)}
    never = next(g for g in result.groups() if g.never_sampled)
    assert {f.season for f in never.findings} >= {"winter"}
    # chance-level thinness is never an error
    assert not [f for f in result.findings if f.severity == "error" and f.code in ("thin_samples", "no_samples")
                and f.source_kind != "trawl"]


def test_winter_2024_is_incomplete_and_fires_no_drop(demo) -> None:  # type: ignore[no-untyped-def]
    result, page = demo
    cov = result.coverage
    inc = cov[(cov["season_year"] == 2024) & (cov["season"] == "winter")]
    assert len(inc) and not inc["complete"].any()
    assert not [f for f in result.findings if f.season_year == 2024 and f.code in
                ("coverage_drop", "thin_samples", "no_samples")]
    assert "2018-2023 (2024 incomplete)" in page.read_text(encoding="utf-8")


@pytest.mark.parametrize("width", [800, 1400])
def test_demo_report_in_chromium(demo, width: int, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    _, page = demo
    with browser() as b:
        loaded = load_page(b, page, width, pdf=True)
    assert loaded.console_errors == [] and loaded.requests == []
    assert loaded.overflow == []
    assert len(loaded.section_titles) == 13 and loaded.section_titles[0] == "What to act on"
    assert loaded.pdf[:5] == b"%PDF-" and len(re.findall(rb"/Type\s*/Page[^s]", loaded.pdf)) >= 5
    assert loaded.hidden_in_print == 0
