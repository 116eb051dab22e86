"""audit: coverage of the store across years, seasons, depth layers, strata and sources."""

from __future__ import annotations

from pathlib import Path

import typer
from harmonize.cli.console import CAUTION, console, fmt_int, study_from
from rich.table import Table
from rich.text import Text

from harmonize.audit.run import AuditResult, audit, parse_codes
from harmonize.audit.since import Since
from harmonize.errors import HarmonizeError

_STYLE = {"error": "bold red", "warning": "yellow", "info": "cyan"}


def register(app: typer.Typer) -> None:
    app.command("audit")(audit_cmd)


def audit_cmd(
    ctx: typer.Context,
    json_out: Path | None = typer.Option(None, "--json", help="Write the audit as JSON to this file."),
    html_out: Path | None = typer.Option(None, "--html", help="Write the self-contained HTML report to this file."),
    fail_on: str | None = typer.Option(None, "--fail-on", metavar="CODE[,CODE]",
                                       help="Exit 1 when a finding with one of these codes exists."),
    year: int | None = typer.Option(None, "--year", help="Audit this season year against the earlier ones."),
    limit: int = typer.Option(40, "--limit", help="How many findings to print."),
    engine: str | None = typer.Option(None, "--engine", help="duckdb (default) or dask: where the heavy "
                                      "aggregations run; see docs/performance.md."),
    scheduler: str | None = typer.Option(None, "--scheduler", metavar="ADDRESS",
                                         help="Dask scheduler address (tcp://host:8786) for --engine dask."),
    since: Path | None = typer.Option(None, "--since", metavar="PREVIOUS.json",
                                      help="Compare with a previous audit JSON: what changed since the last audit."),
    fail_on_new: str | None = typer.Option(None, "--fail-on-new", metavar="CODE[,CODE]",
                                           help="Exit 1 when a finding with one of these codes is new since --since."),
) -> None:
    """Coverage audit: where the data are thin or missing, before any model is fitted."""
    codes = parse_codes(fail_on)
    new_codes = parse_codes(fail_on_new)
    if new_codes and since is None:
        raise HarmonizeError("--fail-on-new needs --since PREVIOUS.json: new findings are those the previous audit did not have")
    study = study_from(ctx)
    with console.status("auditing the store"):
        result = audit(study, year=year, engine=engine, scheduler=scheduler, since=since)
    _print(result, limit)
    if result.since is not None:
        print_since(result.since)
    if json_out is not None:
        console.print(f"audit JSON written to {result.write_json(json_out)}", markup=False)
    if html_out is not None:
        console.print(f"audit report written to {result.write_html(html_out)}", markup=False)
    console.print(CAUTION, style="dim")
    if codes and result.has_any(codes):
        hit = sorted(result.codes() & set(codes))
        console.print(f"failing: findings with code(s) {', '.join(hit)} exist (--fail-on {fail_on})", markup=False)
        raise typer.Exit(1)
    if new_codes and result.since is not None and result.since.new_codes() & set(new_codes):
        hit = sorted(result.since.new_codes() & set(new_codes))
        console.print(f"failing: new findings with code(s) {', '.join(hit)} since the previous audit "
                      f"(--fail-on-new {fail_on_new})", markup=False)
        raise typer.Exit(1)


def print_since(since: Since) -> None:
    """What changed since the previous audit, in a few lines."""
    c = since.counts()
    console.print(f"since the audit of {since.previous_generated_at}: {len(since.ingests_added)} ingest(s) added, "
                  f"{len(since.ingests_superseded)} superseded by corrections; findings {c['new']} new, "
                  f"{c['resolved']} resolved, {c['severity changed']} with another severity", markup=False)
    for r in since.effects[since.effects["revises_earlier_year"]].itertuples(index=False):
        n = "an unknown number of" if r.values_changed is None or r.values_changed != r.values_changed \
            else f"{int(r.values_changed):,}"
        console.print(f"  corrected {r.file_name} ({r.source_id}) changed values in season year {r.season_year}, "
                      f"which the previous audit had seen: {n} rows with a changed value", markup=False)
    for note in since.notes:
        console.print(f"  note: {note}", markup=False)


def _print(result: AuditResult, limit: int) -> None:
    cov = result.coverage
    if cov.empty:
        console.print("the store holds no samples to audit")
        return
    t = Table(title=f"coverage of {result.study_name} by source kind and season", title_justify="left")
    for col in ("kind", "season", "years", "samples", "mean share of cells", "years with no samples"):
        t.add_column(col, justify="left" if col in ("kind", "season") else "right")
    for (kind, season), g in cov.groupby(["source_kind", "season"], sort=True):
        sampled = g[g["events"] > 0]
        t.add_row(str(kind), str(season), f"{int(g['season_year'].min())}-{int(g['season_year'].max())}",
                  fmt_int(int(g["events"].sum())),
                  f"{sampled['coverage_fraction'].mean():.1%}" if len(sampled) else "-",
                  str(int((g["events"] == 0).sum())))
    console.print(t)
    counts = result.counts()
    console.print(f"findings: {counts['error']} errors, {counts['warning']} warnings, {counts['info']} notes")
    if not result.findings:
        return
    f_table = Table(title="findings (most severe first)", title_justify="left", show_lines=False)
    for col in ("severity", "code", "where", "message"):
        f_table.add_column(col, overflow="fold")
    for f in result.findings[:limit]:
        where = " ".join(str(x) for x in (f.source_kind, f.season_year, f.season, f.depth_layer,
                                          f.stratum, f.variable) if x not in (None, ""))
        f_table.add_row(Text(f.severity, style=_STYLE[f.severity]), f.code, Text(where), Text(f.message))
    console.print(f_table)
    if len(result.findings) > limit:
        console.print(f"... and {len(result.findings) - limit} more; use --json OUT or --html OUT for all of them")
