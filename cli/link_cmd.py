"""colocate: attach gridded cell-period values (e.g. satellite SST) to the sample events of the store."""

from __future__ import annotations

from pathlib import Path

import typer
from harmonize.cli.console import (
    CAUTION,
    console,
    consoles,
    fmt_int,
    is_stdout,
    say,
    study_from,
    study_option,
    warn_precise,
    write_csv_out,
)

from harmonize.errors import HarmonizeError


def register(app: typer.Typer) -> None:
    app.command("colocate", short_help="Attach gridded values to sample events.")(colocate_cmd)


def colocate_cmd(
    ctx: typer.Context,
    variables: list[str] = typer.Argument(..., metavar="VARIABLE...",
                                          help="Gridded variables (CF standard names), e.g. sea_surface_temperature."),
    source: list[str] = typer.Option([], "--source", metavar="VARIABLE=SOURCE_ID",
                                     help="Take a variable from this gridded source; repeat per variable."),
    csv: Path | None = typer.Option(None, "--csv", metavar="OUT", help="Write the values to this CSV file ('-' for stdout)."),
    wide: bool = typer.Option(False, "--wide", help="One row per event, one column per variable (needs one source per variable)."),
    precise: bool = typer.Option(False, "--precise", help="INTERNAL USE ONLY: include fishing cell-periods of "
                                 "fewer than min_vessels vessels and sensitive events at their exact cell."),
    study_dir: Path | None = study_option(),
) -> None:
    """Attach to each sample event the gridded value of its cell and period (and layer).

    Prints how many events of each source found a value; exit 1 when none did.

    \b
    Examples:
      harmonize colocate sea_surface_temperature
      harmonize colocate sea_surface_temperature --source sea_surface_temperature=sst_sat --csv sst.csv
    """
    consoles.json = is_stdout(csv)
    from rich.table import Table

    from harmonize.colocate import colocate, colocate_wide

    study = study_from(ctx, study_dir)
    if precise:
        warn_precise(study.min_vessels)
    from harmonize.disclosure import Disclosure

    rules = Disclosure.for_study(study, precise=precise)
    chosen = {}
    for item in source:
        variable, sep, source_id = item.partition("=")
        if not sep or not variable or not source_id:
            raise HarmonizeError(f"--source '{item}' is not VARIABLE=SOURCE_ID")
        chosen[variable.strip()] = source_id.strip()
    long = colocate(study, variables, sources=chosen, disclosure=rules)
    table = Table(title="gridded values attached to sample events", title_justify="left")
    for col in ("events of", "variable", "from", "events", "with a value"):
        table.add_column(col, justify="right" if col in ("events", "with a value") else "left")
    summary = (long.assign(found=long["value"].notna())
               .groupby(["source_id", "variable", "gridded_source_id"], as_index=False)
               .agg(events=("event_id", "size"), found=("found", "sum")))
    for r in summary.itertuples():
        table.add_row(r.source_id, r.variable, r.gridded_source_id, fmt_int(r.events), fmt_int(int(r.found)))
    console.print(table)
    if csv is not None:
        out = colocate_wide(study, variables, sources=chosen, disclosure=rules) if wide else long
        write_csv_out(out, csv)
        if not is_stdout(csv):
            say(f"written: {csv} ({fmt_int(len(out))} rows)")
    console.print("Values are cell-period means of the gridded source, not measurements at the sample. " + CAUTION)
    raise typer.Exit(0 if summary["found"].sum() > 0 else 1)
