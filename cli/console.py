"""Shared rich consoles and small formatting helpers for the CLI."""

from __future__ import annotations

import os
import sys
from pathlib import Path

import typer
from rich.console import Console

from harmonize.study import Study, load_study

#: Width for output that goes to a file or a pipe: lines are never hard-wrapped there (tables
#: take their natural width), unless COLUMNS says otherwise.
PIPE_WIDTH = 10_000


def _make_console(stderr: bool = False) -> Console:
    stream = sys.stderr if stderr else sys.stdout
    piped = not (hasattr(stream, "isatty") and stream.isatty())
    width = PIPE_WIDTH if piped and not os.environ.get("COLUMNS") else None
    return Console(stderr=stderr, highlight=False, soft_wrap=piped, width=width)


console = _make_console()
err_console = _make_console(stderr=True)

CAUTION = (
    "harmonize prepares data; it does not assess stocks. Official survey protocols and "
    "local rules on confidential data prevail."
)


def study_from(ctx: typer.Context) -> Study:
    return load_study(Path(ctx.obj["study"]))


def fmt_int(n: int) -> str:
    return f"{n:,}"
