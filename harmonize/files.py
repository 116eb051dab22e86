"""File content hashes and durable writes: fsync of files and folders before a commit relies on them."""

from __future__ import annotations

import hashlib
import os
import re
import uuid
from collections.abc import Iterator
from contextlib import contextmanager
from contextvars import ContextVar
from pathlib import Path

#: Bytes read at a time when hashing.
_BLOCK = 1 << 20


#: Digests already taken inside :func:`digests_known` (file identity -> sha256), so that an
#: ingest reads each input once for its hash, not once per step that records it.
_KNOWN: ContextVar[dict[tuple[int, ...], str] | None] = ContextVar("harmonize_known_digests", default=None)


def _identity(path: str | Path) -> tuple[int, ...]:
    st = os.stat(path)
    return (st.st_dev, st.st_ino, st.st_size, st.st_mtime_ns, st.st_ctime_ns)


@contextmanager
def digests_known() -> Iterator[None]:
    """Within the block, :func:`file_sha256` hashes a file once; a file changed meanwhile
    (another size, modification or change time) is hashed again."""
    token = _KNOWN.set({})
    try:
        yield
    finally:
        _KNOWN.reset(token)


def file_sha256(path: str | Path) -> str:
    """The sha256 of a file's bytes, as 64 hex digits (read in 1 MiB blocks)."""
    known = _KNOWN.get()
    if known is not None:
        key = _identity(path)
        if key not in known:
            known[key] = _sha256(path)
        return known[key]
    return _sha256(path)


def _sha256(path: str | Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(_BLOCK), b""):
            digest.update(block)
    return digest.hexdigest()


def file_digest(path: str | Path) -> tuple[str, int]:
    """(sha256, size in bytes) of a file, both from one read."""
    digest = hashlib.sha256()
    size = 0
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(_BLOCK), b""):
            digest.update(block)
            size += len(block)
    return digest.hexdigest(), size


def fsync_file(path: str | Path) -> None:
    """Ask the operating system to put a file's bytes on the disk before returning."""
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def fsync_dir(path: str | Path) -> None:
    """Make a folder's entries (files created, renamed into it) durable.

    On Linux a rename is durable only once the folder holding the new name is synced
    (fsync(2), "Calling fsync() does not necessarily ensure that the entry in the directory
    containing the file has also reached disk"). Systems that cannot open a folder skip it.
    """
    try:
        fd = os.open(path, os.O_RDONLY | getattr(os, "O_DIRECTORY", 0))
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass  # some file systems refuse fsync on folders; the file itself was synced
    finally:
        os.close(fd)


_PARTIAL = re.compile(r"^\.(?P<name>.+)\.[0-9a-f]{12}\.partial(?:\.[^.]+)?(?P<rest>-metadata\.json)?$")


def partial_path(path: Path) -> Path:
    """A fresh temporary name beside ``path`` for writing it all or nothing: ``.<name>.<token>.partial<suffix>``."""
    return path.with_name(f".{path.name}.{uuid.uuid4().hex[:12]}.partial{path.suffix}")


def public_name(path: Path) -> str:
    """The name a file written under :func:`partial_path` (or its sidecar) will have once complete."""
    m = _PARTIAL.match(path.name)
    return m.group("name") + (m.group("rest") or "") if m else path.name
