"""twins: volunteer records flagged as probable duplicates of another record, and where volunteers stand alone."""

from __future__ import annotations

from pathlib import Path

import typer
from harmonize.cli.console import (
    CAUTION,
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


def register(app: typer.Typer) -> None:
    app.command("twins", short_help="Probable duplicates across sources.")(twins_cmd)


def twins_cmd(
    ctx: typer.Context,
    csv: Path | None = typer.Option(None, "--csv", metavar="OUT", help="Write every twin (both records side by side) "
                                    "to this CSV file ('-' for stdout)."),
    limit: int = typer.Option(20, "--limit", metavar="N", help="How many twins to print."),
    precise: bool = typer.Option(False, "--precise", help="INTERNAL USE ONLY: exact positions of records of "
                                 "sensitive taxa in the CSV (default: rounded, as in every output)."),
    study_dir: Path | None = study_option(),
    as_json: bool = json_option(),
) -> None:
    """Probable duplicates across sources: each flagged record with the record it repeats.

    \b
    Examples:
      harmonize twins
      harmonize twins --csv twins.csv
      harmonize twins --json
    """
    consoles.json = as_json or is_stdout(csv)
    from rich.table import Table

    from harmonize.disclosure import Disclosure, public_twins
    from harmonize.store import Store
    from harmonize.twins import volunteer_only

    study = study_from(ctx, study_dir)
    if precise:
        warn_precise(study.min_vessels)
    with Store(study.store_dir).connect() as con:
        pairs = public_twins(con, Disclosure.for_study(study, precise=precise))
        alone = volunteer_only(con)
    if csv is not None:
        write_csv_out(pairs, csv)
        if not is_stdout(csv):
            generalised = int(pairs["data_generalizations"].notna().sum()) if "data_generalizations" in pairs else 0
            say(f"wrote {fmt_int(len(pairs))} twins to {csv} ({fmt_int(generalised)} with positions "
                "generalised: a sensitive taxon was recorded at the event)")
    if as_json:
        emit_json("twins", {"study": study.name, "twins": records(pairs), "volunteer_only": records(alone)})
        return
    if pairs.empty:
        say("no probable duplicates in the store")
    else:
        counts = pairs.groupby(["source_id", "twin_source_id"]).size()
        table = Table(title="records flagged probable_duplicate, by source and the source of their twin",
                      title_justify="left")
        for col in ("flagged source", "twin in", "records"):
            table.add_column(col, justify="right" if col == "records" else "left")
        for (src, twin), n in counts.items():
            table.add_row(src, twin, fmt_int(int(n)))
        console.print(table)
        for r in pairs.head(limit).itertuples():
            say(f"{r.source_id} {r.event_id} {r.variable} ({r.quantity} {r.value:g}) repeats "
                f"{r.twin_source_id} {r.twin_event_id} ({r.twin_quantity} {r.twin_value:g}): "
                f"{r.distance_km:.2f} km, {r.minutes:.0f} min apart")
        say("Rule: a volunteer record yields to a better-ranked record of the same taxon within its "
            "profile's [duplicates] windows (rank, then counted before presence-only, then the "
            "earlier record); nothing is deleted. See docs/sources/opportunistic.md.")
    if len(alone):
        say(f"strata x seasons with volunteer records only: {fmt_int(len(alone))} "
            f"(e.g. {alone['stratum'].iloc[0]} {alone['season'].iloc[0]} {alone['season_year'].iloc[0]}); "
            "there the opportunistic design carries the whole model")
    say(CAUTION)
