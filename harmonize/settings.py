"""Run settings that an application sets at its boundary (the CLI, a script), never read deep inside.

The library reads no environment variable. The command line reads the ``HARMONIZE_*``
variables once, when a command starts (:func:`from_environment`), and runs the command
inside :func:`applied`; a script does the same, or passes the values as arguments. The
settings live in a context variable, so a setting applies to the ``with`` block (and the
threads it starts with a copied context) and is undone when the block ends: nothing
process-wide is changed.
"""

from __future__ import annotations

from collections.abc import Iterator, Mapping
from contextlib import contextmanager
from contextvars import ContextVar
from dataclasses import dataclass, fields

#: The environment variable behind each setting (read by :func:`from_environment` only).
ENVIRONMENT = {
    "engine": "HARMONIZE_ENGINE",
    "dask_scheduler": "HARMONIZE_DASK_SCHEDULER",
    "dask_scratch": "HARMONIZE_DASK_SCRATCH",
    "export_memory_limit": "HARMONIZE_EXPORT_MEMORY_LIMIT",
    "wide_run_rows": "HARMONIZE_WIDE_RUN_ROWS",
    "lock_timeout_s": "HARMONIZE_LOCK_TIMEOUT",
    "threads": "HARMONIZE_THREADS",
}


@dataclass(frozen=True)
class Settings:
    """Defaults of a run, as text (each is checked where it is used; None = the built-in default).

    Attributes
    ----------
    engine
        Engine of the heavy steps (``duckdb`` or ``dask``; :mod:`harmonize.engines`).
    dask_scheduler
        Address of a running Dask scheduler.
    dask_scratch
        A folder every Dask worker can read, for the ping stage's buckets.
    export_memory_limit
        DuckDB's memory limit in exports (``"2GB"``).
    wide_run_rows
        Sample rows per run of the wide export's pivot.
    lock_timeout_s
        Seconds to wait for another process to release the store.
    threads
        Threads of each DuckDB connection (:mod:`harmonize.connections`; unset: every core).
    """

    engine: str | None = None
    dask_scheduler: str | None = None
    dask_scratch: str | None = None
    export_memory_limit: str | None = None
    wide_run_rows: str | None = None
    lock_timeout_s: str | None = None
    threads: str | None = None


_DEFAULTS = Settings()
_CURRENT: ContextVar[Settings | None] = ContextVar("harmonize_settings", default=None)


def from_environment(environ: Mapping[str, str]) -> Settings:
    """Settings from a mapping of environment variables (the caller passes ``os.environ``).

    Empty values count as unset.
    """
    values = {f.name: (environ.get(ENVIRONMENT[f.name]) or "").strip() or None for f in fields(Settings)}
    return Settings(**values)


def current() -> Settings:
    """The settings of the enclosing :func:`applied` block (built-in defaults outside one)."""
    return _CURRENT.get() or _DEFAULTS


@contextmanager
def applied(settings: Settings) -> Iterator[Settings]:
    """Run the ``with`` block under ``settings``; the previous ones are back afterwards."""
    token = _CURRENT.set(settings)
    try:
        yield settings
    finally:
        _CURRENT.reset(token)
