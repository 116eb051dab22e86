"""Shared rich consoles and small formatting helpers for the CLI."""

from __future__ import annotations

from pathlib import Path

import typer
from rich.console import Console

from harmonize.study import Study, load_study

console = Console(highlight=False)
err_console = Console(stderr=True, highlight=False)

CAUTION = (
    "harmonize prepares data; it does not assess stocks. Official survey protocols and "
    "local rules on confidential data prevail."
)


def warn_precise(min_vessels: int) -> None:
    """The warning every command prints when asked for --precise output."""
    from harmonize.disclosure import PRECISE_WARNING

    err_console.print("WARNING: " + PRECISE_WARNING.format(n=min_vessels), style="bold red", markup=False)


def study_from(ctx: typer.Context) -> Study:
    return load_study(Path(ctx.obj["study"]))


def fmt_int(n: int) -> str:
    return f"{n:,}"
