"""Interrupts (SIGINT, SIGTERM) that stop work cleanly: DuckDB queries are interrupted through
their connection, and the store's commit finishes (or rolls back) before the interrupt is raised.

The command line installs the handlers (:func:`installed`); the library only registers its
open connections (:func:`track`) and marks the sections an interrupt must not cut
(:func:`deferred`). Without the handlers both are harmless.
"""

from __future__ import annotations

import signal
import threading
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

_lock = threading.Lock()
_connections: set[Any] = set()
_deferring = 0
_pending: int | None = None
_committed = False


class Interrupted(BaseException):
    """Raised in the main thread when SIGINT or SIGTERM arrives.

    Not a KeyboardInterrupt, which command-line frameworks turn into "Aborted!" and exit 1.

    ``committed`` is True when the interrupt arrived during a section that then completed
    (the store was changed: an ingest committed before the interrupt was raised).
    """

    def __init__(self, signum: int, committed: bool = False) -> None:
        super().__init__(signal.Signals(signum).name)
        self.signum = signum
        self.committed = committed

    @property
    def exit_code(self) -> int:
        """128 + the signal number, as shells report a process ended by it (130, 143)."""
        return 128 + self.signum


@contextmanager
def installed() -> Iterator[None]:
    """Handle SIGINT and SIGTERM in this process (main thread only) while inside; then restore."""
    global _pending, _committed
    _pending = None
    _committed = False
    previous = {signum: signal.signal(signum, _handle) for signum in (signal.SIGINT, signal.SIGTERM)}
    try:
        yield
    finally:
        for signum, handler in previous.items():
            signal.signal(signum, handler)


def install_for_process() -> None:
    """Handle SIGINT and SIGTERM for the rest of this process (the command line's whole run)."""
    global _pending, _committed
    _pending = None
    _committed = False
    for signum in (signal.SIGINT, signal.SIGTERM):
        signal.signal(signum, _handle)


def finishing() -> None:
    """The process is ending with its own result: a signal from now on is ignored.

    SIG_IGN, not a handler: Python's finalisation puts every signal that has a Python handler
    back to the default action, which would kill a process that has already finished its work
    (exit -15 instead of its own code); an ignored signal stays ignored.
    """
    for signum in (signal.SIGINT, signal.SIGTERM):
        signal.signal(signum, signal.SIG_IGN)


def received() -> int | None:
    """The signal received so far (None when none)."""
    return _pending


def _handle(signum: int, frame: object) -> None:
    global _pending
    _pending = signum
    if _deferring:
        return  # raised when the section ends (see deferred)
    with _lock:
        connections = list(_connections)
    for con in connections:  # stop running queries; they raise, and the work unwinds
        try:
            con.interrupt()
        except Exception:  # noqa: BLE001 - a closed connection has nothing to stop
            pass
    raise Interrupted(signum, committed=_committed)


def track(con: Any) -> None:
    """Register an open DuckDB connection: an interrupt stops its queries."""
    with _lock:
        _connections.add(con)


def untrack(con: Any) -> None:
    with _lock:
        _connections.discard(con)


@contextmanager
def deferred() -> Iterator[None]:
    """A section an interrupt must not cut (a commit): the interrupt is raised when it ends.

    Once such a section has completed, the store has changed: a later interrupt (during the
    steps after a commit) says so too (``Interrupted.committed``, :func:`committed`).
    """
    global _deferring, _committed
    _deferring += 1
    try:
        yield
    except BaseException:
        _deferring -= 1
        raise
    _deferring -= 1
    _committed = True
    if not _deferring and _pending is not None:
        raise Interrupted(_pending, committed=True)


@contextmanager
def shielded() -> Iterator[None]:
    """A section an interrupt must not cut that changes nothing: the interrupt is raised when
    it ends.

    Loading a compiled library is one: DuckDB's module builds Python enums while it
    initialises, and an exception raised there by the handler aborts the whole process
    (SIGABRT) instead of ending the command with 130 or 143.
    """
    global _deferring
    _deferring += 1
    try:
        yield
    finally:
        _deferring -= 1
    if not _deferring and _pending is not None:
        raise Interrupted(_pending, committed=_committed)


def committed() -> bool:
    """True once a deferred section (a commit) completed since :func:`installed`."""
    return _committed
