"""init: write a commented study folder to start from."""

from __future__ import annotations

from pathlib import Path

import typer
from harmonize.cli.console import say


def register(app: typer.Typer) -> None:
    app.command("init", short_help="Write a commented study folder to start from.")(init)


def init(folder: Path = typer.Argument(..., metavar="DIR", help="The new study folder.")) -> None:
    """Write a commented study.toml, example profiles, their JSON Schemas, empty taxa files and a domain.

    \b
    Examples:
      harmonize init my-study
      cd my-study && harmonize check example_trawl --events hauls.csv --records catch.csv
    """
    from harmonize.templates import write_starter

    written = write_starter(folder)
    for path in written:
        say(f"wrote {path}")
    say("next: draw your study area in domain.geojson, list your taxa in taxa.csv and the taxa each "
        "protocol always records in targets.csv, copy the example profile of your source kind "
        f"(profiles/example_<kind>.toml), then run 'harmonize --study {folder} check PROFILE FILES' "
        "until it is clean, and 'ingest'")
