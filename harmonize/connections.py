"""DuckDB connections opened the one way: with the run's thread count when one is set.

Every DuckDB connection of the library is opened by :func:`connect`, so that the ``threads``
run setting (:mod:`harmonize.settings`, ``HARMONIZE_THREADS`` on the command line) caps the
threads of each one: on a laptop shared with other work, or where several harmonize processes
run side by side on few cores (a test run on two processes), one thread each avoids
oversubscribing the cores. Unset, DuckDB uses every core.
"""

from __future__ import annotations

import duckdb

from harmonize import settings
from harmonize.errors import HarmonizeError


def thread_count() -> int | None:
    """The ``threads`` setting as a number (None when unset); HarmonizeError when it is not one."""
    text = settings.current().threads
    if text is None:
        return None
    try:
        n = int(text)
    except ValueError:
        n = 0
    if n < 1:
        raise HarmonizeError(f"the threads setting ({settings.ENVIRONMENT['threads']}) must be a whole number of "
                          f"at least 1, not {text!r}")
    return n


def connect(database: str = ":memory:", read_only: bool = False) -> duckdb.DuckDBPyConnection:
    """A DuckDB connection to ``database`` (in memory by default), with the run's thread count."""
    n = thread_count()
    con = duckdb.connect(database, read_only=read_only)
    if n is not None:
        con.execute(f"SET threads = {n}")
    return con
