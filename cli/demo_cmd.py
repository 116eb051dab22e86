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
    total_q = 0
    for item, res in run.ingests:
        total_q += res.rows_quarantined
        reasons = ", ".join(f"{k} {v}" for k, v in res.reasons().items())
        console.print(
            f"  {item.description}: {fmt_int(res.rows_read)} rows read, {fmt_int(res.rows_accepted)} accepted, "
            f"{fmt_int(res.rows_quarantined)} quarantined" + (f" ({reasons})" if reasons else ""),
            markup=False,
        )
    console.print(f"rows in quarantine: {fmt_int(total_q)}; see 'harmonize --study {folder} quarantine'")
    for line in run.findings:
        console.print(f"  {line}", markup=False)
    for name, path in run.outputs.items():
        console.print(f"{name}: {path}")
    if run.skipped:
        console.print(f"(source kinds not yet in this version of the demo: {', '.join(run.skipped)})")
    console.print(CAUTION)
