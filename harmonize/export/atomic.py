"""All-or-nothing export files: written under a temporary name beside the target, renamed at the end.

One implementation for every file harmonize writes outside the store: the exports
(:func:`all_or_nothing`), the quarantine listing and the audit's files (:func:`atomic_file`).
An export killed, interrupted or stopped by a full disk leaves the earlier file (if any)
untouched: the new file replaces it only once complete (``os.replace`` within one folder is
atomic on POSIX file systems), and its sidecars (``<name>-metadata.json``) follow it. A
partial file is named ``.<name>.<token>.partial<suffix>`` and removed when the export fails in
the process; after a kill it stays behind, hidden, and is never mistaken for the export.
"""

from __future__ import annotations

import functools
import os
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import replace
from pathlib import Path
from typing import Any

from harmonize.errors import HarmonizeError
from harmonize.export.metadata import ExportResult
from harmonize.export.selection import prepare_target
from harmonize.files import fsync_dir, fsync_file, partial_path
from harmonize.study import Study


def refuse_store_target(study: Study, path: Path) -> None:
    """An export never writes into the store folder (it would overwrite the store's own files)."""
    store = Path(study.store_dir).resolve()
    if path.resolve().is_relative_to(store):
        raise HarmonizeError(f"{path}: an export cannot be written inside the store folder {store}; "
                             "choose a path outside store/")


def all_or_nothing(suffixes: Sequence[str]) -> Callable[[Callable[..., ExportResult]], Callable[..., ExportResult]]:
    """Decorate an export function ``fn(study, out, ...)`` so that it writes all or nothing.

    The function writes to a temporary path beside ``out`` (same suffix, so it picks the
    same format); on success the main file is synced and renamed onto ``out``, then each
    sidecar onto its own name; on an error the temporary files are removed.
    """
    def decorate(fn: Callable[..., ExportResult]) -> Callable[..., ExportResult]:
        @functools.wraps(fn)
        def export(study: Study, out: str | Path, *args: Any, **kwargs: Any) -> ExportResult:
            path = prepare_target(out, suffixes)
            refuse_store_target(study, path)
            tmp = partial_path(path)
            try:
                result = fn(study, tmp, *args, **kwargs)
                return _put_in_place(result, tmp, path)
            finally:
                for leftover in (tmp, tmp.with_name(tmp.name + "-metadata.json")):
                    leftover.unlink(missing_ok=True)
        return export
    return decorate


@contextmanager
def atomic_file(path: str | Path) -> Iterator[Path]:
    """Write one file all or nothing: yields a temporary path beside ``path`` to write to.

    When the block ends without an error, the file written there is synced and renamed onto
    ``path`` (an earlier file is replaced only now, by a complete one); on an error it is
    removed and ``path`` is untouched. The quarantine listing (``quarantine --csv``) and the
    audit's JSON and HTML go through here, the exports through :func:`all_or_nothing`.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = partial_path(path)
    try:
        try:
            yield tmp
        except OSError as exc:
            if exc.filename is None and exc.errno is not None:  # e.g. pandas' full disk at close
                raise OSError(exc.errno, exc.strerror or str(exc), str(path)) from exc
            raise
        if not tmp.is_file():
            raise HarmonizeError(f"internal error: nothing was written for {path.name}; please report this")
        _replace_durably(tmp, path)
        fsync_dir(path.parent)
    finally:
        tmp.unlink(missing_ok=True)


def _replace_durably(written: Path, target: Path) -> None:
    """The bytes of ``written`` on the disk, then ``written`` renamed onto ``target`` (atomic on POSIX)."""
    fsync_file(written)
    os.replace(written, target)


def _put_in_place(result: ExportResult, tmp: Path, path: Path) -> ExportResult:
    moved: list[Path] = []
    for written in result.files or [result.path]:
        written = Path(written)
        if not written.name.startswith(tmp.name):
            moved.append(written)   # not one of the temporary files (written in place by design)
            continue
        target = path.with_name(path.name + written.name[len(tmp.name):])
        _replace_durably(written, target)  # main file first: a sidecar never describes a file not there
        moved.append(target)
    fsync_dir(path.parent)
    if not moved or moved[0] != path:
        if not path.exists():
            raise HarmonizeError(f"internal error: the export did not write {path.name}; please report this")
    return replace(result, path=path, files=moved)
