"""Run the harmonize command in this process through typer's test runner."""

from __future__ import annotations

from collections.abc import Mapping

from harmonize.cli.app import app
from typer.testing import CliRunner, Result


def run_cli(*args: str, env: Mapping[str, str] | None = None) -> Result:
    """``harmonize ARGS``: the result has exit_code, stdout and stderr apart."""
    return CliRunner().invoke(app, list(args), env=dict(env or {}), catch_exceptions=False)


def cli(capsys: object, *args: str) -> tuple[int, str, str]:
    """``harmonize ARGS`` as (exit code, stdout, stderr); ``capsys`` is accepted and unused."""
    result = run_cli(*args)
    return result.exit_code, result.stdout, result.stderr
