"""Operating-system file locks (flock): held by a process, released by the kernel when it dies.

A lock taken with ``fcntl.flock`` belongs to the open file, not to a process id, so it holds
across PID namespaces (two containers sharing a study folder) and vanishes with its holder,
however that holder ends (flock(2)). The holder writes its process id and host name into the
file for messages only; nothing decides on them.
"""

from __future__ import annotations

import fcntl
import os
import socket
import time
from pathlib import Path


class FileLock:
    """An exclusive lock on one file (created when missing)."""

    def __init__(self, path: str | Path) -> None:
        self.path = Path(path)
        self._fd: int | None = None

    @property
    def held(self) -> bool:
        return self._fd is not None

    def try_acquire(self) -> bool:
        """Take the lock if it is free now; False when another open file holds it."""
        if self._fd is not None:
            return True
        while True:
            fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except BlockingIOError:
                os.close(fd)
                return False
            except BaseException:
                os.close(fd)
                raise
            # the file may have been removed (by the holder we waited for) between our open
            # and our flock: a lock on a removed file protects nothing, so open it again
            try:
                now = os.stat(self.path)
            except FileNotFoundError:
                now = None
            held = os.fstat(fd)
            if now is not None and (now.st_dev, now.st_ino) == (held.st_dev, held.st_ino):
                break
            os.close(fd)
        self._fd = fd
        try:  # who holds it, for messages (best effort)
            os.ftruncate(fd, 0)
            os.write(fd, f"{os.getpid()} {socket.gethostname()}\n".encode())
        except OSError:
            pass
        return True

    def acquire(self, timeout_s: float) -> bool:
        """Wait up to ``timeout_s`` seconds for the lock; False when it stayed taken."""
        deadline = time.monotonic() + timeout_s
        delay = 0.02
        while not self.try_acquire():
            if time.monotonic() >= deadline:
                return False
            time.sleep(delay)
            delay = min(delay * 2, 0.5)
        return True

    def holder(self) -> str:
        """'PID n on host h' as the holder wrote it, or '' when unknown."""
        try:
            text = self.path.read_text().split()
        except OSError:
            return ""
        if len(text) >= 2:
            return f"PID {text[0]} on {text[1]}"
        return f"PID {text[0]}" if text else ""

    def release(self) -> None:
        if self._fd is not None:
            try:
                fcntl.flock(self._fd, fcntl.LOCK_UN)
            finally:
                os.close(self._fd)
                self._fd = None


def is_free(path: str | Path) -> bool:
    """Whether nobody holds the lock on ``path`` now (a missing file is free)."""
    if not Path(path).exists():
        return True
    probe = FileLock(path)
    if probe.try_acquire():
        probe.release()
        return True
    return False
