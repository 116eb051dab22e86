"""audit: coverage of the store across years, seasons, depth layers, strata and sources."""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING, Literal

import typer
from harmonize.cli.console import (
    CAUTION,
    console,
    consoles,
    fmt_int,
    is_stdout,
    say,
    status,
    study_from,
    study_option,
)

from harmonize.engines import ENGINES
from harmonize.errors import HarmonizeError

Engine = Literal[ENGINES]  # type: ignore[valid-type]

if TYPE_CHECKING:
    from harmonize.audit.run import AuditResult
    from harmonize.audit.since import Since

_STYLE = {"error": "bold red", "warning": "yellow", "info": "cyan"}


def register(app: typer.Typer) -> None:
    app.command("audit", short_help="Coverage audit of the store.")(audit_cmd)


def audit_cmd(
    ctx: typer.Context,
    json_out: Path | None = typer.Option(None, "--json", metavar="[OUT]",
                                         help="Write the audit as JSON to OUT; alone or with '-': on stdout, "
                                              "and nothing else there."),
    html_out: Path | None = typer.Option(None, "--html", metavar="OUT",
                                         help="Write the self-contained HTML report to OUT ('-' for stdout)."),
    fail_on: str | None = typer.Option(None, "--fail-on", metavar="CODE[,CODE]",
                                       help="Exit 1 when a finding with one of these codes exists."),
    year: int | None = typer.Option(None, "--year", metavar="YEAR", help="Audit this season year against the earlier ones."),
    limit: int = typer.Option(40, "--limit", metavar="N", help="How many findings to print."),
    engine: Engine | None = typer.Option(None, "--engine",
                                      help="Where the heavy aggregations run (default duckdb; see docs/performance.md)."),
    scheduler: str | None = typer.Option(None, "--scheduler", metavar="ADDRESS",
                                         help="Dask scheduler address (tcp://host:8786) for --engine dask."),
    since: Path | None = typer.Option(None, "--since", metavar="PREVIOUS.json",
                                      help="Compare with a previous audit JSON: what changed since the last audit."),
    fail_on_new: str | None = typer.Option(None, "--fail-on-new", metavar="CODE[,CODE]",
                                           help="Exit 1 when a finding with one of these codes is new since --since."),
    study_dir: Path | None = study_option(),
) -> None:
    """Coverage audit: where the data are thin or missing, before any model is fitted.

    With --fail-on, exit 1 when findings with those codes exist.

    \b
    Examples:
      harmonize audit --html audit.html --json audit.json
      harmonize audit --json | jq '.findings[] | select(.severity == "error")'
      harmonize audit --fail-on no_samples,missing_year --year 2023
      harmonize audit --since last_year/audit.json --fail-on-new no_samples --html audit.html
    """
    from harmonize.audit.run import audit, parse_codes

    if is_stdout(json_out) and is_stdout(html_out):
        raise typer.BadParameter("--json and --html cannot both write to stdout")
    consoles.json = is_stdout(json_out) or is_stdout(html_out)
    codes = parse_codes(fail_on)
    new_codes = parse_codes(fail_on_new)
    if new_codes and since is None:
        raise HarmonizeError("--fail-on-new needs --since PREVIOUS.json: new findings are those the previous audit did not have")
    study = study_from(ctx, study_dir)
    with status("auditing the store"):
        from harmonize.export.atomic import refuse_store_target

        for target in (json_out, html_out):
            if target is not None and not is_stdout(target):
                refuse_store_target(study, Path(target))  # never onto the store's own files
        result = audit(study, year=year, engine=engine, scheduler=scheduler, since=since)
    _print(result, limit)
    if result.since is not None:
        print_since(result.since)
    failing = bool(codes and result.has_any(codes))
    if json_out is not None:
        if is_stdout(json_out):
            import json
            import sys

            # the same document as the file: the contract's audit JSON with tool and contract versions
            sys.stdout.write(json.dumps(result.to_json_dict(), indent=2, ensure_ascii=False) + "\n")
        else:
            say(f"audit JSON written to {result.write_json(json_out)}")
    if html_out is not None:
        if is_stdout(html_out):
            import sys

            from harmonize.audit.report import render_html

            sys.stdout.write(render_html(result))
        else:
            say(f"audit report written to {result.write_html(html_out)}")
    console.print(CAUTION, style="dim")
    if failing:
        hit = sorted(result.codes() & set(codes))
        say(f"failing: findings with code(s) {', '.join(hit)} exist (--fail-on {fail_on})")
        raise typer.Exit(1)
    if new_codes and result.since is not None and result.since.new_codes() & set(new_codes):
        hit = sorted(result.since.new_codes() & set(new_codes))
        say(f"failing: new findings with code(s) {', '.join(hit)} since the previous audit "
            f"(--fail-on-new {fail_on_new})")
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
    from rich.table import Table
    from rich.text import Text

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
