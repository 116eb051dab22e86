"""demo: build the invented Keldmar Sea study and run everything on it."""

from __future__ import annotations

from pathlib import Path

import typer
from harmonize.cli.console import CAUTION, fmt_int, say, status

#: The demo's seed (harmonize.demo.build.DEFAULT_SEED; a test checks they agree).
DEFAULT_SEED = 20261201


def register(app: typer.Typer) -> None:
    app.command("demo", short_help="Build and run the invented Keldmar Sea study.")(demo)


def demo(
    folder: Path = typer.Argument(..., metavar="DIR", help="A new folder for the demo study."),
    seed: int = typer.Option(DEFAULT_SEED, "--seed", metavar="N", help="Random seed (the demo is deterministic)."),
) -> None:
    """Build an invented study with messy multi-source data, ingest, audit and export it.

    \b
    Examples:
      harmonize demo demo-study
      harmonize --study demo-study status
    """
    from harmonize.demo.build import build_demo

    with status("building the demo") as st:
        run = build_demo(folder, seed, progress=lambda msg: st.update(msg))
    say(f"Keldmar Sea demo written to {run.folder}")
    rows_q = masked = 0
    for item, res in run.ingests:
        bulk = int(res.masked["n_values"].sum()) if len(res.masked) else 0
        masked += bulk
        rows_q += res.rows_quarantined - bulk
        reasons = ", ".join(f"{k} {fmt_int(v)}" for k, v in res.reasons().items())
        unit = "values" if bulk else "rows"
        say(f"  {item.description}: {fmt_int(res.rows_read)} {unit} read, {fmt_int(res.rows_accepted)} used, "
            f"{fmt_int(res.rows_quarantined)} {'masked or ' if bulk else ''}quarantined" + (f" ({reasons})" if reasons else ""))
    say(f"rows in quarantine, each with a reason: {fmt_int(rows_q)} "
        f"(see 'harmonize --study {folder} quarantine')")
    if masked:
        say(f"grid values and pings rejected in bulk and counted by reason "
            f"(clouds, land, outside the sea, duplicates): {fmt_int(masked)}")
    for line in run.findings:
        say(f"  {line}" if line.startswith("[") else line)
    for line in run.planning:
        say(line)
    for name, path in run.outputs.items():
        say(f"{name}: {path}")
    if run.skipped:
        say(f"(source kinds not yet in this version of the demo: {', '.join(run.skipped)})")
    say(CAUTION)
