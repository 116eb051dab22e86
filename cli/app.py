"""The harmonize command: a thin typer shell over the library.

Exit codes (docs/cli.md): 0 fine; 1 data problems found; 2 usage or configuration error;
3 internal error (a bug); 130 interrupted. Every error is one line on stderr.

Each verb lives in its own module with a ``register(app)`` function and imports the heavy
libraries only when it runs, so that ``harmonize --help`` starts fast.
"""

from __future__ import annotations

import importlib
import os
import signal
import sys
from collections.abc import Sequence
from pathlib import Path
from typing import Any, NoReturn

import typer
from harmonize.cli.console import STUDY_ENV, configure_logging, consoles, err_console
from typer._click import exceptions as click_exceptions  # typer >= 0.29 carries its own click
from typer.core import TyperArgument, TyperGroup

from harmonize import __version__, interrupts, settings
from harmonize.errors import HarmonizeError, failure_line, one_line

EXIT_OK, EXIT_DATA, EXIT_USAGE, EXIT_INTERNAL, EXIT_INTERRUPTED = 0, 1, 2, 3, 130

#: Verb modules, in the order of the help page. A later capability adds its module here.
VERB_MODULES = ("init_cmd", "ingest_cmds", "store_cmds", "quarantine_cmd", "audit_cmd", "export_cmd", "demo_cmd",
                "link_cmd", "twins_cmd", "plan_cmd", "repair_cmd")


def _error(text: str) -> None:
    """One line on stderr: control characters (a line break in a file name) shown escaped."""
    err_console.print(one_line(str(text)), markup=False, highlight=False, soft_wrap=True)


def _interrupted(signum: int, committed: bool = False) -> NoReturn:
    if committed:
        _error("interrupted after the store was updated: the last step completed; run 'harmonize status' to see it")
    else:
        _error("interrupted; the store is unchanged")
    raise typer.Exit(128 + signum)


def _plain_argument(arg: TyperArgument) -> None:
    """Help shows an argument by its metavar and its choices, never a Python type name."""
    typed = arg.display_type_rich

    def display_type(ctx: Any = None, **kw: Any) -> str:
        text = typed(ctx=ctx, **kw)
        return text if "|" in text else ""  # choices stay: <long|wide|grid|gpkg|dwca>

    def usage_name() -> str:
        name = arg.display_name_raw
        if arg.nargs != 1 and not name.endswith("..."):
            name += "..."
        return name if arg.required else f"[{name}]"

    arg.display_type_rich = display_type  # type: ignore[method-assign]
    arg._usage_display_name = usage_name  # type: ignore[method-assign]


def _load_compiled_libraries() -> None:
    """Import the compiled libraries a command works with (their start-up must not be cut)."""
    import duckdb  # noqa: F401
    import numpy  # noqa: F401
    import pandas  # noqa: F401
    import pyarrow  # noqa: F401


class HarmonizeGroup(TyperGroup):
    """Turns every failure into one line on stderr and a documented exit code."""

    def __init__(self, **kwargs: Any) -> None:
        super().__init__(**kwargs)
        for command in self.commands.values():
            for param in command.params:
                if isinstance(param, TyperArgument):
                    _plain_argument(param)

    def list_commands(self, ctx: typer.Context) -> list[str]:
        return list(self.commands)  # registration order, not alphabetical

    def invoke(self, ctx: typer.Context) -> Any:
        try:
            # SIGINT / SIGTERM stop DuckDB queries through the connection and end in 130 / 143;
            # the HARMONIZE_* variables are read here, once, and apply to this command only
            with interrupts.installed(), settings.applied(settings.from_environment(os.environ)):
                if "--help" not in [*getattr(ctx, "protected_args", []), *ctx.args]:
                    with interrupts.shielded():  # an interrupt while they load is raised after
                        _load_compiled_libraries()
                return super().invoke(ctx)
        except interrupts.Interrupted as exc:
            _interrupted(exc.signum, exc.committed)
        except HarmonizeError as exc:
            if interrupts.received():
                _interrupted(interrupts.received(), interrupts.committed())
            _error(f"error: {exc}")
            raise typer.Exit(EXIT_USAGE) from None
        except KeyboardInterrupt:
            _interrupted(int(signal.SIGINT), interrupts.committed())
        except BrokenPipeError:
            # the reader of a pipe went away (e.g. '| head'): nothing more to say
            sys.stdout = open(os.devnull, "w")  # noqa: SIM115 - silences the flush at exit
            raise typer.Exit(EXIT_OK) from None
        except (typer.Exit, typer.Abort, click_exceptions.ClickException):
            raise
        except Exception as exc:  # noqa: BLE001 - last resort: one line, never a bare traceback
            if interrupts.received():  # a DuckDB query stopped by the interrupt ("Query interrupted")
                _interrupted(interrupts.received(), interrupts.committed())
            if os.environ.get("HARMONIZE_DEBUG"):
                raise
            known = failure_line(exc)  # a full disk, a folder that cannot be written
            if known is not None:
                _error(known[0])
                raise typer.Exit(known[1]) from None
            _error(f"internal error: {type(exc).__name__}: {exc}. The store is unchanged by the failed step. "
                   "Please report this; set HARMONIZE_DEBUG=1 to see the traceback.")
            raise typer.Exit(EXIT_INTERNAL) from None

    def main(self, args: Sequence[str] | None = None, prog_name: str | None = None,
             complete_var: str | None = None, standalone_mode: bool = True, **extra: Any) -> Any:
        args = _optional_values(list(sys.argv[1:] if args is None else args))
        try:
            rv = super().main(args=args, prog_name=prog_name or "harmonize", complete_var=complete_var,
                              standalone_mode=False, **extra)
            code = rv if isinstance(rv, int) else EXIT_OK
        except click_exceptions.UsageError as exc:
            where = exc.ctx.command_path if exc.ctx is not None else "harmonize"
            message = exc.format_message().replace("Value error, ", "")  # typer's coercion prefix
            _error(f"error: {message} (see '{where} --help')")
            code = EXIT_USAGE
        except click_exceptions.ClickException as exc:
            _error(f"error: {exc.format_message()}")
            code = exc.exit_code
        except typer.Abort:
            _error("interrupted")
            code = EXIT_INTERRUPTED
        if standalone_mode:
            sys.exit(code)
        return code


#: Options that take a value which may be left out: (verb, option) -> the value meant then.
#: ``audit --json`` alone writes the audit JSON to stdout, as ``audit --json -`` does.
OPTIONAL_VALUES = {("audit", "--json"): "-"}


def _optional_values(args: list[str]) -> list[str]:
    out: list[str] = []
    verb = None
    for i, arg in enumerate(args):
        out.append(arg)
        if verb is None and arg in {v for v, _ in OPTIONAL_VALUES} and (i == 0 or args[i - 1] != "--study"):
            verb = arg
        value = OPTIONAL_VALUES.get((verb, arg)) if verb else None
        if value is not None:
            nxt = args[i + 1] if i + 1 < len(args) else None
            if nxt is None or (nxt.startswith("-") and nxt != "-"):
                out.append(value)
    return out


app = typer.Typer(
    name="harmonize",
    cls=HarmonizeGroup,
    help="Bring survey, volunteer, gridded and fishing records into one tagged, audited store.\n\n"
         "Exit codes: 0 fine, 1 data problems found, 2 usage or configuration error, 130 interrupted.",
    epilog="Examples:\n\n\b\n  harmonize init my-study\n  harmonize --study my-study check my_trawl "
           "--events hauls.csv --records catch.csv\n  harmonize status --study my-study --json\n\n"
           "Every verb has --help. Documentation: docs/cli.md.",
    no_args_is_help=True,
    pretty_exceptions_enable=False,
    add_completion=True,
    rich_markup_mode=None,
    context_settings={"help_option_names": ["-h", "--help"], "max_content_width": 100},
)


def _version(value: bool) -> None:
    if value:
        typer.echo(f"harmonize {__version__}")
        raise typer.Exit()


@app.callback()
def _root(
    ctx: typer.Context,
    study: Path | None = typer.Option(None, "--study", metavar="DIR", envvar=STUDY_ENV, show_envvar=True,
                                      help="The study folder (holding study.toml); also accepted after the verb. "
                                           "Default: the current folder."),
    verbose: int = typer.Option(0, "--verbose", "-v", count=True, show_default=False,
                                help="Show what the library does on stderr (-v steps, -vv details)."),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="Only errors on stderr; no progress display."),
    version: bool = typer.Option(False, "--version", callback=_version, is_eager=True, help="Show the version."),
) -> None:
    ctx.obj = {"study": study}
    consoles.quiet = quiet
    consoles.json = False
    configure_logging(verbose, quiet)


def _register() -> None:
    for name in VERB_MODULES:
        importlib.import_module(f"harmonize.cli.{name}").register(app)


_register()


def main(args: Sequence[str] | None = None) -> None:
    """Console-script entry point (also ``python -m harmonize``).

    SIGINT and SIGTERM are handled for the whole run, not only while a verb works: a signal
    that arrives as the command ends still gives 130 / 143 and one line, never a bare kill.
    """
    interrupts.install_for_process()
    try:
        app(args=list(args) if args is not None else None, prog_name="harmonize")
    except SystemExit:
        interrupts.finishing()  # the command has its result; a late signal does not change it
        raise
    except interrupts.Interrupted as exc:
        interrupts.finishing()
        if exc.committed or interrupts.committed():
            _error("interrupted after the store was updated: the last step completed; "
                   "run 'harmonize status' to see it")
        else:
            _error("interrupted; the store is unchanged")
        sys.exit(128 + exc.signum)
