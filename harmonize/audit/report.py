"""The audit as one self-contained HTML page: inline CSS and SVG, no scripts, no outside requests."""

from __future__ import annotations

from collections.abc import Sequence
from html import escape
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from harmonize import __version__
from harmonize.audit.findings import CODES, Finding
from harmonize.audit.metrics import ALL_BIOLOGICAL
from harmonize.audit.readiness import readiness_html

if TYPE_CHECKING:
    from harmonize.audit.ranking import FindingGroup
    from harmonize.audit.run import AuditResult

#: Order in which source kinds appear; others follow alphabetically.
KIND_ORDER = (ALL_BIOLOGICAL, "trawl", "plankton", "transect", "opportunistic", "gridded", "effort")
KIND_LABEL = {ALL_BIOLOGICAL: "all biological sources"}
#: Okabe and Ito (2008), "Color Universal Design": colours told apart with colour-vision deficiency.
SEASON_COLOURS = ("#0072B2", "#009E73", "#E69F00", "#CC79A7", "#56B4E9", "#D55E00", "#000000", "#F0E442")
#: Sequential scale for counts (light to dark blue).
SCALE_LOW, SCALE_HIGH = (0xEE, 0xF3, 0xFA), (0x0B, 0x3C, 0x7D)
MAX_MAP_YEARS = 12
#: Map classes: (lowest number of samples in a cell, colour) and their legend. Every class and the
#: presence-only hatching keep a contrast of at least 3:1 against the unsampled colour (WCAG 2.1,
#: success criterion 1.4.11 non-text contrast); tests/test_audit_maps.py checks it.
MAP_UNSAMPLED = "#eef1f4"
MAP_BINS = ((1, "#4f8bc9"), (2, "#2166ac"), (5, "#0b2f66"))
MAP_LABELS = (("1 sample", "#4f8bc9"), ("2-4 samples", "#2166ac"), ("5 or more", "#0b2f66"))
MAP_PRESENCE = "#7a3e9d"
#: Width of one map in CSS pixels: three fit side by side in an 800 px window.
MAP_WIDTH_PX = 236

SEVERITY_WORD = {"error": "error", "warning": "warning", "info": "note"}

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
.cards { display: flex; flex-wrap: wrap; gap: 8px; margin: 10px 0 4px; }
.card { background: var(--panel); border: 1px solid var(--rule); border-radius: 6px; padding: 5px 10px; min-width: 84px; }
.card b { display: block; font-size: 18px; line-height: 1.2; }
.card span { color: var(--muted); font-size: 12px; }
.card.error b { color: var(--error); } .card.warning b { color: var(--warning); } .card.info b { color: var(--info); }
table { border-collapse: collapse; font-size: 13.5px; margin: 6px 0 10px; }
th, td { padding: 4px 8px; border-bottom: 1px solid var(--rule); vertical-align: top; text-align: left; }
th { background: var(--panel); font-weight: 600; }
td.num, th.num { text-align: right; font-variant-numeric: tabular-nums; }
td.num { white-space: nowrap; }
td { overflow-wrap: anywhere; }
table.findings { width: 100%; }
table.findings td.where { width: 210px; } table.findings td.msg { width: 60%; }
.badge { display: inline-block; padding: 1px 8px; border-radius: 10px; font-size: 12px; font-weight: 600; color: #fff; }
.badge.error { background: var(--error); } .badge.warning { background: var(--warning); } .badge.info { background: #5b6675; }
ol.top { padding-left: 22px; margin: 6px 0; } ol.top li { margin: 0 0 8px; }
details.group { border-bottom: 1px solid var(--rule); padding: 2px 0; }
details.group > summary { color: var(--ink); }
details.group .headline { display: block; color: var(--muted); font-size: 13px; margin-left: 18px; }
code { font-family: "DejaVu Sans Mono", Consolas, monospace; font-size: 12.5px; background: var(--panel); padding: 0 3px; border-radius: 3px; }
.grid { display: flex; flex-wrap: wrap; gap: 18px 26px; }
.panel { break-inside: avoid; }
table.heat td { text-align: center; min-width: 92px; border: 2px solid #fff; }
table.heat td.empty { background: #fbecea; color: var(--error); }
table.heat td.presence { background: repeating-linear-gradient(135deg, #f3f0fa, #f3f0fa 4px, #e6e0f3 4px, #e6e0f3 8px); color: #4b3b7a; }
table.heat th.row { text-align: left; }
.maps { display: flex; flex-wrap: wrap; gap: 10px 14px; align-items: flex-start; }
.maps figure { margin: 0; font-size: 12px; color: var(--muted); break-inside: avoid; }
.maps figure svg { display: block; max-width: 100%; height: auto; }
.legend svg { vertical-align: -2px; }
.legend { display: flex; gap: 14px; flex-wrap: wrap; font-size: 12.5px; color: var(--muted); margin: 4px 0; }
.swatch { display: inline-block; width: 12px; height: 12px; border-radius: 2px; vertical-align: -1px; margin-right: 4px; }
dl dt { font-weight: 600; margin-top: 8px; } dl dd { margin: 0 0 4px 0; }
table.strata span.zero { color: var(--error); font-weight: 600; }
table.strata span.inc, table.effort small { color: var(--muted); font-style: italic; }
table.prov td { font-size: 12px; } table.prov code { font-size: 11.5px; }
tr.incomplete td { color: var(--muted); font-style: italic; }
details summary { cursor: pointer; color: var(--info); margin: 6px 0; }
footer { margin-top: 40px; border-top: 1px solid var(--rule); padding-top: 10px; color: var(--muted); font-size: 12.5px; }
@media (max-width: 900px) { main { padding: 16px 14px 32px; } }
@media print {
  main { padding: 0; max-width: none; }
  h1, h2, h3, summary { break-after: avoid; page-break-after: avoid; }
  details::details-content { content-visibility: visible; display: contents; }
  details > summary { list-style: none; } details > summary::-webkit-details-marker { display: none; }
  tr, figure, .panel { break-inside: avoid; }
}
"""


def _e(value: object) -> str:
    return escape("" if value is None else str(value))


def _kind_key(kind: str) -> tuple[int, str]:
    return (KIND_ORDER.index(kind) if kind in KIND_ORDER else len(KIND_ORDER), kind)


def _kinds(values: Sequence[str] | pd.Series) -> list[str]:
    return sorted({str(v) for v in values if v is not None and not pd.isna(v)}, key=_kind_key)


def _label(kind: str) -> str:
    return KIND_LABEL.get(kind, kind)


def _shade(t: float) -> tuple[str, str]:
    """Background and text colour for a share t in [0, 1] of the sequential scale."""
    t = float(min(max(t, 0.0), 1.0))
    rgb = [round(lo + (hi - lo) * t) for lo, hi in zip(SCALE_LOW, SCALE_HIGH, strict=True)]
    return "#{:02x}{:02x}{:02x}".format(*rgb), ("#ffffff" if t > 0.55 else "#1d2430")


def _what(kind: str, short: bool = False) -> str:
    """What one counted event of a kind is: biological samples and cell-periods are never added up."""
    if kind == "gridded":
        return "cell-periods" if short else "gridded cell-periods"
    if kind == "effort":
        return "cell-periods" if short else "fishing cell-periods"
    return "samples"


def _amount(v: float) -> str:
    """An effort total with about three significant digits, never in scientific notation."""
    return f"{v:,.0f}" if abs(v) >= 100 else (f"{v:,.1f}" if abs(v) >= 10 else f"{v:,.2f}")


def _n(count: int, noun: str) -> str:
    return f"{count:,} {noun}{'' if count == 1 else 's'}"


def _fmt_int(n: object) -> str:
    return "" if n is None or pd.isna(n) else f"{int(n):,}"


def _incomplete_years(result: AuditResult) -> list[int]:
    """Season years that some source's data do not cover to their end."""
    p = result.metrics.periods
    return sorted({int(y) for y in p["season_year"]}) if len(p) else []


# ----------------------------------------------------------------------------- sections
def _summary(result: AuditResult) -> str:
    counts = result.counts()
    cov = result.coverage
    years = sorted({int(y) for y in cov["season_year"].dropna()}) if len(cov) else []
    span = f"{years[0]}-{years[-1]}" if years else "none"
    partial = _incomplete_years(result)
    if partial and years:
        whole = [y for y in years if y not in partial]
        span = (f"{whole[0]}-{whole[-1]}" if whole else "none") + f" ({', '.join(map(str, partial))} incomplete)"
    ext = result.extent
    kinds = _kinds(ext["source_kind"]) if len(ext) else []
    kinds = [k for k in kinds if k != ALL_BIOLOGICAL]

    def total(kind: str, column: str = "events") -> int:
        return int(ext.loc[ext["source_kind"] == kind, column].sum()) if len(ext) else 0

    # biological samples, gridded cell-periods and fishing cell-periods are never added up
    counted = [(total(ALL_BIOLOGICAL), "biological samples"), (total("gridded"), "gridded cell-periods"),
               (total("effort"), "fishing cell-periods"),
               (total(ALL_BIOLOGICAL, "presence_only_events"), "presence-only events")]
    cards = [
        f'<div class="card error"><b>{counts["error"]}</b><span>errors</span></div>',
        f'<div class="card warning"><b>{counts["warning"]}</b><span>warnings</span></div>',
        f'<div class="card info"><b>{counts["info"]}</b><span>notes</span></div>',
        *(f'<div class="card"><b>{n:,}</b><span>{label}</span></div>' for n, label in counted if n),
        f'<div class="card"><b>{len(kinds)}</b><span>source kinds</span></div>',
        f'<div class="card"><b>{_e(span)}</b><span>season years</span></div>',
        f'<div class="card"><b>{result.settings.get("domain_cells", 0):,}</b><span>domain cells of '
        f'{result.settings.get("cell_size_km", 0):g} km</span></div>',
    ]
    return '<div class="cards">' + "".join(cards) + "</div>"


#: How many groups the top of the report lists: the handful of things to act on.
TOP_GROUPS = 6


def _where(f: Finding) -> str:
    return " · ".join(_e(x) for x in (
        _label(f.source_kind) if f.source_kind else None, f.season_year, f.season,
        f.depth_layer, f"stratum {f.stratum}" if f.stratum else None, f.variable) if x not in (None, ""))


def _group_label(g: FindingGroup) -> str:
    where = " · ".join(_e(x) for x in (_label(g.source_kind) if g.source_kind else None,
                                        "never sampled" if g.never_sampled else g.depth_layer) if x)
    return f"<code>{_e(g.code)}</code> {where}"


def _member_table(g: FindingGroup) -> str:
    rows = "".join(f'<tr><td><span class="badge {f.severity}">{_e(SEVERITY_WORD[f.severity])}</span></td>'
                   f'<td class="where">{_where(f)}</td><td class="msg">{_e(f.message)}</td></tr>' for f in g.findings)
    return ('<table class="findings"><thead><tr><th>severity</th><th>where</th><th>what to do</th></tr></thead>'
            f"<tbody>{rows}</tbody></table>")


def _top(result: AuditResult, groups: list[FindingGroup]) -> str:
    """The handful of things to act on: error and warning groups, most at risk first."""
    act = [g for g in groups if g.severity != "info"][:TOP_GROUPS]
    if not act:
        return ('<p class="lead">Nothing to act on: no errors or warnings. The notes below are gaps chance '
                "explains.</p>")
    items = []
    for g in act:
        items.append(f'<li><span class="badge {g.severity}">{_e(SEVERITY_WORD[g.severity])}</span> '
                     f'{_group_label(g)} <span class="note">({_n(g.count, "finding")}; '
                     f"{g.share_at_risk:.0%} of domain x seasons x layers)</span><br>{_e(g.headline())}</li>")
    return ('<ol class="top">' + "".join(items) + "</ol>")


def _findings(result: AuditResult, groups: list[FindingGroup]) -> str:
    if not result.findings:
        return '<p>No findings: every combination the rules check is sampled as expected.</p>'
    rows = []
    for g in groups:
        body = _member_table(g)
        rows.append(f'<details class="group"><summary><span class="badge {g.severity}">{_e(SEVERITY_WORD[g.severity])}'
                    f"</span> {_group_label(g)} · <b>{g.count}</b> · {g.share_at_risk:.0%} at risk"
                    f'<span class="headline">{_e(g.headline())}</span></summary>{body}</details>')
    by_code = {c: sum(f.code == c for f in result.findings) for c in CODES}
    legend = "".join(f"<li><code>{c}</code> ({n}): {_e(CODE_HELP[c])}</li>" for c, n in by_code.items() if n)
    return (f'<p class="lead">{_n(len(result.findings), "finding")} in {_n(len(groups), "group")}: one per code, '
            "source kind and depth layer, ranked by severity and then by the share of the domain x seasons x "
            "depth layers they put at risk. Open a group for its findings. Errors are gaps that chance does not "
            "explain; notes (grey) are gaps the earlier years make likely by chance.</p>"
            + "".join(rows) + f'<ul class="note">{legend}</ul>')


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
                extra = f"<br><small>+{presence:,} presence-only</small>" if presence else ""
                cells.append(f'<td style="background:{bg};color:{fg}" title="{events} {_what(kind)} in {years} '
                             f'season years">{years} yr<br><small>{_n(events, _what(kind, short=True).rstrip("s"))}</small>'
                             f"{extra}</td>")
            body.append(f'<tr><th class="row">{_e(season)}</th>{"".join(cells)}</tr>')
        panels.append(f'<div class="panel"><h3>{_e(_label(kind))}</h3><table class="heat"><thead><tr>'
                      f'<th></th>{head}</tr></thead><tbody>{"".join(body)}</tbody></table></div>')
    return ('<p class="lead">Season x depth layer: in how many season years each combination was sampled '
            '(darker = more years) and how many samples (or, for gridded and fishing data, cell-periods) it holds. Red dashes in the first panel are '
            'combinations no biological source samples: a model fitted there only extrapolates. Hatched cells hold '
            'presence-only records (encounters without a measure of sampling effort).</p>'
            f'<div class="grid">{"".join(panels)}</div>')


def _line_chart(sub: pd.DataFrame, seasons: list[str], years: list[int], title: str, unit: str = "samples") -> str:
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
        done = s[s["complete"].astype(bool)] if "complete" in s else s
        # the trend line joins complete seasons only; an incomplete one is a grey diamond apart
        pts = " ".join(f"{sx(y):.1f},{sy(v):.1f}" for y, v in zip(done["season_year"], done["coverage_fraction"],
                                                                   strict=True))
        parts.append(f'<polyline points="{pts}" fill="none" stroke="{colour}" stroke-width="2"/>')
        for y, v, n, ok in zip(s["season_year"], s["coverage_fraction"], s["events"],
                               s["complete"] if "complete" in s else [True] * len(s), strict=True):
            if not ok:
                cx, cy = sx(y), sy(v)
                parts.append(f'<path d="M{cx:.1f} {cy - 5:.1f}l5 5l-5 5l-5 -5z" fill="#ffffff" stroke="#5b6675" '
                             f'stroke-width="1.5"><title>{_e(season)} {int(y)}: incomplete (the data end before '
                             f"the season does); {v:.1%} of cells, {int(n)} {unit} so far</title></path>")
                continue
            fill = colour if n > 0 else "#ffffff"
            parts.append(f'<circle cx="{sx(y):.1f}" cy="{sy(v):.1f}" r="3" fill="{fill}" stroke="{colour}">'
                         f"<title>{_e(season)} {int(y)}: {v:.1%} of cells, {int(n)} {unit}</title></circle>")
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
    if "complete" in cov and not cov["complete"].all():
        legend += ('<span><svg width="12" height="12" viewBox="0 0 12 12" aria-hidden="true"><path d="M6 1l5 5l-5 5l-5 -5z" '
                   'fill="#fff" stroke="#5b6675" stroke-width="1.5"/></svg> incomplete season (data end before it '
                   'does; not joined to the line)</span>')
    sampled_kinds = _kinds(cov.loc[cov["events"] > 0, "source_kind"])
    charts = "".join(f'<div class="panel">{_line_chart(cov[cov["source_kind"] == k], seasons, years, _label(k), _what(k))}</div>'
                     for k in sampled_kinds)
    unsampled = [k for k in _kinds(cov["source_kind"]) if k not in sampled_kinds]
    if unsampled:
        charts += (f'<p class="note">Not charted: {_e(", ".join(unsampled))} (presence-only records, '
                   "no samples with effort).</p>")
    rows = []
    for r in cov.itertuples(index=False):
        supp = f" ({int(r.cells_suppressed)} not shown)" if r.cells_suppressed else ""
        done = bool(getattr(r, "complete", True))
        style = ' style="color:#b42318"' if r.events == 0 and done else (' class="incomplete"' if not done else "")
        mark = "" if done else " (incomplete)"
        rows.append(f"<tr{style}><td>{_e(_label(r.source_kind))}</td><td class=\"num\">{int(r.season_year)}</td>"
                    f"<td>{_e(r.season)}{mark}</td><td class=\"num\">{_fmt_int(r.events)} <small>{_what(r.source_kind, True)}</small></td>"
                    f"<td class=\"num\">{_fmt_int(r.cells_sampled)}{supp}</td>"
                    f"<td class=\"num\">{r.coverage_fraction:.1%}</td><td class=\"num\">{_fmt_int(r.strata_sampled)}</td>"
                    f"<td class=\"num\">{_fmt_int(r.presence_only_events)}</td></tr>")
    table = ('<details><summary>Coverage table (every source kind, season year and season)</summary>'
             '<table><thead><tr><th>source kind</th><th class="num">season year</th><th>season</th>'
             '<th class="num">samples or cell-periods</th><th class="num">cells sampled</th><th class="num">share of domain</th>'
             '<th class="num">strata</th><th class="num">presence-only</th></tr></thead>'
             f'<tbody>{"".join(rows)}</tbody></table></details>')
    return ('<p class="lead">Share of the domain\'s grid cells sampled in each season, by season year. '
            'Open circles are seasons with no samples that year. Each chart\'s axis ends at a round share '
            'just above its highest value.</p>'
            f'<div class="legend">{legend}</div><div class="grid">{charts}</div>{table}')


def _outline(cells: pd.DataFrame, key: pd.Series, ix0: int, iy1: int, px: float) -> str:
    """SVG path of the edges between cells of different ``key`` (or a cell and no cell): outlines."""
    where = dict(zip(zip(cells["ix"], cells["iy"], strict=True), key, strict=True))
    d = []
    for (ix, iy), k in where.items():
        x, y = (ix - ix0) * px, (iy1 - iy) * px
        # right and top edges of each cell, and left and bottom edges where no cell lies beyond
        for (nx, ny), seg in (((ix + 1, iy), f"M{x + px:.1f} {y:.1f}v{px:.1f}"),
                              ((ix, iy + 1), f"M{x:.1f} {y:.1f}h{px:.1f}")):
            if where.get((nx, ny), None) != k:
                d.append(seg)
        if (ix - 1, iy) not in where:
            d.append(f"M{x:.1f} {y:.1f}v{px:.1f}")
        if (ix, iy - 1) not in where:
            d.append(f"M{x:.1f} {y + px:.1f}h{px:.1f}")
    return "".join(d)


def _maps(result: AuditResult) -> str:
    maps = result.metrics.cell_maps
    cells = result.domain_cells
    if maps.empty or cells.empty:
        return "<p>No sampled cells to map.</p>"
    ix0, ix1 = int(cells["ix"].min()), int(cells["ix"].max())
    iy0, iy1 = int(cells["iy"].min()), int(cells["iy"].max())
    width, height = ix1 - ix0 + 1, iy1 - iy0 + 1
    px = float(min(12.0, max(4.0, MAP_WIDTH_PX / width)))
    w, h = width * px, height * px
    pos = {c: ((ix - ix0) * px, (iy1 - iy) * px) for c, ix, iy in zip(cells["cell_id"], cells["ix"], cells["iy"],
                                                                         strict=True)}

    def squares(ids: Sequence[str]) -> str:
        return "".join(f"M{pos[c][0]:.1f} {pos[c][1]:.1f}h{px:.1f}v{px:.1f}h{-px:.1f}z" for c in ids if c in pos)

    background = f'<path d="{squares(list(cells["cell_id"]))}" fill="{MAP_UNSAMPLED}"/>'
    strata = cells["stratum"].fillna("") if "stratum" in cells else pd.Series([""] * len(cells))
    lines = [f'<path d="{_outline(cells, strata, ix0, iy1, px)}" fill="none" stroke="#1d2430" stroke-width="0.8" '
             'stroke-dasharray="3 2"/>' if strata.nunique() > 1 else "",
             f'<path d="{_outline(cells, pd.Series(["d"] * len(cells)), ix0, iy1, px)}" fill="none" '
             'stroke="#1d2430" stroke-width="1.6"/>']
    labels = []
    for name, g in cells.assign(_s=strata.to_numpy()).groupby("_s"):
        if not name:
            continue
        # the label sits on the stratum's cell nearest its mean position, so it lands inside the stratum
        mx, my = g["ix"].mean(), g["iy"].mean()
        best = g.iloc[int(((g["ix"] - mx) ** 2 + (g["iy"] - my) ** 2).to_numpy().argmin())]
        x, y = (best["ix"] - ix0 + 0.5) * px, (iy1 - best["iy"] + 0.5) * px
        labels.append(f'<text x="{x:.1f}" y="{y + 4:.1f}" text-anchor="middle" font-size="11" font-weight="600" '
                      f'fill="#1d2430" stroke="#ffffff" stroke-width="3" paint-order="stroke">{_e(name)}</text>')
    overlay = "".join(lines) + "".join(labels)
    hatch = (f'<pattern id="hatch" width="5" height="5" patternUnits="userSpaceOnUse" patternTransform="rotate(45)">'
             f'<rect width="5" height="5" fill="{MAP_UNSAMPLED}"/><line x1="0" y1="0" x2="0" y2="5" '
             f'stroke="{MAP_PRESENCE}" stroke-width="2"/></pattern>')
    n_domain = len(cells)
    partial = {(str(k), int(y)) for k, y in zip(result.metrics.periods.get("source_kind", []),
                                                 result.metrics.periods.get("season_year", []), strict=True)}
    sw = ('<svg width="14" height="14" viewBox="0 0 14 14" aria-hidden="true"><rect width="14" height="14" '
          'fill="{}" stroke="#5b6675" stroke-width="0.5"/></svg>')
    legend_items = [f"<span>{sw.format(c)} {_e(lab)}</span>" for lab, c in MAP_LABELS]
    legend_items.append(f"<span>{sw.format(MAP_UNSAMPLED)} domain cell, nothing recorded</span>")
    legend_items.append('<span><svg width="14" height="14" viewBox="0 0 14 14" aria-hidden="true"><defs>'
                        + hatch.replace('id="hatch"', 'id="hatch-legend"') + '</defs><rect width="14" height="14" '
                        'fill="url(#hatch-legend)" stroke="#5b6675" stroke-width="0.5"/></svg> presence-only records'
                        "</span>")
    legend_items.append('<span><svg width="22" height="10" aria-hidden="true"><line x1="0" y1="5" x2="22" y2="5" '
                        'stroke="#1d2430" stroke-width="1.6"/></svg> domain</span>'
                        '<span><svg width="22" height="10" aria-hidden="true"><line x1="0" y1="5" x2="22" y2="5" '
                        'stroke="#1d2430" stroke-dasharray="3 2"/></svg> strata</span>')
    out = [f'<p class="lead">Domain cells ({result.settings.get("cell_size_km", 0):g} km squares of an equal-area '
           "grid) holding at least one sample, per source kind and season year. Outlines: the domain (solid) "
           "and its strata (dashed, labelled). Cells outside the domain are never drawn or counted.</p>",
           f'<div class="legend">{"".join(legend_items)}</div>']
    for kind in _kinds(maps["source_kind"]):
        sub = maps[maps["source_kind"] == kind]
        years = sorted(int(y) for y in sub["season_year"].unique())
        shown = years[-MAX_MAP_YEARS:]
        figs = []
        for y in shown:
            s = sub[sub["season_year"] == y]
            paths = [background]
            sampled = s[s["events"] > 0]
            level = np.searchsorted([b[0] for b in MAP_BINS], sampled["events"].to_numpy(float), side="right") - 1
            for li, (_, colour) in enumerate(MAP_BINS):
                ids = list(sampled["cell_id"].to_numpy()[level == li])
                if ids:
                    paths.append(f'<path d="{squares(ids)}" fill="{colour}"/>')
            presence = list(s.loc[(s["events"] == 0) & (s["presence_only_events"] > 0), "cell_id"])
            if presence:
                paths.append(f'<path d="{squares(presence)}" fill="url(#hatch-{_e(kind)}-{y})"/>')
            defs = hatch.replace('id="hatch"', f'id="hatch-{_e(kind)}-{y}"') if presence else ""
            inc = " (incomplete)" if (kind, y) in partial else ""
            caption = (f"<b>{y}</b>{inc} · {len(sampled):,} of {n_domain:,} cells sampled"
                       + (f", {len(presence):,} presence-only" if presence else ""))
            figs.append(f'<figure><svg xmlns="http://www.w3.org/2000/svg" width="{w + 4:.0f}" height="{h + 4:.0f}" '
                        f'viewBox="-2 -2 {w + 4:.1f} {h + 4:.1f}" role="img" aria-label="{_e(_label(kind))} {y}: '
                        f'{len(sampled)} of {n_domain} domain cells sampled"><defs>{defs}</defs>'
                        f'<g shape-rendering="crispEdges">{"".join(paths)}</g>'
                        f"{overlay}</svg><figcaption>{caption}</figcaption></figure>")
        more = f'<p class="note">Showing the last {len(shown)} of {len(years)} years.</p>' if len(years) > len(shown) else ""
        out.append(f'<h3>{_e(_label(kind))} <span class="note">({_what(kind)})</span></h3>'
                   f'<div class="maps">{"".join(figs)}</div>{more}')
    return "".join(out)

def _table(head: list[tuple[str, bool]], rows: list[list[str]], cls: str = "") -> str:
    """A plain table: ``head`` is (title, numeric) per column; cells are HTML already escaped."""
    th = "".join(f'<th{" class=num" if num else ""}>{_e(t)}</th>' for t, num in head)
    body = "".join("<tr>" + "".join(f'<td{" class=num" if head[i][1] else ""}>{c}</td>' for i, c in enumerate(r))
                   + "</tr>" for r in rows)
    return f'<table class="{cls}"><thead><tr>{th}</tr></thead><tbody>{body}</tbody></table>'


def _definitions(result: AuditResult) -> str:
    st = result.settings
    seasons = st.get("seasons", {})
    month = ("", "Jan", "Feb", "Mar", "Apr", "May", "Jun", "Jul", "Aug", "Sep", "Oct", "Nov", "Dec")
    season_text = "; ".join(f"{_e(n)}: {'-'.join(month[m] for m in (ms[0], ms[-1]))}" for n, ms in seasons.items())
    cross = [n for n, ms in seasons.items() if 12 in ms and 1 in ms]
    cross_text = (f" The {_e(cross[0])} season spans the turn of the year and belongs to the year of its January: December "
                  f"2023 is {_e(cross[0])} 2024." if cross else "")
    bounds = st.get("depth_layer_bounds", {})
    layer_text = "; ".join(f"{_e(n)} {a:g}-{b:g} m" for n, (a, b) in bounds.items())
    return (
        "<dl>"
        f"<dt>Season year</dt><dd>The year a sample's season belongs to. Seasons: {season_text}.{cross_text} "
        "A season year the data do not cover to its end (the last files stop inside it) is marked "
        "<i>incomplete</i>: it is shown apart and left out of trends and drop findings.</dd>"
        f"<dt>Depth layer</dt><dd>Where in the water a sample was taken: {layer_text}. A sample whose whole depth "
        f"range lies within {st.get('near_bottom_m', 0):g} m above the sea floor is <i>near_bottom</i> (trawls, "
        "bottom sensors); one spanning two or more layers is <i>integrated</i>.</dd>"
        f"<dt>Grid and domain</dt><dd>Squares of {st.get('cell_size_km', 0):g} km on an equal-area map "
        f"({_e(st.get('crs'))}); the {st.get('domain_cells', 0):,} squares whose centre lies inside the study "
        "area are the <i>domain cells</i>. Coverage is the share of domain cells with at least one sample; "
        "records in cells outside the domain are counted as samples but never as domain cells.</dd>"
        "<dt>What is counted</dt><dd><i>Biological samples</i>: hauls, tows, transect segments and checklists "
        "with a measure of effort. <i>Gridded cell-periods</i>: a model or satellite value for one cell and one "
        "month or season. <i>Fishing cell-periods</i>: fishing hours of one cell and period. <i>Presence-only "
        "events</i>: sightings without effort. These are never added together.</dd>"
        "</dl>")


def _received(result: AuditResult) -> str:
    r = result.received
    if r is None or r.by_source.empty:
        return "<p>No ingests are recorded in the store.</p>"
    rows = [[_e(x.source_id), _e(x.source_kind), _fmt_int(x.files), _fmt_int(x.rows_read), _fmt_int(x.rows_accepted),
             _fmt_int(x.rows_quarantined - x.masked_values), _fmt_int(x.masked_values), _fmt_int(x.twins)]
            for x in r.by_source.itertuples(index=False)]
    table = _table([("source", False), ("kind", False), ("files", True), ("rows or values read", True),
                    ("accepted", True), ("rows quarantined", True), ("grid values or pings masked", True),
                    ("probable twins", True)], rows, "wide")
    reasons = ""
    if len(r.reasons):
        rrows = [[_e(x.source_id), f"<code>{_e(x.reason_code)}</code>", _fmt_int(x.rows), _fmt_int(x.masked_values)]
                 for x in r.reasons.itertuples(index=False)]
        reasons = ("<details><summary>Quarantined and masked, by source and reason</summary>"
                   + _table([("source", False), ("reason", False), ("rows", True), ("values masked", True)], rrows)
                   + "</details>")
    return ('<p class="lead">Every row read is either accepted or quarantined with a reason; grid values and '
            "position pings are masked in bulk (land, cloud, outside the domain) and counted by reason. Probable "
            "twins are volunteer records of something another source also recorded: kept in the store, left out "
            f"of every count in this report.</p>{table}{reasons}")


def _provenance(result: AuditResult) -> str:
    r = result.received
    if r is None or r.ingests.empty:
        return "<p>No ingests are recorded in the store.</p>"
    rows = []
    for x in r.ingests.itertuples(index=False):
        files = ", ".join(_e(f) for f in (list(x.files) if x.files is not None else []))
        rows.append([f"<code>{_e(x.ingest_id)}</code>", _e(x.source_id),
                     _e(pd.Timestamp(x.started_at).strftime("%Y-%m-%d %H:%M")), files,
                     f"<code>{_e(str(x.config_sha256)[:12])}</code>", f"<code>{_e(str(x.inputs_sha256)[:12])}</code>"])
    meta = r.store_meta
    sup = (f" {_n(r.superseded, 'earlier ingest')} {'was' if r.superseded == 1 else 'were'} superseded by a "
           "re-ingest and {'is' if r.superseded == 1 else 'are'} not counted." if r.superseded else "")
    return (f'<p class="lead">This report covers {_n(len(r.ingests), "ingest")} of the store '
            f'(contract version {_e(meta.get("contract_version", "?"))}, created by {_e(meta.get("created_by", "?"))}).'
            f"{sup} Hashes are SHA-256, first 12 hex digits: the same files and configuration give the same "
            "hashes, so a later report can show it covers the same data.</p>"
            "<details><summary>Ingests, files and configuration hashes</summary>"
            + _table([("ingest", False), ("source", False), ("started (UTC)", False), ("files", False),
                      ("configuration", False), ("inputs", False)], rows, "prov") + "</details>")


EFFORT_LABEL = {"km2": "area (km²)", "m3": "volume filtered (m³)", "h": "hours"}


def _effort(result: AuditResult) -> str:
    r = result.received
    if r is None or r.effort.empty:
        return "<p>No sampling effort is recorded.</p>"
    eff = r.effort
    partial = set(_incomplete_years(result))
    years = sorted({int(y) for y in eff["season_year"]})
    out = []
    order = {k: i for i, k in enumerate(_kinds(eff["source_kind"]))}
    eff = eff.assign(_o=eff["source_kind"].map(order)).sort_values(["_o", "effort_unit", "season_year"])
    for (kind, unit), g in eff.groupby(["source_kind", "effort_unit"], sort=False):
        vals = dict(zip(g["season_year"].astype(int), g["effort"], strict=True))
        n = dict(zip(g["season_year"].astype(int), g["events"], strict=True))
        label = {"trawl": "area swept", "transect": "strip area", "plankton": "volume filtered",
                 "opportunistic": "hours observed", "effort": "fishing hours"}.get(str(kind), "effort")
        cells = [f"{_amount(vals[y])}<br><small>{_n(int(n[y]), _what(str(kind), True).rstrip('s'))}</small>"
                 if y in vals else "—" for y in years]
        out.append([f"{_e(_label(str(kind)))}: {_e(label)} ({_e(unit)})", *cells])
    head = [("kind and measure", False)] + [(f"{y}{' *' if y in partial else ''}", True) for y in years]
    note = " * incomplete season year." if partial else ""
    return ('<p class="lead">Sampling effort per season year, summed over every sample (one value per haul, tow, '
            "segment or checklist); fishing hours are the whole fleet's over the domain. Gridded pixel area is not "
            f"an effort and is left out.{note}</p>" + _table(head, out, "effort"))


def _strata_table(result: AuditResult) -> str:
    se = result.metrics.stratum_events
    if se.empty:
        return "<p>No samples carry a stratum (the study has no strata, or none was sampled).</p>"
    cells = result.domain_cells
    strata = sorted(cells["stratum"].dropna().unique()) if "stratum" in cells else sorted(se["stratum"].unique())
    seasons = [s for s in result.settings.get("seasons", {}) if s in set(se["season"])]
    incomplete = {(str(k), int(y), str(s)) for k, y, s in
                  zip(result.metrics.periods.get("source_kind", []), result.metrics.periods.get("season_year", []),
                      result.metrics.periods.get("season", []), strict=True)}
    out = []
    for kind in _kinds(se["source_kind"]):
        if kind in ("gridded", "effort"):
            continue  # cell-periods cover every stratum by construction; the table is about survey design
        sub = se[se["source_kind"] == kind]
        years = list(range(int(sub["season_year"].min()), int(sub["season_year"].max()) + 1))
        kind_seasons = [s for s in seasons if s in set(sub["season"])]
        got = {(str(a), str(b), int(c)): int(n) for a, b, c, n in
               zip(sub["stratum"], sub["season"], sub["season_year"], sub["events"], strict=True)}
        rows = []
        for season in kind_seasons:
            for stratum in strata:
                vals = []
                for y in years:
                    v = got.get((stratum, season, y), 0)
                    cls = "zero" if v == 0 else ""
                    if (kind, y, season) in incomplete:
                        cls = "inc"
                    vals.append(f'<span class="{cls}">{v:,}</span>' if cls else f"{v:,}")
                rows.append([_e(season), _e(stratum), *vals])
        out.append(f"<h3>{_e(_label(kind))}</h3>" + _table([("season", False), ("stratum", False)]
                                                          + [(str(y), True) for y in years], rows, "strata"))
    return ('<p class="lead">Samples per stratum, season and season year, for each survey kind. Red zeros are '
            "strata without a sample that year; grey italics are incomplete seasons.</p>" + "".join(out))


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
    return _fishing_confidentiality(result) + (
        "<p>Events where a taxon marked sensitive in the taxa list was recorded are counted, but their grid "
        "cells are not named on the maps (their positions are generalised in every output; Chapman 2020, "
        "Current Best Practices for Generalizing Sensitive Species Occurrence Data, GBIF).</p>")


def _fishing_confidentiality(result: AuditResult) -> str:
    s = result.suppression()
    if "effort" not in set(result.coverage["source_kind"]) and s["events_suppressed"] == 0:
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
    groups = result.groups()
    sections = [
        ("What to act on", "top", _top(result, groups)),
        ("Findings", "findings", _findings(result, groups)),
        ("How this report counts", "definitions", _definitions(result)),
        ("Data received", "received", _received(result)),
        ("Which seasons and depth layers the data describe", "extent", _extent(result)),
        ("Coverage through time", "coverage", _coverage(result)),
        ("Coverage by stratum", "strata", _strata_table(result)),
        ("Sampled cells per year", "maps", _maps(result)),
        ("Effort per year", "effort", _effort(result)),
        ("Agreement between sources", "sources", _comparisons(result)),
        ("Model readiness of taxa", "readiness", readiness_html(result.readiness)),
        ("Confidential fishing data", "confidentiality", _confidentiality(result)),
        ("Provenance", "provenance", _provenance(result)),
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
