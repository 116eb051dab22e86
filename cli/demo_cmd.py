"""demo: build the invented Keldmar Sea study and run everything on it."""

from __future__ import annotations

from pathlib import Path

import typer
from harmonize.cli.console import CAUTION, console, fmt_int

from harmonize.demo.build import DEFAULT_SEED, build_demo


def register(app: typer.Typer) -> None:
    app.command("demo")(demo)


def demo(
    folder: Path = typer.Argument(..., help="A new folder for the demo study."),
    seed: int = typer.Option(DEFAULT_SEED, "--seed", help="Random seed (the demo is deterministic)."),
) -> None:
    """Build an invented study with messy multi-source data, ingest, audit and export it."""
    with console.status("building the demo") as status:
        run = build_demo(folder, seed, progress=lambda msg: status.update(msg))
    console.print(f"Keldmar Sea demo written to {run.folder}")
    rows_q = masked = 0
    for item, res in run.ingests:
        bulk = int(res.masked["n_values"].sum()) if len(res.masked) else 0
        masked += bulk
        rows_q += res.rows_quarantined - bulk
        reasons = ", ".join(f"{k} {fmt_int(v)}" for k, v in res.reasons().items())
        unit = "values" if bulk else "rows"
        console.print(
            f"  {item.description}: {fmt_int(res.rows_read)} {unit} read, {fmt_int(res.rows_accepted)} used, "
            f"{fmt_int(res.rows_quarantined)} {'masked or ' if bulk else ''}quarantined" + (f" ({reasons})" if reasons else ""),
            markup=False,
        )
    console.print(f"rows in quarantine, each with a reason: {fmt_int(rows_q)} "
                  f"(see 'harmonize --study {folder} quarantine')")
    if masked:
        console.print(f"grid values and pings rejected in bulk and counted by reason "
                      f"(clouds, land, outside the sea, duplicates): {fmt_int(masked)}")
    for line in run.findings:
        console.print(f"  {line}" if line.startswith("[") else line, markup=False)
    for line in run.planning:
        console.print(line, markup=False)
    for name, path in run.outputs.items():
        console.print(f"{name}: {path}")
    if run.skipped:
        console.print(f"(source kinds not yet in this version of the demo: {', '.join(run.skipped)})")
    console.print(CAUTION)
