"""Execution engines for the heaviest steps: DuckDB on one machine (default) or Dask beyond it.

Two steps can run on Dask (dask.distributed): turning vessel pings into fishing hours per
cell, and the coverage audit's aggregations over the store. Everything else, and both steps
by default, runs in DuckDB. The engine is chosen per call (``run(..., engine="dask")``,
``audit(..., engine="dask")``, the CLI's ``--engine``) or for a whole run by the run's
settings (:mod:`harmonize.settings`; on the command line the environment variable
``HARMONIZE_ENGINE``, and ``HARMONIZE_DASK_SCHEDULER`` to point the Dask engine at a running
cluster). See docs/performance.md for when to switch.
"""

from __future__ import annotations

import os
from collections.abc import Iterator
from contextlib import contextmanager
from contextvars import ContextVar
from dataclasses import dataclass

from harmonize import settings
from harmonize.errors import HarmonizeError

#: The engines a step can run on. ``duckdb`` is built in; ``dask`` needs the ``dask`` extra.
ENGINES = ("duckdb", "dask")
#: Environment variable choosing the engine of a command-line run (read by the CLI only).
ENGINE_ENV = settings.ENVIRONMENT["engine"]
#: Environment variable naming a running Dask scheduler (e.g. ``tcp://scheduler-host:8786``).
SCHEDULER_ENV = settings.ENVIRONMENT["dask_scheduler"]
#: Environment variable naming a scratch folder that the Dask workers can read.
SCRATCH_ENV = settings.ENVIRONMENT["dask_scratch"]


@dataclass(frozen=True)
class EngineChoice:
    """The engine of the current step and, for Dask, the scheduler address (None = default)."""

    name: str = "duckdb"
    scheduler: str | None = None


_CURRENT: ContextVar[EngineChoice | None] = ContextVar("harmonize_engine", default=None)


def check_engine(engine: str | None) -> str:
    """The engine's name, checked; ``None`` means the run's setting (``HARMONIZE_ENGINE`` on the
    command line) or else ``duckdb``.

    Raises
    ------
    HarmonizeError
        For an unknown engine, or ``dask`` when Dask is not installed (naming the extra).
    """
    name = (engine or settings.current().engine or "duckdb").strip().lower()
    if name not in ENGINES:
        raise HarmonizeError(f"unknown engine {name!r}; choose one of {', '.join(ENGINES)}")
    if name == "dask":
        try:
            import dask.dataframe  # noqa: F401
            import distributed  # noqa: F401
        except ImportError:
            raise HarmonizeError(
                "the dask engine needs Dask and dask.distributed: install them with "
                "pip install 'harmonize[dask]'"
            ) from None
    return name


@contextmanager
def engine_scope(engine: str | None = None, scheduler: str | None = None) -> Iterator[EngineChoice]:
    """Run the steps inside the ``with`` block on ``engine`` (see :func:`check_engine`)."""
    choice = EngineChoice(check_engine(engine), scheduler)
    token = _CURRENT.set(choice)
    try:
        yield choice
    finally:
        _CURRENT.reset(token)


def current_engine() -> EngineChoice:
    """The engine chosen by the enclosing :func:`engine_scope`, else by the run's settings."""
    choice = _CURRENT.get()
    return choice if choice is not None else EngineChoice(check_engine(None), settings.current().dask_scheduler)


def scratch_parent() -> str | None:
    """The run's Dask scratch folder (``HARMONIZE_DASK_SCRATCH``; checked), or None for the system default.

    Raises
    ------
    HarmonizeError
        When the variable names something that is not an existing folder.
    """
    value = settings.current().dask_scratch
    if not value:
        return None
    if not os.path.isdir(value):
        raise HarmonizeError(f"{SCRATCH_ENV}={value} is not an existing folder; create it on a file system "
                             "every Dask worker can read, or unset the variable")
    return value
