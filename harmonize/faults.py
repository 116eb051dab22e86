"""Named fault-injection points: places on the commit path where a test makes the process fail.

The store calls :func:`point` at each named place; it does nothing unless a test has
installed an action there (:func:`install`, :func:`injected`). A crash-safety test runs
harmonize in a child process that installs :func:`kill` at one point, so that the process
dies there as it would on a power cut. Nothing is read from the environment.
"""

from __future__ import annotations

import os
import signal
from collections.abc import Callable, Iterator
from contextlib import contextmanager

#: The points on the commit path (harmonize.store.Store.commit), in the order they are passed.
POINTS = ("moving", "before_transaction", "events_without_values", "before_commit", "after_commit")

_ACTIONS: dict[str, Callable[[], None]] = {}


def point(name: str) -> None:
    """Run the action installed at ``name``, if any (called by the library)."""
    action = _ACTIONS.get(name)
    if action is not None:
        action()


def install(name: str, action: Callable[[], None]) -> None:
    """Run ``action`` whenever the library passes the point ``name`` (until :func:`remove`).

    Raises
    ------
    ValueError
        For a name that is not one of :data:`POINTS`.
    """
    if name not in POINTS:
        raise ValueError(f"no fault-injection point {name!r}; the points are {', '.join(POINTS)}")
    _ACTIONS[name] = action


def remove(name: str) -> None:
    """Take the action at ``name`` away (no-op when there is none)."""
    _ACTIONS.pop(name, None)


@contextmanager
def injected(name: str, action: Callable[[], None]) -> Iterator[None]:
    """Install ``action`` at ``name`` for the ``with`` block."""
    install(name, action)
    try:
        yield
    finally:
        remove(name)


def kill() -> None:
    """Kill this process at once (SIGKILL: no cleanup, no finally blocks), as a power cut would."""
    os.kill(os.getpid(), signal.SIGKILL)
