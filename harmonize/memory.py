"""Freed memory handed back to the operating system between the stages of a large ingest."""

from __future__ import annotations

import ctypes
import ctypes.util
import functools
import sys
from typing import Any

import pyarrow as pa


def release_free_memory() -> None:
    """Return memory that is free but still held by the allocators to the operating system.

    Arrow's memory pool and glibc's ``malloc`` keep freed memory for later use. After the
    reading stage of a large ingest that is hundreds of MB which the writing stage, made of
    small blocks, never reuses: it would count in the peak of that stage. A no-op where
    ``malloc_trim`` (glibc) is not available.
    """
    pa.default_memory_pool().release_unused()
    libc = _libc()
    if libc is not None:
        libc.malloc_trim(0)


@functools.cache
def _libc() -> Any:
    if not sys.platform.startswith("linux"):
        return None
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
    except OSError:
        return None
    return libc if hasattr(libc, "malloc_trim") else None
