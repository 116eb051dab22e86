"""The harmonize command: a thin typer shell over the library."""

from __future__ import annotations

import os
import sys
from pathlib import Path

import typer
from harmonize.cli import ingest_cmds, init_cmd, store_cmds
from harmonize.cli.console import err_console

from harmonize import __version__
from harmonize.errors import HarmonizeError

app = typer.Typer(
    name="harmonize",
    help="Bring survey, volunteer, gridded and fishing records into one tagged, audited store.",
    no_args_is_help=True,
    pretty_exceptions_enable=False,
    add_completion=False,
    rich_markup_mode=None,
)


def _version(value: bool) -> None:
    if value:
        typer.echo(f"harmonize {__version__}")
        raise typer.Exit()


@app.callback()
def _root(
    ctx: typer.Context,
    study: Path = typer.Option(Path("."), "--study", help="The study folder (holding study.toml).", show_default=True),
    version: bool = typer.Option(False, "--version", callback=_version, is_eager=True, help="Show the version."),
) -> None:
    ctx.obj = {"study": study}


init_cmd.register(app)
ingest_cmds.register(app)
store_cmds.register(app)


def _register_optional() -> None:
    # Verbs of later capabilities register themselves when their module exists.
    import importlib

    for name in ("audit_cmd", "export_cmd", "demo_cmd", "link_cmd", "twins_cmd", "repair_cmd"):
        try:
            module = importlib.import_module(f"harmonize.cli.{name}")
        except ModuleNotFoundError as exc:
            if exc.name != f"harmonize.cli.{name}":
                raise
            continue
        module.register(app)


_register_optional()


def main() -> None:
    """Console-script entry point: one-line errors, exit 2 for usage or configuration errors."""
    try:
        app()
    except HarmonizeError as exc:
        err_console.print(f"error: {exc}", markup=False, highlight=False, soft_wrap=True)
        sys.exit(2)
    except Exception as exc:  # noqa: BLE001 - last resort: one line, never a bare traceback
        if os.environ.get("HARMONIZE_DEBUG"):
            raise
        err_console.print(
            f"internal error: {type(exc).__name__}: {exc}. The store is unchanged by the failed step. "
            "Please report this; set HARMONIZE_DEBUG=1 to see the traceback.",
            markup=False, highlight=False, soft_wrap=True,
        )
        sys.exit(3)
    except KeyboardInterrupt:
        err_console.print("interrupted; the store is unchanged by the unfinished step", markup=False)
        sys.exit(130)
