"""check and ingest: validate files against a profile, and write them to the store."""

from __future__ import annotations

from pathlib import Path

import typer
from harmonize.cli.console import console, fmt_int, study_from
from rich.progress import BarColumn, Progress, TextColumn, TimeElapsedColumn
from rich.table import Table

from harmonize.adapters.reading import one_line
from harmonize.ingest import IngestResult, assign_inputs, prepare, run

FIRST_PROBLEMS = 10


def register(app: typer.Typer) -> None:
    app.command("check")(check)
    app.command("ingest")(ingest)


def check(
    ctx: typer.Context,
    profile: str = typer.Argument(..., help="Profile name (in profiles/) or path."),
    files: list[Path] = typer.Argument(None, help="Input file(s) of a one-table source."),
    events: Path | None = typer.Option(None, "--events", help="Events file of a two-table source."),
    records: Path | None = typer.Option(None, "--records", help="Records file of a two-table source."),
    show: int = typer.Option(FIRST_PROBLEMS, "--show", help="How many problems to list."),
) -> None:
    """Validate files without writing; print the row accounting and the first problems.

    Exit 1 when any row would go to quarantine.
    """
    study = study_from(ctx)
    adapter, prof = prepare(study, profile)
    any_bad = False
    for inputs in assign_inputs(adapter, prof, files or [], events, records):
        result = _with_progress(lambda cb, i=inputs: run(study, profile, i, write=False, progress=cb))
        _print_result(result, show)
        any_bad |= result.rows_quarantined > 0
    raise typer.Exit(1 if any_bad else 0)


def ingest(
    ctx: typer.Context,
    profile: str = typer.Argument(..., help="Profile name (in profiles/) or path."),
    files: list[Path] = typer.Argument(None, help="Input file(s) of a one-table source."),
    events: Path | None = typer.Option(None, "--events", help="Events file of a two-table source."),
    records: Path | None = typer.Option(None, "--records", help="Records file of a two-table source."),
    replace: bool = typer.Option(False, "--replace", help="Supersede an earlier ingest of the same file."),
    dry_run: bool = typer.Option(False, "--dry-run", help="Do everything but write; say what --replace would supersede."),
    show: int = typer.Option(FIRST_PROBLEMS, "--show", help="How many problems to list."),
    strict: bool = typer.Option(False, "--strict", help="Exit 1 when rows went to quarantine."),
    engine: str | None = typer.Option(None, "--engine", help="duckdb (default) or dask: where ping tracks "
                                      "become fishing hours; see docs/performance.md."),
    scheduler: str | None = typer.Option(None, "--scheduler", metavar="ADDRESS",
                                         help="Dask scheduler address (tcp://host:8786) for --engine dask."),
) -> None:
    """Validate, harmonise and write files to the store; print the row accounting.

    Re-ingesting a file with the same content and configuration changes nothing.
    """
    study = study_from(ctx)
    adapter, prof = prepare(study, profile)
    any_bad = False
    for inputs in assign_inputs(adapter, prof, files or [], events, records):
        result = _with_progress(lambda cb, i=inputs: run(study, profile, i, write=True, replace=replace, progress=cb,
                                                         engine=engine, scheduler=scheduler, dry_run=dry_run,
                                                         notice=_notice))
        _print_result(result, show)
        any_bad |= result.rows_quarantined > 0
    raise typer.Exit(1 if (strict and any_bad) else 0)


def _notice(message: str) -> None:
    console.print(one_line(message), markup=False)


def _with_progress(job):  # type: ignore[no-untyped-def]
    with Progress(TextColumn("{task.description}"), BarColumn(), TimeElapsedColumn(),
                  console=console, transient=True, disable=not console.is_terminal) as bar:
        task = bar.add_task("reading", total=None)

        def callback(stage: str, done: int, total: int) -> None:
            bar.update(task, description=stage, completed=done, total=total)

        return job(callback)


def _print_without_values(result: IngestResult) -> None:
    """Accepted events that give no observation row (kept apart in the store), when there are any."""
    empty = result.events_without_values
    if empty.empty:
        return
    flags = empty["flags"].explode()
    incomplete = flags[flags.astype("string").str.endswith("_incomplete").fillna(False)].index.nunique()
    kept = "would be kept" if result.status == "checked" else "kept"
    lost = f", {fmt_int(incomplete)} of them lost records to quarantine" if incomplete else ""
    console.print(f"accepted events without any observation row: {fmt_int(len(empty))}{lost} "
                  f"({kept} in the store's events_without_values)", markup=False)


def _print_result(result: IngestResult, show: int) -> None:
    if result.status == "unchanged":
        for note in result.notes:
            console.print(one_line(note), markup=False)
        return
    verb = {"complete": "ingested", "checked": "checked"}[result.status]
    table = Table(title=f"{result.source_id} ({result.source_kind}) {verb}", title_justify="left")
    for col in ("file", "rows read", "accepted", "quarantined"):
        table.add_column(col, justify="left" if col == "file" else "right")
    for f in result.files:
        table.add_row(one_line(f.path.name), fmt_int(f.rows_read), fmt_int(f.rows_accepted), fmt_int(f.rows_quarantined))
    console.print(table)
    written = "would be written" if result.status == "checked" else "written"
    console.print(f"observation rows {written}: {fmt_int(result.records_written)} "
                  f"(of which inferred zeros: {fmt_int(result.records_zero_filled)})")
    _print_without_values(result)
    if result.ingest_id:
        console.print(f"ingest id: {result.ingest_id}")
    if result.superseded:
        console.print(f"superseded earlier ingest(s): {', '.join(result.superseded)}")
    for note in result.notes:
        console.print(one_line(note), markup=False)
    if result.rows_quarantined:
        reasons = ", ".join(f"{code} {n}" for code, n in result.reasons().items())
        console.print(f"quarantined by reason: {reasons}")
        first = result.quarantine.head(show)
        for row in first.itertuples():
            console.print(one_line(f"  {row.source_file} row {row.source_row}: [{row.reason_code}] {row.message}"),
                          markup=False)
        if len(result.quarantine) > show:
            console.print(f"  ... and {len(result.quarantine) - show} more; see 'harmonize quarantine'")
