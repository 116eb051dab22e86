"""The report's maps: readable cells, domain and strata outlines, contrast, hatching, domain cells only."""

from __future__ import annotations

import re

import pytest
from audit_stores import KnownGaps, build_known_gaps, copy_fixture_study

from harmonize.audit.run import audit
from harmonize.study import Study, load_study


@pytest.fixture(scope="module")
def page(tmp_path_factory: pytest.TempPathFactory) -> tuple[str, KnownGaps, Study]:
    study = load_study(copy_fixture_study(tmp_path_factory.mktemp("maps") / "study"))
    known = build_known_gaps(study)
    html = audit(study).write_html(tmp_path_factory.mktemp("maps_out") / "r.html").read_text(encoding="utf-8")
    return html, known, study


def _luminance(hex_colour: str) -> float:
    """Relative luminance, WCAG 2.1 definition (W3C 2018, Web Content Accessibility Guidelines 2.1)."""
    channels = [int(hex_colour[i:i + 2], 16) / 255 for i in (1, 3, 5)]
    lin = [c / 12.92 if c <= 0.03928 else ((c + 0.055) / 1.055) ** 2.4 for c in channels]
    return 0.2126 * lin[0] + 0.7152 * lin[1] + 0.0722 * lin[2]


def _contrast(a: str, b: str) -> float:
    la, lb = sorted((_luminance(a), _luminance(b)), reverse=True)
    return (la + 0.05) / (lb + 0.05)


def test_wcag_formula_against_known_values() -> None:
    # black on white is 21:1 and a colour against itself 1:1, by the definition's end points
    assert _contrast("#000000", "#ffffff") == pytest.approx(21.0)
    assert _contrast("#777777", "#777777") == pytest.approx(1.0)


def test_legend_colours_contrast_3_to_1_with_the_unsampled_colour(page) -> None:  # type: ignore[no-untyped-def]
    html = page[0]
    legend = html[html.index('<section id="maps">'):]
    legend = legend[:legend.index("</div>")]
    swatches = dict((label.strip(), colour) for colour, label in
                    re.findall(r'fill="(#[0-9a-fA-F]{6})" stroke="#5b6675" stroke-width="0.5"/></svg> ([^<]+)<', legend))
    unsampled = swatches.pop("domain cell, nothing recorded")
    assert set(swatches) == {"1 sample", "2-4 samples", "5 or more"}
    for label, colour in swatches.items():
        # WCAG 2.1 success criterion 1.4.11 (non-text contrast): at least 3:1
        assert _contrast(colour, unsampled) >= 3.0, (label, colour, _contrast(colour, unsampled))
    hatch = re.search(r'<line x1="0" y1="0" x2="0" y2="5" stroke="(#[0-9a-fA-F]{6})"', legend).group(1)
    assert _contrast(hatch, unsampled) >= 3.0


def test_maps_draw_domain_cells_outlines_labels_and_hatching(page) -> None:  # type: ignore[no-untyped-def]
    html, known, study = page
    maps = html[html.index('<section id="maps">'):html.index("</section>", html.index('<section id="maps">'))]
    figures = re.findall(r"<figure>(.*?)</figure>", maps, flags=re.S)
    assert figures
    for fig in figures:
        background = re.search(r'<path d="([^"]+)" fill="#eef1f4"/>', fig).group(1)
        side = float(re.search(r"h([0-9.]+)v", background).group(1))
        assert side >= 4.0  # a 25 km cell is at least 4 px: visible
        assert background.count("z") == known.n_domain_cells == 165  # every domain cell, no other
        assert "Thorne Deep</text>" in fig and "Vossa Bank</text>" in fig
        assert 'stroke-dasharray="3 2"' in fig  # the strata boundary
    # trawl 2022: distinct cells hauled in that season year (winter and summer), counted here
    cells_2022 = set(known.trawl_cells[(2022, "winter")]) | set(known.trawl_cells[(2022, "summer")])
    assert f"<b>2022</b> · {len(cells_2022)} of 165 cells sampled" in maps
    # the volunteers' presence-only sightings are hatched, never coloured as samples
    volunteer = [f for f in figures if 'aria-label="opportunistic' in f]
    assert volunteer and all("url(#hatch-opportunistic-" in f for f in volunteer)
    assert all("0 of 165 cells sampled, 3 presence-only" in f for f in volunteer)
