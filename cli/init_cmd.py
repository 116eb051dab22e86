"""init: write a commented study folder to start from."""

from __future__ import annotations

from pathlib import Path

import typer
from harmonize.cli.console import console

from harmonize.templates import write_starter


def register(app: typer.Typer) -> None:
    app.command("init")(init)


def init(folder: Path = typer.Argument(..., help="The new study folder.")) -> None:
    """Write a commented study.toml, an example profile, empty taxa files and a domain."""
    written = write_starter(folder)
    for path in written:
        console.print(f"wrote {path}")
    console.print(
        "next: draw your study area in domain.geojson, list your taxa in taxa.csv and the taxa each "
        "protocol always records in targets.csv, copy the example profile of your source kind "
        f"(profiles/example_<kind>.toml), then run 'harmonize --study {folder} check PROFILE FILES' "
        "until it is clean, and 'ingest'"
    )
