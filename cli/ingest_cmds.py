"""check and ingest: validate files against a profile, and write them to the store."""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING, Any, Literal

import typer
from harmonize.cli.console import (
    console,
    consoles,
    emit_json,
    fmt_int,
    json_option,
    progress_enabled,
    records,
    say,
    study_from,
    study_option,
)

from harmonize.engines import ENGINES
from harmonize.errors import one_line

Engine = Literal[ENGINES]  # type: ignore[valid-type]

if TYPE_CHECKING:
    from harmonize.ingest import IngestResult

FIRST_PROBLEMS = 10
QUARANTINE_COLUMNS = ["source_file", "source_row", "reason_code", "message"]


def register(app: typer.Typer) -> None:
    app.command("check", short_help="Validate files without writing anything.")(check)
    app.command("ingest", short_help="Validate and write files to the store.")(ingest)


def _profile_arg() -> Any:
    return typer.Argument(..., metavar="PROFILE", help="Profile name (in profiles/, without .toml) or path.")


def _files_arg() -> Any:
    return typer.Argument(None, metavar="FILE...", help="Input file(s) of a one-table source.", show_default=False)


def _events_opt() -> Any:
    return typer.Option(None, "--events", metavar="FILE", help="Events file of a two-table source (trawl hauls, "
                        "plankton tows, transect segments).")


def _records_opt() -> Any:
    return typer.Option(None, "--records", metavar="FILE", help="Records file of a two-table source (catch, counts, birds).")


def check(
    ctx: typer.Context,
    profile: str = _profile_arg(),
    files: list[Path] = _files_arg(),
    events: Path | None = _events_opt(),
    records_file: Path | None = _records_opt(),
    show: int = typer.Option(FIRST_PROBLEMS, "--show", metavar="N", help="How many rejected rows to list per reason."),
    show_all: bool = typer.Option(False, "--all", help="List every rejected row."),
    study: Path | None = study_option(),
    as_json: bool = json_option(),
) -> None:
    """Validate files without writing; print the row accounting and the rejected rows.

    Nothing is written: the rejected rows are listed here (the first N per reason, or
    all of them with --all). Exit 1 when any row would go to quarantine.

    \b
    Examples:
      harmonize check my_trawl --events hauls.csv --records catch.csv
      harmonize check my_pings pings_2024.csv --all
      harmonize check my_pings pings_2024.csv --json > check.json
    """
    consoles.json = as_json
    from harmonize.ingest import assign_inputs, prepare, run

    st = study_from(ctx, study)
    adapter, prof = prepare(st, profile)
    results = []
    for inputs in assign_inputs(adapter, prof, files or [], events, records_file):
        result = _with_progress(lambda cb, i=inputs: run(st, profile, i, write=False, progress=cb))
        results.append(result)
        _print_result(result, None if show_all else show, per_reason=True)
    code = 1 if any(r.rows_quarantined > 0 for r in results) else 0
    if as_json:
        emit_json("check", {"study": st.name, "results": [_result_doc(r) for r in results]}, code)
    raise typer.Exit(code)


def ingest(
    ctx: typer.Context,
    profile: str = _profile_arg(),
    files: list[Path] = _files_arg(),
    events: Path | None = _events_opt(),
    records_file: Path | None = _records_opt(),
    replace: bool = typer.Option(False, "--replace", help="Supersede an earlier ingest of the same file."),
    dry_run: bool = typer.Option(False, "--dry-run", help="Do everything but write; say what --replace would supersede."),
    show: int = typer.Option(FIRST_PROBLEMS, "--show", metavar="N", help="How many rejected rows to list."),
    strict: bool = typer.Option(False, "--strict", help="Exit 1 when rows went to quarantine."),
    engine: Engine | None = typer.Option(None, "--engine",
                                      help="Where ping tracks become fishing hours (default duckdb; "
                                           "see docs/performance.md)."),
    scheduler: str | None = typer.Option(None, "--scheduler", metavar="ADDRESS",
                                         help="Dask scheduler address (tcp://host:8786) for --engine dask."),
    study: Path | None = study_option(),
    as_json: bool = json_option(),
) -> None:
    """Validate, harmonise and write files to the store; print the row accounting.

    Re-ingesting a file with the same content and configuration changes nothing.

    \b
    Examples:
      harmonize ingest my_trawl --events hauls.csv --records catch.csv
      harmonize ingest --replace my_trawl --events hauls_v2.csv --records catch_v2.csv
      harmonize ingest my_pings pings_2024.csv --json
    """
    consoles.json = as_json
    from harmonize.ingest import assign_inputs, prepare, run

    st = study_from(ctx, study)
    adapter, prof = prepare(st, profile)
    results = []
    for inputs in assign_inputs(adapter, prof, files or [], events, records_file):
        result = _with_progress(lambda cb, i=inputs: run(st, profile, i, write=True, replace=replace, progress=cb,
                                                         engine=engine, scheduler=scheduler, dry_run=dry_run,
                                                         notice=_notice))
        results.append(result)
        _print_result(result, show, per_reason=False)
    code = 1 if (strict and any(r.rows_quarantined > 0 for r in results)) else 0
    if as_json:
        emit_json("ingest", {"study": st.name, "results": [_result_doc(r) for r in results]}, code)
    raise typer.Exit(code)


def _notice(message: str) -> None:
    console.print(one_line(message), markup=False)


def _notice(message: str) -> None:
    """What the library says before it acts (e.g. which ingest --replace supersedes)."""
    say(one_line(message))


def _with_progress(job):  # type: ignore[no-untyped-def]
    if not progress_enabled():
        return job(None)
    from rich.progress import BarColumn, Progress, TextColumn, TimeElapsedColumn

    with Progress(TextColumn("{task.description}"), BarColumn(), TimeElapsedColumn(),
                  console=consoles.err, transient=True) as bar:
        task = bar.add_task("reading", total=None)

        def callback(stage: str, done: int, total: int) -> None:
            bar.update(task, description=stage, completed=done, total=total)

        return job(callback)


def _result_doc(result: IngestResult) -> dict[str, Any]:
    """One ingest or check as JSON (docs/cli.md)."""
    reasons = result.reasons()
    return {
        "status": result.status,
        "source_id": result.source_id,
        "source_kind": result.source_kind,
        "ingest_id": result.ingest_id,
        "files": [{"role": f.role, "file": f.path.name, "path": str(f.path), "sha256": f.sha256,
                   "rows_read": f.rows_read, "rows_accepted": f.rows_accepted,
                   "rows_quarantined": f.rows_quarantined} for f in result.files],
        "rows_read": result.rows_read,
        "rows_accepted": result.rows_accepted,
        "rows_quarantined": result.rows_quarantined,
        "records_written": result.records_written,
        "records_zero_filled": result.records_zero_filled,
        "events_without_values": len(result.events_without_values),
        "quarantined_by_reason": {str(k): int(v) for k, v in reasons.items()},
        "quarantine": records(result.quarantine, QUARANTINE_COLUMNS) if not result.quarantine.empty else [],
        "superseded": list(result.superseded),
        "notes": list(result.notes),
    }


def _print_without_values(result: IngestResult) -> None:
    """Accepted events that give no observation row (kept apart in the store), when there are any."""
    empty = result.events_without_values
    if empty.empty:
        return
    flags = empty["flags"].explode()
    incomplete = flags[flags.astype("string").str.endswith("_incomplete").fillna(False)].index.nunique()
    kept = "would be kept" if result.status == "checked" else "kept"
    lost = f", {fmt_int(incomplete)} of them lost records to quarantine" if incomplete else ""
    say(f"accepted events without any observation row: {fmt_int(len(empty))}{lost} "
        f"({kept} in the store's events_without_values)")


def _print_result(result: IngestResult, show: int | None, per_reason: bool) -> None:
    if result.status == "unchanged":
        for note in result.notes:
            say(one_line(note))
        return
    from rich.table import Table

    verb = {"complete": "ingested", "checked": "checked"}[result.status]
    table = Table(title=f"{result.source_id} ({result.source_kind}) {verb}", title_justify="left")
    for col in ("file", "rows read", "accepted", "quarantined"):
        table.add_column(col, justify="left" if col == "file" else "right")
    for f in result.files:
        table.add_row(one_line(f.path.name), fmt_int(f.rows_read), fmt_int(f.rows_accepted), fmt_int(f.rows_quarantined))
    console.print(table)
    written = "would be written" if result.status == "checked" else "written"
    say(f"observation rows {written}: {fmt_int(result.records_written)} "
        f"(of which inferred zeros: {fmt_int(result.records_zero_filled)})")
    _print_without_values(result)
    if result.ingest_id:
        say(f"ingest id: {result.ingest_id}")
    if result.superseded:
        say(f"superseded earlier ingest(s): {', '.join(result.superseded)}")
    for note in result.notes:
        say(one_line(note))
    if not result.rows_quarantined:
        return
    reasons = ", ".join(f"{code} {fmt_int(n)}" for code, n in result.reasons().items())
    say(f"quarantined by reason: {reasons}")
    q = result.quarantine
    if q.empty:
        return
    if per_reason:
        # nothing is stored by a check: list the rows here, the first N of each reason
        first = q if show is None else q.groupby("reason_code", sort=False).head(show)
        for row in first.itertuples():
            say(one_line(f"  {row.source_file} row {row.source_row}: [{row.reason_code}] {row.message}"))
        if len(first) < len(q):
            say(f"  ... {fmt_int(len(q) - len(first))} more rejected rows; '--all' lists every one, "
                "'--json' gives them to a script")
        return
    first = q.head(show)
    for row in first.itertuples():
        say(one_line(f"  {row.source_file} row {row.source_row}: [{row.reason_code}] {row.message}"))
    if len(q) > len(first):
        say(f"  ... and {fmt_int(len(q) - len(first))} more; see 'harmonize quarantine'")
