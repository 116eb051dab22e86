"""Shared output of the CLI: consoles, the --study option, JSON documents, '-' for stdout.

Light on purpose: importing this module (and so ``harmonize --help``) loads neither pandas nor
any other heavy library; the verbs import what they need when they run.
"""

from __future__ import annotations

import json
import logging
import math
import os
import sys
from collections.abc import Iterator, Mapping
from contextlib import contextmanager
from datetime import date, datetime
from pathlib import Path
from typing import TYPE_CHECKING, Any

import typer

from harmonize import __version__

if TYPE_CHECKING:
    from rich.console import Console

    from harmonize.study import Study

#: Version of the JSON documents the verbs print with --json (docs/cli.md). Grows, never changes meaning.
JSON_FORMAT_VERSION = 1
STUDY_ENV = "HARMONIZE_STUDY"

CAUTION = (
    "harmonize prepares data; it does not assess stocks. Official survey protocols and "
    "local rules on confidential data prevail."
)


def _console(stderr: bool) -> Console:
    from rich.console import Console  # rich loads when something is printed, not for --help

    stream = sys.stderr if stderr else sys.stdout
    terminal = stream.isatty()
    # Not a terminal (a pipe, a file, a test runner): no wrapping, no truncation, no colour.
    return Console(stderr=stderr, highlight=False, soft_wrap=not terminal,
                   width=None if terminal else 100_000, no_color=True if not terminal else None,
                   emoji=False)


class _Consoles:
    """The stdout and stderr consoles, made when first used (so that tests see their streams)."""

    def __init__(self) -> None:
        self.quiet = False
        self.json = False

    @property
    def out(self) -> Console:
        con = _console(False)
        con.quiet = self.json  # with --json, stdout holds the JSON document and nothing else
        return con

    @property
    def err(self) -> Console:
        return _console(True)


consoles = _Consoles()


class _Proxy:
    """``console.print(...)`` on the current stdout console."""

    def __init__(self, stderr: bool) -> None:
        self._stderr = stderr

    def __getattr__(self, name: str) -> Any:
        return getattr(consoles.err if self._stderr else consoles.out, name)


console: Console = _Proxy(False)  # type: ignore[assignment]
err_console: Console = _Proxy(True)  # type: ignore[assignment]


def say(text: str) -> None:
    """One plain line on stdout (not with --json), no markup."""
    console.print(text, markup=False, highlight=False)


def progress_enabled() -> bool:
    return not consoles.quiet and not consoles.json and sys.stderr.isatty()


@contextmanager
def status(text: str) -> Iterator[Any]:
    """A spinner on stderr while a step runs (terminals only)."""
    if progress_enabled():
        with consoles.err.status(text) as st:
            yield st
    else:
        class _Silent:
            def update(self, *_a: Any, **_k: Any) -> None:
                return None

        yield _Silent()


# ------------------------------------------------------------------ options shared by verbs
def study_option() -> Any:
    return typer.Option(None, "--study", metavar="DIR", envvar=STUDY_ENV, show_envvar=True,
                        help="The study folder (holding study.toml); also accepted before the verb. "
                             "Default: the current folder.")


def json_option() -> Any:
    return typer.Option(False, "--json", help="Print one JSON document on stdout and nothing else "
                        "(docs/cli.md describes it).")


def study_path(ctx: typer.Context, study: Path | None) -> Path:
    """The study folder: --study after the verb, else before it, else HARMONIZE_STUDY, else '.'."""
    if study is not None:
        return Path(study)
    root = (ctx.find_root().obj or {}).get("study") if ctx is not None else None
    return Path(root) if root is not None else Path(os.environ.get(STUDY_ENV) or ".")


def study_from(ctx: typer.Context, study: Path | None = None) -> Study:
    from harmonize.study import load_study

    return load_study(study_path(ctx, study))


def warn_precise(min_vessels: int) -> None:
    """The warning every command prints when asked for --precise output."""
    from harmonize.disclosure import PRECISE_WARNING

    err_console.print("WARNING: " + PRECISE_WARNING.format(n=min_vessels), style="bold red", markup=False)


def fmt_int(n: int) -> str:
    return f"{n:,}"


# ------------------------------------------------------------------ JSON and '-'
def _plain(value: Any) -> Any:
    """JSON-ready value: paths as text, NaN and NaT as null, numpy values as Python values."""
    if isinstance(value, Mapping):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, list | tuple | set | frozenset):
        return [_plain(v) for v in value]
    if value is None or isinstance(value, bool | str):
        return value
    if isinstance(value, Path):
        return str(value)
    if "pandas" in sys.modules:  # only a verb that read data has pandas values to convert
        import pandas as pd

        if pd.api.types.is_scalar(value) and pd.isna(value):
            return None
    if hasattr(value, "tolist"):  # numpy scalar or array (a list column such as flags)
        return _plain(value.tolist())
    if isinstance(value, datetime | date):
        return value.isoformat()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, int | float):
        return value
    return str(value)


def emit_json(command: str, payload: Mapping[str, Any], exit_code: int = 0) -> None:
    """Write the verb's JSON document on stdout: format, version, command, then the payload."""
    doc = {"format": "harmonize-cli", "format_version": JSON_FORMAT_VERSION, "harmonize_version": __version__,
           "command": command, "exit_code": exit_code, **payload}
    sys.stdout.write(json.dumps(_plain(doc), ensure_ascii=False) + "\n")
    sys.stdout.flush()


def records(frame: Any, columns: list[str] | None = None) -> list[dict[str, Any]]:
    """A DataFrame as a list of JSON-ready rows."""
    if columns is not None:
        frame = frame[[c for c in columns if c in frame.columns]]
    return [_plain(r) for r in frame.to_dict(orient="records")]


def is_stdout(path: Path | str | None) -> bool:
    return path is not None and str(path) == "-"


def write_csv_out(frame: Any, out: Path) -> None:
    """A table as spreadsheet-safe CSV to a file, or to stdout when ``out`` is '-'."""
    from harmonize.export.safe_csv import write_safe_csv

    if is_stdout(out):
        import io

        buf = io.StringIO()
        write_safe_csv(frame, buf)
        sys.stdout.write(buf.getvalue())
        sys.stdout.flush()
    else:
        from harmonize.export.atomic import atomic_file

        with atomic_file(out) as tmp:  # all or nothing, like the exports
            write_safe_csv(frame, tmp)


# ------------------------------------------------------------------ logging
def configure_logging(verbose: int, quiet: bool) -> None:
    """The library logs through ``logging.getLogger(__name__)``; the CLI shows them on stderr."""
    level = logging.ERROR if quiet else (logging.WARNING, logging.INFO, logging.DEBUG)[min(verbose, 2)]
    logger = logging.getLogger("harmonize")
    for handler in list(logger.handlers):
        if getattr(handler, "_harmonize_cli", False):
            logger.removeHandler(handler)
    handler = logging.StreamHandler(sys.stderr)
    handler._harmonize_cli = True  # type: ignore[attr-defined]
    handler.setFormatter(logging.Formatter("%(levelname)s: %(message)s" if verbose < 2
                                           else "%(levelname)s %(name)s: %(message)s"))
    logger.addHandler(handler)
    logger.setLevel(level)
    logger.propagate = False
