"""The audit as one self-contained HTML page: inline CSS and SVG, no scripts, no outside requests."""

from __future__ import annotations

from collections.abc import Sequence
from html import escape
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from harmonize import __version__
from harmonize.adapters.registry import kinds as registered_kinds
from harmonize.audit.findings import CODES
from harmonize.audit.metrics import ALL_BIOLOGICAL
from harmonize.audit.readiness import readiness_html

if TYPE_CHECKING:
    from harmonize.audit.run import AuditResult

KIND_LABEL = {ALL_BIOLOGICAL: "all biological sources"}
#: Okabe and Ito (2008), "Color Universal Design": colours told apart with colour-vision deficiency.
SEASON_COLOURS = ("#0072B2", "#009E73", "#E69F00", "#CC79A7", "#56B4E9", "#D55E00", "#000000", "#F0E442")
#: Sequential scale for counts (light to dark blue).
SCALE_LOW, SCALE_HIGH = (0xEE, 0xF3, 0xFA), (0x0B, 0x3C, 0x7D)
MAX_MAP_YEARS = 12
#: Map classes: (lowest number of samples in a cell, colour) and their legend.
MAP_BINS = ((1, "#9ecae1"), (2, "#4292c6"), (5, "#08519c"))
MAP_LABELS = (("1 sample", "#9ecae1"), ("2-4 samples", "#4292c6"), ("5 or more", "#08519c"))

CODE_HELP = {
    "no_samples": "a season, layer or stratum usually sampled has no samples that year; or no biological source samples a season x layer at all",
    "thin_samples": "fewer samples than the study's minimum in a season x layer of a year",
    "coverage_drop": "share of domain cells sampled fell below the study's fraction of the earlier median",
    "missing_year": "a source has no records for a year inside its span",
    "few_encounters": "a taxon is encountered too few times in every season x layer to model it alone",
    "volunteer_only": "a season x layer (or a taxon there) is described only by volunteers",
    "source_disagreement": "two sources of a physical variable differ in the same cells and periods",
    "resolution_change": "a taxon is recorded as itself in some years or sources and as its finer taxa in others",
}

_CSS = """
:root { --ink:#1d2430; --muted:#5b6675; --rule:#d9dee5; --bg:#ffffff; --panel:#f6f8fb;
        --error:#b42318; --warning:#a15c00; --info:#1f5fa8; }
* { box-sizing: border-box; }
body { margin:0; background:var(--bg); color:var(--ink);
       font: 15px/1.5 "Segoe UI", "Helvetica Neue", Arial, "Liberation Sans", sans-serif; }
main { max-width: 1120px; margin: 0 auto; padding: 28px 32px 48px; }
h1 { font-size: 26px; margin: 0 0 2px; letter-spacing: -0.01em; }
h2 { font-size: 19px; margin: 34px 0 6px; padding-bottom: 4px; border-bottom: 2px solid var(--ink); }
h3 { font-size: 15px; margin: 18px 0 6px; }
p.lead { color: var(--muted); margin: 0 0 14px; }
p.note, .note { color: var(--muted); font-size: 13px; }
.caution { border-left: 4px solid var(--warning); background: #fff7e8; padding: 10px 14px; margin: 14px 0 18px; }
.cards { display: flex; flex-wrap: wrap; gap: 12px; margin: 12px 0 4px; }
.card { background: var(--panel); border: 1px solid var(--rule); border-radius: 6px; padding: 8px 12px; min-width: 108px; }
.card b { display: block; font-size: 22px; line-height: 1.2; }
.card span { color: var(--muted); font-size: 13px; }
.card.error b { color: var(--error); } .card.warning b { color: var(--warning); } .card.info b { color: var(--info); }
table { border-collapse: collapse; font-size: 13.5px; margin: 6px 0 10px; }
th, td { padding: 4px 8px; border-bottom: 1px solid var(--rule); vertical-align: top; text-align: left; }
th { background: var(--panel); font-weight: 600; }
td.num, th.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
table.findings { width: 100%; }
table.findings td.where { width: 210px; } table.findings td.msg { width: 60%; }
.badge { display: inline-block; padding: 1px 8px; border-radius: 10px; font-size: 12px; font-weight: 600; color: #fff; }
.badge.error { background: var(--error); } .badge.warning { background: var(--warning); } .badge.info { background: var(--info); }
code { font-family: "DejaVu Sans Mono", Consolas, monospace; font-size: 12.5px; background: var(--panel); padding: 0 3px; border-radius: 3px; }
.grid { display: flex; flex-wrap: wrap; gap: 18px 26px; }
.panel { break-inside: avoid; }
table.heat td { text-align: center; min-width: 92px; border: 2px solid #fff; }
table.heat td.empty { background: #fbecea; color: var(--error); }
table.heat td.presence { background: repeating-linear-gradient(135deg, #f3f0fa, #f3f0fa 4px, #e6e0f3 4px, #e6e0f3 8px); color: #4b3b7a; }
table.heat th.row { text-align: left; }
.maps { display: flex; flex-wrap: wrap; gap: 6px 10px; align-items: flex-end; }
.maps figure { margin: 0; text-align: center; font-size: 12px; color: var(--muted); }
.legend { display: flex; gap: 14px; flex-wrap: wrap; font-size: 12.5px; color: var(--muted); margin: 4px 0; }
.swatch { display: inline-block; width: 12px; height: 12px; border-radius: 2px; vertical-align: -1px; margin-right: 4px; }
details summary { cursor: pointer; color: var(--info); margin: 6px 0; }
footer { margin-top: 40px; border-top: 1px solid var(--rule); padding-top: 10px; color: var(--muted); font-size: 12.5px; }
@media print { main { padding: 0; max-width: none; } h2 { break-after: avoid; } details { display: block; } }
"""


def _e(value: object) -> str:
    return escape("" if value is None else str(value))


def kind_order() -> tuple[str, ...]:
    """Order in which source kinds appear (Adapter.display_order); others follow alphabetically."""
    return (ALL_BIOLOGICAL, *registered_kinds())


def _kind_key(kind: str) -> tuple[int, str]:
    order = kind_order()
    return (order.index(kind) if kind in order else len(order), kind)


def _kinds(values: Sequence[str] | pd.Series) -> list[str]:
    return sorted({str(v) for v in values if v is not None and not pd.isna(v)}, key=_kind_key)


def _label(kind: str) -> str:
    return KIND_LABEL.get(kind, kind)


def _shade(t: float) -> tuple[str, str]:
    """Background and text colour for a share t in [0, 1] of the sequential scale."""
    t = float(min(max(t, 0.0), 1.0))
    rgb = [round(lo + (hi - lo) * t) for lo, hi in zip(SCALE_LOW, SCALE_HIGH, strict=True)]
    return "#{:02x}{:02x}{:02x}".format(*rgb), ("#ffffff" if t > 0.55 else "#1d2430")


def _n(count: int, noun: str) -> str:
    return f"{count:,} {noun}{'' if count == 1 else 's'}"


def _fmt_int(n: object) -> str:
    return "" if n is None or pd.isna(n) else f"{int(n):,}"


# ----------------------------------------------------------------------------- sections
def _summary(result: AuditResult) -> str:
    counts = result.counts()
    cov = result.coverage
    years = sorted({int(y) for y in cov["season_year"].dropna()}) if len(cov) else []
    span = f"{years[0]}-{years[-1]}" if years else "none"
    ext = result.extent
    n_events = int(ext.loc[ext["source_kind"] != ALL_BIOLOGICAL, "events"].sum()) if len(ext) else 0
    kinds = _kinds(ext["source_kind"]) if len(ext) else []
    kinds = [k for k in kinds if k != ALL_BIOLOGICAL]
    cards = [
        f'<div class="card error"><b>{counts["error"]}</b><span>errors</span></div>',
        f'<div class="card warning"><b>{counts["warning"]}</b><span>warnings</span></div>',
        f'<div class="card info"><b>{counts["info"]}</b><span>notes</span></div>',
        f'<div class="card"><b>{n_events:,}</b><span>samples (events)</span></div>',
        f'<div class="card"><b>{len(kinds)}</b><span>source kinds</span></div>',
        f'<div class="card"><b>{_e(span)}</b><span>season years</span></div>',
        f'<div class="card"><b>{result.settings.get("domain_cells", 0):,}</b><span>domain cells of '
        f'{result.settings.get("cell_size_km", 0):g} km</span></div>',
    ]
    return '<div class="cards">' + "".join(cards) + "</div>"


def _findings(result: AuditResult) -> str:
    if not result.findings:
        return '<p>No findings: every combination the rules check is sampled as expected.</p>'
    rows = []
    for f in result.findings:
        where = " · ".join(_e(x) for x in (
            _label(f.source_kind) if f.source_kind else None, f.season_year, f.season,
            f.depth_layer, f"stratum {f.stratum}" if f.stratum else None,
            f.variable) if x not in (None, ""))
        rows.append(
            f'<tr><td><span class="badge {f.severity}">{_e(f.severity)}</span></td>'
            f"<td><code>{_e(f.code)}</code></td><td class=\"where\">{where}</td><td class=\"msg\">{_e(f.message)}</td></tr>")
    by_code = {c: sum(f.code == c for f in result.findings) for c in CODES}
    legend = "".join(f"<li><code>{c}</code> ({n}): {_e(CODE_HELP[c])}</li>" for c, n in by_code.items() if n)
    return (f'<ul class="note">{legend}</ul>'
            '<table class="findings"><thead><tr><th>severity</th><th>code</th><th>where</th>'
            f'<th>what to do</th></tr></thead><tbody>{"".join(rows)}</tbody></table>')


def _extent(result: AuditResult) -> str:
    ext = result.extent
    if ext.empty:
        return "<p>The store holds no samples.</p>"
    seasons = list(result.settings.get("seasons", {})) or sorted(ext["season"].dropna().unique())
    present = {str(x) for x in ext["depth_layer"].dropna().unique()}
    # every named layer and near_bottom always (an empty column is a finding); integrated when used
    layers: list[str | None] = [x for x in result.settings.get("depth_layers", []) if x != "integrated"]
    layers += sorted(x for x in present if x not in layers)
    if ext["depth_layer"].isna().any():
        layers.append(None)
    all_years = result.coverage["season_year"].dropna()
    n_years = max(int(all_years.max() - all_years.min() + 1), 1) if len(all_years) else 1
    panels = []
    for kind in _kinds(ext["source_kind"]):
        sub = ext[ext["source_kind"] == kind]
        head = "".join(f"<th>{_e(x if x is not None else 'no layer')}</th>" for x in layers)
        body = []
        for season in seasons:
            cells = []
            for layer in layers:
                hit = sub[(sub["season"] == season)
                          & (sub["depth_layer"].isna() if layer is None else sub["depth_layer"] == layer)]
                events = int(hit["events"].sum()) if len(hit) else 0
                years = int(hit["years"].max()) if len(hit) else 0
                presence = int(hit["presence_only_events"].sum()) if len(hit) else 0
                if events == 0 and presence:
                    cells.append(f'<td class="presence" title="{presence} presence-only records: encounters '
                                 f'without sampling effort">presence only<br><small>{presence:,} rec</small></td>')
                    continue
                if events == 0:
                    cls = ' class="empty"' if kind == ALL_BIOLOGICAL else ""
                    cells.append(f"<td{cls}>—</td>")
                    continue
                bg, fg = _shade(0.15 + 0.85 * years / n_years)
                cells.append(f'<td style="background:{bg};color:{fg}" title="{events} samples in {years} '
                             f'season years">{years} yr<br><small>{events:,} ev</small></td>')
            body.append(f'<tr><th class="row">{_e(season)}</th>{"".join(cells)}</tr>')
        panels.append(f'<div class="panel"><h3>{_e(_label(kind))}</h3><table class="heat"><thead><tr>'
                      f'<th></th>{head}</tr></thead><tbody>{"".join(body)}</tbody></table></div>')
    return ('<p class="lead">Season x depth layer: in how many season years each combination was sampled '
            '(darker = more years) and how many samples (ev) it holds. Red dashes in the first panel are '
            'combinations no biological source samples: a model fitted there only extrapolates. Hatched cells hold '
            'presence-only records (encounters without a measure of sampling effort).</p>'
            f'<div class="grid">{"".join(panels)}</div>')


def _line_chart(sub: pd.DataFrame, seasons: list[str], years: list[int], title: str) -> str:
    w, h, left, right, top, bottom = 340, 190, 40, 12, 24, 30
    pw, ph = w - left - right, h - top - bottom
    y0, y1 = years[0], years[-1]

    def sx(y: float) -> float:
        return left + (pw * (y - y0) / (y1 - y0) if y1 > y0 else pw / 2)

    # the axis ends at the smallest round share above the data, so low-coverage surveys stay readable
    peak = float(sub["coverage_fraction"].max()) if len(sub) else 0.0
    y_max = next(m for m in (0.02, 0.04, 0.08, 0.2, 0.4, 0.6, 0.8, 1.0) if m >= peak * 1.05 or m == 1.0)

    def sy(v: float) -> float:
        return top + ph * (1 - v / y_max)

    parts = [f'<svg xmlns="http://www.w3.org/2000/svg" width="{w}" height="{h}" viewBox="0 0 {w} {h}" '
             f'role="img" aria-label="{_e(title)}">',
             f'<text x="{left}" y="15" font-size="13" font-weight="600" fill="#1d2430">{_e(title)}</text>']
    for v in np.linspace(0, y_max, 5):
        parts.append(f'<line x1="{left}" x2="{w - right}" y1="{sy(v):.1f}" y2="{sy(v):.1f}" stroke="#d9dee5"/>'
                     f'<text x="{left - 5}" y="{sy(v) + 4:.1f}" font-size="10" text-anchor="end" '
                     f'fill="#5b6675">{round(v * 100, 1):g}%</text>')
    step = max(1, int(np.ceil(len(years) / 8)))
    for y in years[::step]:
        parts.append(f'<text x="{sx(y):.1f}" y="{h - 12}" font-size="10" text-anchor="middle" fill="#5b6675">{y}</text>')
    for i, season in enumerate(seasons):
        s = sub[sub["season"] == season].sort_values("season_year")
        if s.empty:
            continue
        colour = SEASON_COLOURS[i % len(SEASON_COLOURS)]
        pts = " ".join(f"{sx(y):.1f},{sy(v):.1f}" for y, v in zip(s["season_year"], s["coverage_fraction"], strict=True))
        parts.append(f'<polyline points="{pts}" fill="none" stroke="{colour}" stroke-width="2"/>')
        for y, v, n in zip(s["season_year"], s["coverage_fraction"], s["events"], strict=True):
            fill = colour if n > 0 else "#ffffff"
            parts.append(f'<circle cx="{sx(y):.1f}" cy="{sy(v):.1f}" r="3" fill="{fill}" stroke="{colour}">'
                         f"<title>{_e(season)} {int(y)}: {v:.1%} of cells, {int(n)} samples</title></circle>")
    parts.append("</svg>")
    return "".join(parts)


def _coverage(result: AuditResult) -> str:
    cov = result.coverage
    if cov.empty:
        return "<p>The store holds no samples.</p>"
    seasons = [s for s in result.settings.get("seasons", {}) if s in set(cov["season"])]
    seasons += sorted(set(cov["season"].dropna()) - set(seasons))
    years = list(range(int(cov["season_year"].min()), int(cov["season_year"].max()) + 1))
    legend = "".join(f'<span><span class="swatch" style="background:{SEASON_COLOURS[i % len(SEASON_COLOURS)]}"></span>'
                     f"{_e(s)}</span>" for i, s in enumerate(seasons))
    sampled_kinds = _kinds(cov.loc[cov["events"] > 0, "source_kind"])
    charts = "".join(f'<div class="panel">{_line_chart(cov[cov["source_kind"] == k], seasons, years, _label(k))}</div>'
                     for k in sampled_kinds)
    unsampled = [k for k in _kinds(cov["source_kind"]) if k not in sampled_kinds]
    if unsampled:
        charts += (f'<p class="note">Not charted: {_e(", ".join(unsampled))} (presence-only records, '
                   "no samples with effort).</p>")
    rows = []
    for r in cov.itertuples(index=False):
        supp = f" ({int(r.cells_suppressed)} not shown)" if r.cells_suppressed else ""
        style = ' style="color:#b42318"' if r.events == 0 else ""
        rows.append(f"<tr{style}><td>{_e(_label(r.source_kind))}</td><td class=\"num\">{int(r.season_year)}</td>"
                    f"<td>{_e(r.season)}</td><td class=\"num\">{_fmt_int(r.events)}</td>"
                    f"<td class=\"num\">{_fmt_int(r.cells_sampled)}{supp}</td>"
                    f"<td class=\"num\">{r.coverage_fraction:.1%}</td><td class=\"num\">{_fmt_int(r.strata_sampled)}</td>"
                    f"<td class=\"num\">{_fmt_int(r.presence_only_events)}</td></tr>")
    table = ('<details><summary>Coverage table (every source kind, season year and season)</summary>'
             '<table><thead><tr><th>source kind</th><th class="num">season year</th><th>season</th>'
             '<th class="num">samples</th><th class="num">cells sampled</th><th class="num">share of domain</th>'
             '<th class="num">strata</th><th class="num">presence-only</th></tr></thead>'
             f'<tbody>{"".join(rows)}</tbody></table></details>')
    return ('<p class="lead">Share of the domain\'s grid cells sampled in each season, by season year. '
            'Open circles are seasons with no samples that year. Each chart\'s axis ends at a round share '
            'just above its highest value.</p>'
            f'<div class="legend">{legend}</div><div class="grid">{charts}</div>{table}')


def _maps(result: AuditResult) -> str:
    maps = result.metrics.cell_maps
    cells = result.domain_cells
    if maps.empty or cells.empty:
        return "<p>No sampled cells to map.</p>"
    ix0, ix1, iy0, iy1 = int(cells["ix"].min()), int(cells["ix"].max()), int(cells["iy"].min()), int(cells["iy"].max())
    known = dict(zip(cells["cell_id"], zip(cells["ix"], cells["iy"], strict=True), strict=True))
    extra = maps.loc[~maps["cell_id"].isin(known), "cell_id"].unique()
    if len(extra):
        from harmonize.tagging import Grid

        ex, ey = Grid.parse(pd.Series(extra))
        known.update(zip(extra, zip(ex, ey, strict=True), strict=True))
        ix0, ix1 = min(ix0, int(ex.min())), max(ix1, int(ex.max()))
        iy0, iy1 = min(iy0, int(ey.min())), max(iy1, int(ey.max()))
    width, height = ix1 - ix0 + 1, iy1 - iy0 + 1
    scale = max(1.0, min(130 / width, 130 / height))
    background = "".join(f"M{ix - ix0} {iy1 - iy}h1v1h-1z" for ix, iy in zip(cells["ix"], cells["iy"], strict=True))
    bins = MAP_BINS
    out = [f'<p class="lead">Grid cells ({result.settings.get("cell_size_km", 0):g} km, equal-area grid) '
           'with at least one sample, per source kind and season year; grey is the rest of the domain.</p>',
           '<div class="legend">' + "".join(
               f'<span><span class="swatch" style="background:{c}"></span>{lab}</span>'
               for lab, c in [*MAP_LABELS, ("domain, not sampled", "#e3e7ec")]) + "</div>"]
    for kind in _kinds(maps["source_kind"]):
        sub = maps[maps["source_kind"] == kind]
        years = sorted(int(y) for y in sub["season_year"].unique())
        shown = years[-MAX_MAP_YEARS:]
        figs = []
        for y in shown:
            s = sub[sub["season_year"] == y]
            paths = [f'<path d="{background}" fill="#e3e7ec"/>']
            ev = s["events"].to_numpy(float)
            level = np.searchsorted([b[0] for b in bins], ev, side="right") - 1
            for li, (_, colour) in enumerate(bins):
                ids = s["cell_id"].to_numpy()[level == li]
                if len(ids):
                    d = "".join(f"M{known[c][0] - ix0} {iy1 - known[c][1]}h1v1h-1z" for c in ids)
                    paths.append(f'<path d="{d}" fill="{colour}"/>')
            figs.append(f'<figure><svg xmlns="http://www.w3.org/2000/svg" width="{width * scale:.0f}" '
                        f'height="{height * scale:.0f}" viewBox="0 0 {width} {height}" shape-rendering="crispEdges" '
                        f'role="img" aria-label="{_e(kind)} {y}">{"".join(paths)}</svg>'
                        f"<figcaption>{y} · {len(s)} cells</figcaption></figure>")
        more = f'<p class="note">Showing the last {len(shown)} of {len(years)} years.</p>' if len(years) > len(shown) else ""
        out.append(f'<h3>{_e(_label(kind))}</h3><div class="maps">{"".join(figs)}</div>{more}')
    return "".join(out)


def _comparisons(result: AuditResult) -> str:
    comp = result.metrics.comparisons
    if comp.empty:
        return ('<p>No physical variable is described by two sources in the same cells and periods, '
                'so no offsets between sources could be measured.</p>')
    rows = []
    for r in comp.itertuples(index=False):
        sd = "" if pd.isna(r.sd_difference) else f"{r.sd_difference:.2f}"
        rows.append(f"<tr><td>{_e(r.variable)}</td><td>{_e(r.depth_layer)}</td><td>{_e(r.source_a)} ({_e(r.kind_a)})</td>"
                    f"<td>{_e(r.source_b)} ({_e(r.kind_b)})</td><td class=\"num\">{r.mean_difference:+.2f} {_e(r.unit)}</td>"
                    f"<td class=\"num\">{sd}</td><td class=\"num\">{int(r.n_pairs):,}</td>"
                    f"<td class=\"num\">{int(r.n_cell_periods):,}</td>"
                    f"<td class=\"num\">{int(r.first_year)}–{int(r.last_year)}</td></tr>")
    return ('<p class="lead">Each in-situ value of a physical variable is paired with the gridded value of its '
            'own cell and period (the rule of co-location; two gridded sources pair where they describe the same '
            'cell, period and layer). The mean difference of the pairs (first minus second) is the offset a '
            'delta-change correction would add to the second source; its spread says how stable that offset '
            'is.</p><table><thead><tr><th>variable</th><th>layer</th><th>first source</th>'
            '<th>second source</th><th class="num">mean difference</th><th class="num">sd</th>'
            '<th class="num">pairs</th><th class="num">cell-periods</th><th class="num">years</th></tr></thead>'
            f'<tbody>{"".join(rows)}</tbody></table>')


def _confidentiality(result: AuditResult) -> str:
    s = result.suppression()
    if not set(registered_kinds(is_fishing_effort=True)) & set(result.coverage["source_kind"]) and s["events_suppressed"] == 0:
        return ("<p>The store holds no fishing-effort data, so no confidentiality rule applied. Effort cells "
                f'resting on fewer than {s["min_vessels"]} vessels would be withheld.</p>')
    if s["events_suppressed"] == 0:
        return (f'<p>No fishing-effort cell rests on fewer than {s["min_vessels"]} vessels; nothing had to be '
                "withheld from this report.</p>")
    return (f'<p>Fishing-effort values resting on fewer than {s["min_vessels"]} distinct vessels are confidential. '
            f'{s["events_suppressed"]:,} such effort records were found; {_n(s["cells_suppressed"], "grid cell")} '
            f'({_n(s["cell_years_suppressed"], "cell-year")}) {"is" if s["cells_suppressed"] == 1 else "are"} '
            "therefore not shown on the maps and not counted as sampled cells in this report.</p>")


def render_html(result: AuditResult) -> str:
    """The audit report: one HTML page with inline CSS and SVG, readable offline and in print.

    Parameters
    ----------
    result
        The outcome of :func:`harmonize.audit.run.audit`.
    """
    from harmonize.audit.run import CAUTION

    st = result.settings
    scope = (f"Season year {result.year} audited against the earlier years."
             if result.year is not None else "Every season year in the store.")
    when = pd.Timestamp(result.generated_at).strftime("%Y-%m-%d %H:%M UTC")
    sections = [
        ("Findings", "findings", _findings(result)),
        ("Which seasons and depth layers the data describe", "extent", _extent(result)),
        ("Coverage through time", "coverage", _coverage(result)),
        ("Sampled cells per year", "maps", _maps(result)),
        ("Agreement between sources", "sources", _comparisons(result)),
        ("Model readiness of taxa", "readiness", readiness_html(result.readiness)),
        ("Confidential fishing data", "confidentiality", _confidentiality(result)),
    ]
    if result.since is not None:  # the comparison with a previous audit comes first
        from harmonize.audit.since import render_since_html

        sections.insert(0, ("Since the last audit", "since", render_since_html(result.since)))
    if result.plan is not None:
        from harmonize.audit.plan import render_plan_html

        sections.append((f"Where {len(result.plan.stations)} more samples would help most", "plan",
                         render_plan_html(result.plan)))
    nav = " · ".join(f'<a href="#{anchor}">{_e(title)}</a>' for title, anchor, _ in sections)
    body = "".join(f'<section id="{anchor}"><h2>{_e(title)}</h2>{html}</section>' for title, anchor, html in sections)
    thresholds = (f"Thresholds (study.toml [audit]): at least {st.get('min_events')} samples per season x layer "
                  f"of a year; coverage below {st.get('coverage_drop')} x the earlier median is a drop; at least "
                  f"{st.get('min_encounters')} encounters of a taxon per season x layer; effort cells need "
                  f"{st.get('min_vessels')} vessels. Grid: {st.get('cell_size_km', 0):g} km cells in {_e(st.get('crs'))}; "
                  f"{st.get('domain_cells', 0):,} cells have their centre in the domain. Records flagged as "
                  "probable duplicates are not counted; presence-only records count as encounters, not samples.")
    return f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>Coverage audit: {_e(result.study_name)}</title>
<style>{_CSS}</style></head>
<body><main>
<h1>Coverage audit: {_e(result.study_name)}</h1>
<p class="lead">{_e(scope)} Generated {_e(when)} by harmonize {_e(__version__)}.</p>
<div class="caution"><b>Read this first.</b> {_e(CAUTION)} Gaps shown here are where a model fitted to these
data would rest on its own assumptions rather than on samples.</div>
{_summary(result)}
<p class="note">{nav}</p>
{body}
<footer><p>{thresholds}</p><p>{_e(CAUTION)}</p></footer>
</main></body></html>
"""
