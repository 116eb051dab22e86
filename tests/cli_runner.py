"""Run the harmonize command in this process through typer's test runner."""

from __future__ import annotations

from collections.abc import Mapping

from harmonize.cli.app import app
from typer.testing import CliRunner, Result


def run_cli(*args: str, env: Mapping[str, str] | None = None) -> Result:
    """``harmonize ARGS``: the result has exit_code, stdout and stderr apart."""
    return CliRunner().invoke(app, list(args), env=dict(env or {}), catch_exceptions=False)
