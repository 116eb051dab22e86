"""status and quarantine: what the store holds and what it refused."""

from __future__ import annotations

from pathlib import Path

import typer
from harmonize.cli.console import console, fmt_int, study_from
from rich.table import Table

from harmonize.adapters.reading import one_line
from harmonize.store import Store
from harmonize.twins import volunteer_only


def register(app: typer.Typer) -> None:
    app.command("status")(status)
    app.command("quarantine")(quarantine)


def status(
    ctx: typer.Context,
    check: bool = typer.Option(False, "--check", help="Verify the manifest against the parquet files and the invariants."),
    all_ingests: bool = typer.Option(False, "--all", help="List superseded ingests too."),
) -> None:
    """What the store holds: ingests, and rows by kind, year, season and layer."""
    study = study_from(ctx)
    store = Store(study.store_dir)
    if not store.exists() and not store.lost_files():
        console.print(f"the store of '{study.name}' is empty: nothing ingested yet ('harmonize ingest PROFILE FILES')")
        return
    # the integrity check runs first: a lost database or a damaged file would stop the listing below
    problems = store.check() if check else []
    for p in problems:
        console.print(f"integrity problem: {one_line(p)}", markup=False)
    if problems:
        console.print("run 'harmonize repair' to see how to take the damaged ingests out of the store", markup=False)
        raise typer.Exit(1)
    ingests = store.ingests(include_superseded=all_ingests)
    table = Table(title=f"ingests in {study.name}", title_justify="left")
    for col in ("ingest", "source", "kind", "file", "status", "read", "accepted", "quarantined", "rows written"):
        table.add_column(col, justify="right" if col in ("read", "accepted", "quarantined", "rows written") else "left")
    for r in ingests.itertuples():
        table.add_row(r.ingest_id, r.source_id, r.source_kind, one_line(r.file_name), r.status, fmt_int(r.rows_read),
                      fmt_int(r.rows_accepted), fmt_int(r.rows_quarantined), fmt_int(r.records_written))
    console.print(table)
    empty = store.events_without_values()
    if len(empty):
        by_source = ", ".join(f"{s} {fmt_int(n)}" for s, n in empty["source_id"].value_counts().sort_index().items())
        console.print(f"accepted events without any observation row: {fmt_int(len(empty))} ({by_source}); "
                      "they are in the store's events_without_values table", markup=False)
    summary = store.summary()
    if len(summary):
        t2 = Table(title="observation rows by kind, season year, season and depth layer", title_justify="left")
        for col in ("kind", "season year", "season", "layer", "events", "rows", "inferred zeros"):
            t2.add_column(col, justify="right" if col in ("events", "rows", "inferred zeros", "season year") else "left")
        for r in summary.itertuples():
            t2.add_row(r.source_kind, str(r.season_year), r.season, str(r.depth_layer), fmt_int(r.events),
                       fmt_int(r.rows), fmt_int(int(r.zero_filled)))
        console.print(t2)
        with store.connect() as con:  # where volunteers alone carry the model (harmonize.twins)
            alone = volunteer_only(con)
        if len(alone):
            console.print(f"volunteer records only: {fmt_int(len(alone))} stratum x season cells have no other "
                          "biological records (see 'harmonize twins')", markup=False)
    masked = store.masked_summary()
    if len(masked):
        t3 = Table(title="values rejected in bulk and counted (grid values, pings), by reason", title_justify="left")
        for col in ("source", "file", "reason", "values"):
            t3.add_column(col, justify="right" if col == "values" else "left")
        for r in masked.itertuples():
            t3.add_row(r.source_id, one_line(r.source_file), r.reason_code, fmt_int(int(r.n_values)))
        console.print(t3)
    if check:
        console.print("integrity check passed: manifest, parquet files and row accounting agree")


def quarantine(
    ctx: typer.Context,
    csv: Path | None = typer.Option(None, "--csv", help="Write all matching rows to this CSV file."),
    reason: str | None = typer.Option(None, "--reason", help="Only this reason code."),
    ingest: str | None = typer.Option(None, "--ingest", help="Only this ingest id."),
    source: str | None = typer.Option(None, "--source", help="Only this source id."),
    limit: int = typer.Option(50, "--limit", help="How many rows to print."),
) -> None:
    """Rejected rows with their reasons (complete ingests only)."""
    study = study_from(ctx)
    store = Store(study.store_dir)
    rows = store.quarantine(ingest_id=ingest, reason=reason, source_id=source)
    if csv is not None:
        from harmonize.export.safe_csv import write_safe_csv

        write_safe_csv(rows, csv)
        console.print(f"wrote {fmt_int(len(rows))} quarantined rows to {csv}")
        return
    if rows.empty:
        console.print("no quarantined rows")
        return
    counts = rows["reason_code"].value_counts()
    console.print("quarantined rows by reason: " + ", ".join(f"{k} {fmt_int(v)}" for k, v in counts.items()))
    for r in rows.head(limit).itertuples():
        console.print(one_line(f"{r.source_id}  {r.source_file} row {r.source_row}: [{r.reason_code}] {r.message}"),
                      markup=False)
    if len(rows) > limit:
        console.print(f"... and {fmt_int(len(rows) - limit)} more; use --csv OUT for all of them")
