"""The audit's outputs: JSON in the contract's shape, the CLI verb and its exit codes, the HTML report."""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest
from audit_browser import browser, load_page
from audit_stores import build_known_gaps, copy_fixture_study

from harmonize.audit.findings import CODES
from harmonize.audit.run import CAUTION, audit
from harmonize.study import Study, load_study

HARMONIZE = Path(sys.executable).parent / "harmonize"

# CONTRACT.md section 6: the keys every object must carry (extra keys are allowed)
TOP_KEYS = {"study", "generated_at", "extent", "coverage", "findings"}
EXTENT_KEYS = {"source_kind": str, "season": str, "depth_layer": str, "events": int, "years": int}
COVERAGE_KEYS = {"source_kind": str, "season_year": int, "season": str, "events": int, "cells_sampled": int,
                 "coverage_fraction": float}
FINDING_KEYS = ("code", "severity", "source_kind", "season_year", "season", "depth_layer", "stratum",
                "variable", "message")


@pytest.fixture(scope="module")
def study(tmp_path_factory: pytest.TempPathFactory) -> Study:
    s = load_study(copy_fixture_study(tmp_path_factory.mktemp("audit_out") / "study"))
    build_known_gaps(s)
    return s


def _cli(study: Study, *args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([str(HARMONIZE), "--study", str(study.root), "audit", *args],
                          capture_output=True, text=True, timeout=300,
                          env={**os.environ, "COLUMNS": "160"})


def test_json_has_the_contract_shape(study: Study, tmp_path: Path) -> None:
    doc = json.loads(audit(study).write_json(tmp_path / "audit.json").read_text(encoding="utf-8"))
    assert TOP_KEYS <= set(doc)
    assert doc["study"] == "Keldmar Sea test study"
    assert re.match(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d\+00:00$", doc["generated_at"])
    for item, keys in [(x, EXTENT_KEYS) for x in doc["extent"]] + [(x, COVERAGE_KEYS) for x in doc["coverage"]]:
        for key, typ in keys.items():
            assert isinstance(item[key], typ), (key, item)
    for f in doc["findings"]:
        assert list(f)[:len(FINDING_KEYS)] == list(FINDING_KEYS)
        assert f["code"] in CODES and f["severity"] in ("error", "warning", "info")
        assert isinstance(f["message"], str) and f["message"].endswith(".")
        assert f["season_year"] is None or isinstance(f["season_year"], int)
    trawl_winter = [c for c in doc["coverage"] if (c["source_kind"], c["season"]) == ("trawl", "winter")]
    # the silent winter is an explicit zero row, not a missing one
    assert [(c["season_year"], c["events"]) for c in trawl_winter] == [
        (2018, 20), (2019, 20), (2020, 20), (2021, 0), (2022, 20)]
    assert doc["caution"] == CAUTION


def test_cli_fail_on_exit_codes(study: Study, tmp_path: Path) -> None:
    out_json, out_html = tmp_path / "a.json", tmp_path / "a.html"
    run = _cli(study, "--fail-on", "no_samples", "--json", str(out_json), "--html", str(out_html))
    assert run.returncode == 1, run.stderr
    assert "failing: findings with code(s) no_samples exist" in run.stdout
    assert out_json.is_file() and out_html.is_file()
    # the terminal summary lists errors before warnings
    text = run.stdout
    assert "4 errors, 9 warnings" in text
    assert text.index("error") < text.index("warning")
    # codes the audit does not find (season year 2020 has no thin samples): exit 0
    ok = _cli(study, "--year", "2020", "--fail-on", "thin_samples")
    assert ok.returncode == 0, ok.stdout + ok.stderr
    assert _cli(study, "--year", "2020", "--fail-on", "thin_samples,missing_year").returncode == 1
    assert _cli(study).returncode == 0
    bad = _cli(study, "--fail-on", "gaps")
    assert bad.returncode == 2
    assert "unknown finding code(s) gaps; valid codes are no_samples" in bad.stderr


def test_cli_without_a_store_is_a_usage_error(tmp_path: Path) -> None:
    empty = load_study(copy_fixture_study(tmp_path / "empty"))
    run = _cli(empty)
    assert run.returncode == 2
    assert "no store" in run.stderr and "harmonize ingest" in run.stderr


def test_html_is_self_contained(study: Study, tmp_path: Path) -> None:
    html = audit(study).write_html(tmp_path / "r.html").read_text(encoding="utf-8")
    assert "<script" not in html.lower() and "<link" not in html.lower()
    # the only URL is the SVG namespace, which is a name, not a request
    assert set(re.findall(r"https?://[^\s\"'<>)]+", html)) == {"http://www.w3.org/2000/svg"}
    assert not re.search(r"\b(src|href)\s*=\s*[\"'](?!#)", html)
    assert CAUTION in html
    # finding groups sorted by severity, errors first
    groups = re.findall(r'<details class="group"><summary><span class="badge (error|warning|info)">', html)
    assert groups == sorted(groups, key=("error", "warning", "info").index) and groups[0] == "error"


#: The report's sections, in order (their headings, as a reader sees them).
SECTIONS = ["What to act on", "Findings", "How this report counts", "Data received",
            "Which seasons and depth layers the data describe", "Coverage through time", "Coverage by stratum",
            "Sampled cells per year", "Effort per year", "Agreement between sources", "Model readiness of taxa",
            "Confidential fishing data", "Provenance"]


@pytest.fixture(scope="module")
def chromium():
    with browser() as b:
        yield b


@pytest.mark.parametrize("width", [800, 1400])
def test_report_renders_in_a_headless_browser(study: Study, chromium, tmp_path: Path, width: int) -> None:
    page = audit(study).write_html(tmp_path / "audit.html")
    shot = tmp_path / f"audit-{width}.png"
    loaded = load_page(chromium, page, width, screenshot=shot, pdf=True)
    assert loaded.console_errors == []
    assert loaded.requests == []
    assert loaded.title == "Coverage audit: Keldmar Sea test study"
    assert loaded.overflow == []  # nothing wider than the window, nothing scrolling sideways
    assert loaded.section_titles == SECTIONS
    assert shot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    # printed: a PDF of several pages, with every collapsed table opened
    assert loaded.pdf[:5] == b"%PDF-"
    assert len(re.findall(rb"/Type\s*/Page[^s]", loaded.pdf)) >= 2
    assert loaded.hidden_in_print == 0
    if os.environ.get("HARMONIZE_SCREENSHOT_DIR"):
        shutil.copy(shot, Path(os.environ["HARMONIZE_SCREENSHOT_DIR"]) / shot.name)


def test_the_browser_check_sees_requests_errors_and_overflow(chromium, tmp_path: Path) -> None:
    # control: the same checks on a page that makes a request, logs an error and is too wide
    page = tmp_path / "bad.html"
    page.write_text('<!DOCTYPE html><html><head><title>bad</title></head><body>'
                    '<img src="http://127.0.0.1:9/missing.png"><script>console.error("boom")</script>'
                    '<div style="width:1000px">wide</div>'
                    '<div style="overflow-x:auto;width:100px"><table style="width:600px"><tr><td>x</td></tr>'
                    "</table></div></body></html>", encoding="utf-8")
    loaded = load_page(chromium, page, 800)
    assert "http://127.0.0.1:9/missing.png" in loaded.requests
    assert any("boom" in e for e in loaded.console_errors)
    assert any(o.startswith("document") for o in loaded.overflow)
    assert any("scrolls 600>100" in o for o in loaded.overflow)
