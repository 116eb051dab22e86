"""status: what the store holds (quarantine is in quarantine_cmd.py)."""

from __future__ import annotations

from pathlib import Path

import typer
from harmonize.cli.console import (
    console,
    consoles,
    emit_json,
    fmt_int,
    json_option,
    records,
    say,
    study_from,
    study_option,
)

from harmonize.errors import one_line


def register(app: typer.Typer) -> None:
    app.command("status", short_help="What the store holds.")(status)


def status(
    ctx: typer.Context,
    check: bool = typer.Option(False, "--check", help="Verify the manifest against the parquet files and the invariants."),
    all_ingests: bool = typer.Option(False, "--all", help="List superseded ingests too."),
    study_dir: Path | None = study_option(),
    as_json: bool = json_option(),
) -> None:
    """What the store holds: ingests, and rows by kind, year, season and layer.

    With --check, exit 1 when the store fails its integrity check.

    \b
    Examples:
      harmonize status
      harmonize status --check
      harmonize status --study my-study --json
    """
    consoles.json = as_json
    from rich.table import Table

    from harmonize.adapters.registry import kinds
    from harmonize.store import Store
    from harmonize.twins import volunteer_only

    study = study_from(ctx, study_dir)
    store = Store(study.store_dir)
    if not store.exists() and store.lost() is None:
        console.print(f"the store of '{study.name}' is empty: nothing ingested yet ('harmonize ingest PROFILE FILES')")
        if as_json:
            emit_json("status", {"study": study.name, "store": str(study.store_dir), "empty": True, "ingests": [],
                                 "summary": [], "events_without_values": 0, "masked": [], "volunteer_only_cells": 0,
                                 "integrity_problems": [] if check else None})
        return
    # the integrity check runs first: a lost database or a damaged file would stop the listing below
    # ingests of stores older than version 6 did not record whether their rows are traced
    problems = store.check(legacy_row_traced_kinds=kinds(row_traced=True)) if check else []
    for p in problems:
        console.print(f"integrity problem: {one_line(p)}", markup=False)
    if problems:
        if as_json:
            emit_json("status", {"study": study.name, "store": str(study.store_dir), "empty": False,
                                 "integrity_problems": [str(p) for p in problems]}, 1)
        say("run 'harmonize repair' to see how to take the damaged ingests out of the store")
        raise typer.Exit(1)
    ingests = store.ingests(include_superseded=all_ingests)
    table = Table(title=f"ingests in {study.name}", title_justify="left")
    rows = [[r.ingest_id, r.source_id, r.source_kind, one_line(r.file_name), r.status, fmt_int(r.rows_read),
             fmt_int(r.rows_accepted), fmt_int(r.rows_quarantined), fmt_int(r.records_written)]
            for r in ingests.itertuples()]
    columns = ("ingest", "source", "kind", "file", "status", "read", "accepted", "quarantined", "rows written")
    natural = sum(max([len(c), *(len(r[i]) for r in rows)]) + 3 for i, c in enumerate(columns)) + 1
    abbreviated = natural > console.width
    if abbreviated:
        # documented rule (docs/audit.md): in a narrow terminal an ingest id is shown by its random
        # suffix (the part after the last "-"), stacked with its source and file in one column
        rows = [[f"{r[0].rsplit('-', 1)[-1]}\n{r[1]}\n{r[3]}", *r[2:3], *r[4:]] for r in rows]
        columns = ("ingest / source / file", "kind", *columns[4:])
    if all(r[columns.index("status")] == "complete" for r in rows):
        keep = [i for i, c in enumerate(columns) if c != "status"]
        rows = [[r[i] for i in keep] for r in rows]
        columns = tuple(columns[i] for i in keep)
        table.title = f"ingests in {study.name} (all complete)"
    for i, col in enumerate(columns):
        if col in ("kind", "status", "read", "accepted", "quarantined", "rows written"):
            # numbers and short words are never cut: the column is at least as wide as its widest value
            widest = max([len(col), *(len(r[i]) for r in rows)])
            table.add_column(col, justify="left" if col in ("kind", "status") else "right", no_wrap=True,
                             min_width=widest)
        else:  # ids and names wrap onto more lines rather than lose characters
            table.add_column(col, justify="left", overflow="fold")
    for row in rows:
        table.add_row(*row)
    console.print(table)
    if abbreviated:
        console.print("ingest ids shortened to the part after their last '-' to fit the terminal; a wider "
                      "terminal, or piped output ('harmonize status | cat'), shows them whole", markup=False)
    empty = store.events_without_values()
    if len(empty):
        by_source = ", ".join(f"{s} {fmt_int(n)}" for s, n in empty["source_id"].value_counts().sort_index().items())
        console.print(f"accepted events without any observation row: {fmt_int(len(empty))} ({by_source}); "
                      "they are in the store's events_without_values table", markup=False)
    summary = store.summary()
    alone: list = []
    if len(summary):
        t2 = Table(title="observation rows by kind, season year, season and depth layer", title_justify="left")
        rows2 = [[r.source_kind, str(r.season_year), r.season, str(r.depth_layer), fmt_int(r.events),
                  fmt_int(r.rows), fmt_int(int(r.zero_filled))] for r in summary.itertuples()]
        for i, col in enumerate(("kind", "season\nyear", "season", "layer", "events", "rows", "inferred\nzeros")):
            # every value whole: a column is at least as wide as its widest value and header line
            widest = max([*(len(x) for x in col.split("\n")), *(len(r[i]) for r in rows2)])
            t2.add_column(col, justify="right" if i in (1, 4, 5, 6) else "left", no_wrap=True, min_width=widest)
        for row in rows2:
            t2.add_row(*row)
        console.print(t2)
        with store.connect() as con:  # where volunteers alone carry the model (harmonize.twins)
            alone = volunteer_only(con)
        if len(alone):
            console.print(f"volunteer records only: {fmt_int(len(alone))} stratum x season cells have no other "
                          "biological records (see 'harmonize twins')", markup=False)
    masked = store.masked_summary()
    if len(masked):
        t3 = Table(title="values rejected in bulk and counted (grid values, pings), by reason", title_justify="left")
        widest = max([6, *(len(fmt_int(int(v))) for v in masked["n_values"])])
        for col in ("source", "file", "reason", "values"):
            if col == "values":
                t3.add_column(col, justify="right", no_wrap=True, min_width=widest)
            else:
                t3.add_column(col, justify="left", overflow="fold")
        for r in masked.itertuples():
            t3.add_row(r.source_id, one_line(r.source_file), r.reason_code, fmt_int(int(r.n_values)))
        console.print(t3)
    if check:
        console.print("integrity check passed: manifest, parquet files and row accounting agree")
        note = store.rebuilt_note()
        if note:
            console.print(f"note: {note}", markup=False)
    if as_json:
        emit_json("status", {
            "study": study.name, "store": str(study.store_dir), "empty": False,
            "ingests": records(ingests), "summary": records(summary), "events_without_values": len(empty),
            "masked": records(masked), "volunteer_only_cells": len(alone),
            "integrity_problems": [] if check else None})
