"""The harmonize command: a thin typer shell over the library."""

from __future__ import annotations

import os
import signal
import sys
from pathlib import Path
from typing import NoReturn

import typer
from harmonize.cli import ingest_cmds, init_cmd, store_cmds
from harmonize.cli.console import err_console

from harmonize import __version__, interrupts
from harmonize.adapters.reading import one_line
from harmonize.errors import HarmonizeError, failure_line

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
    """Console-script entry point: one-line errors, exit 2 for usage or configuration errors.

    Exit 3 with one line for a full disk or an internal error; 130 / 143 for SIGINT / SIGTERM.
    """
    try:
        with interrupts.installed():
            app()
    except interrupts.Interrupted as exc:
        _interrupted(exc.signum, exc.committed)
    except HarmonizeError as exc:
        if interrupts.received():
            _interrupted(interrupts.received())
        _fail(f"error: {exc}", 2)
    except Exception as exc:  # noqa: BLE001 - last resort: one line, never a bare traceback
        if interrupts.received():  # a DuckDB query stopped by the interrupt ("Query interrupted")
            _interrupted(interrupts.received())
        if os.environ.get("HARMONIZE_DEBUG"):
            raise
        known = failure_line(exc)
        if known is not None:
            _fail(known[0], known[1])
        _fail(f"internal error: {type(exc).__name__}: {exc}. The store is unchanged by the failed step. "
              "Please report this; set HARMONIZE_DEBUG=1 to see the traceback.", 3)
    except KeyboardInterrupt:
        _interrupted(int(signal.SIGINT))


def _fail(message: str, code: int) -> NoReturn:
    err_console.print(one_line(message), markup=False, highlight=False, soft_wrap=True)
    sys.exit(code)


def _interrupted(signum: int, committed: bool = False) -> NoReturn:
    if committed:
        _fail("interrupted after the store was updated: the last step completed; "
              "run 'harmonize status' to see it", 128 + signum)
    _fail("interrupted; the store is unchanged", 128 + signum)
