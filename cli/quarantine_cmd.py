"""quarantine: the rejected rows of complete ingests, with their reasons."""

from __future__ import annotations

from pathlib import Path

import typer
from harmonize.cli.console import (
    console,
    consoles,
    emit_json,
    fmt_int,
    is_stdout,
    json_option,
    records,
    say,
    study_from,
    study_option,
    warn_precise,
    write_csv_out,
)

from harmonize.errors import one_line

COLUMNS = ["ingest_id", "source_id", "source_file", "source_row", "reason_code", "message", "raw", "withheld"]


def register(app: typer.Typer) -> None:
    app.command("quarantine", short_help="Rejected rows with their reasons.")(quarantine)


def quarantine(
    ctx: typer.Context,
    csv: Path | None = typer.Option(None, "--csv", metavar="OUT", help="Write all matching rows to this CSV file "
                                    "('-' for stdout)."),
    reason: str | None = typer.Option(None, "--reason", metavar="CODE", help="Only this reason code."),
    ingest: str | None = typer.Option(None, "--ingest", metavar="INGEST_ID", help="Only this ingest id."),
    source: str | None = typer.Option(None, "--source", metavar="SOURCE_ID", help="Only this source id."),
    limit: int = typer.Option(50, "--limit", metavar="N", help="How many rows to print."),
    precise: bool = typer.Option(False, "--precise", help="INTERNAL USE ONLY: keep the raw text of rejected fishing "
                                 "rows and of rows naming a sensitive taxon in the CSV."),
    study: Path | None = study_option(),
    as_json: bool = json_option(),
) -> None:
    """Rejected rows with their reasons (complete ingests only).

    \b
    Examples:
      harmonize quarantine --reason unknown_taxon
      harmonize quarantine --csv rejected.csv
      harmonize quarantine --csv - | grep outside_domain
      harmonize quarantine --json --source my_trawl
    """
    consoles.json = as_json or is_stdout(csv)
    from harmonize.disclosure import Disclosure, public_quarantine_rows

    st = study_from(ctx, study)
    if csv is not None and not is_stdout(csv):
        from harmonize.export.atomic import refuse_store_target

        refuse_store_target(st, Path(csv))  # never onto the store's own files
    if precise:
        warn_precise(st.min_vessels)
    rows = public_quarantine_rows(st, Disclosure.for_study(st, precise=precise),
                                  ingest_id=ingest, reason=reason, source_id=source)
    if as_json:
        if csv is not None and not is_stdout(csv):
            write_csv_out(rows, csv)
        counts = rows["reason_code"].value_counts() if not rows.empty else {}
        emit_json("quarantine", {"study": st.name, "rows": len(rows),
                                 "by_reason": {str(k): int(v) for k, v in dict(counts).items()},
                                 "quarantine": records(rows, COLUMNS)})
        return
    if csv is not None:
        write_csv_out(rows, csv)
        if not is_stdout(csv):
            withheld = int(rows["withheld"].notna().sum()) if "withheld" in rows else 0
            say(f"wrote {fmt_int(len(rows))} quarantined rows to {csv} ({fmt_int(withheld)} with raw text "
                "withheld: fishing rows locate one vessel, others name a sensitive taxon)")
        return
    if rows.empty:
        console.print("no quarantined rows")
        return
    counts = rows["reason_code"].value_counts()
    say("quarantined rows by reason: " + ", ".join(f"{k} {fmt_int(v)}" for k, v in counts.items()))
    for r in rows.head(limit).itertuples():
        say(one_line(f"{r.source_id}  {r.source_file} row {r.source_row}: [{r.reason_code}] {r.message}"))
    if len(rows) > limit:
        say(f"... and {fmt_int(len(rows) - limit)} more; use --csv OUT for all of them")
