"""Error classes, warning class and the stable reason codes of the quarantine table."""

from __future__ import annotations

from enum import StrEnum


class ReasonCode(StrEnum):
    """Why an input row was rejected. Codes are stable: never reuse one for another meaning."""

    MISSING_VALUE = "missing_value"
    BAD_TYPE = "bad_type"
    OUT_OF_RANGE = "out_of_range"
    BAD_TIME = "bad_time"
    END_BEFORE_START = "end_before_start"
    OUTSIDE_DOMAIN = "outside_domain"
    UNKNOWN_TAXON = "unknown_taxon"
    ORPHAN_RECORD = "orphan_record"
    DUPLICATE_RECORD = "duplicate_record"
    BAD_EFFORT = "bad_effort"
    UNIT_MISMATCH = "unit_mismatch"
    IMPLAUSIBLE_SPEED = "implausible_speed"
    # added beyond the contract's first list
    REJECTED_EVENT = "rejected_event"
    FUTURE_TIME = "future_time"
    TIME_BACKWARDS = "time_backwards"  # no longer given (pings are sorted); kept: codes are never reused
    CLOGGED_NET = "clogged_net"
    UNKNOWN_GEAR = "unknown_gear"
    # an absence reported outside a complete checklist (opportunistic records)
    ABSENCE_OUTSIDE_CHECKLIST = "absence_outside_checklist"
    # a local time (no offset) at a clock change: it happens twice, or never (harmonize.clock)
    AMBIGUOUS_LOCAL_TIME = "ambiguous_local_time"
    NONEXISTENT_LOCAL_TIME = "nonexistent_local_time"


class HarmonizeError(Exception):
    """Base class of every error harmonize raises on purpose."""


class ConfigError(HarmonizeError):
    """The study or a profile is wrong: names the file, the key and what is expected."""

    def __init__(self, file: object, key: str | None, problem: str) -> None:
        self.file = str(file)
        self.key = key
        self.problem = problem
        where = f"{self.file}: {key}: " if key else f"{self.file}: "
        super().__init__(where + problem)


class InputFileError(HarmonizeError):
    """An input file cannot be read as a whole (missing column, encoding, empty, ...)."""

    def __init__(self, file: object, problem: str) -> None:
        self.file = str(file)
        self.problem = problem
        super().__init__(f"{self.file}: {problem}")


class AdapterNotFoundError(HarmonizeError):
    """No adapter is registered for a source kind."""


class StoreBusyError(HarmonizeError):
    """Another process holds the store."""


class StoreError(HarmonizeError):
    """The store is missing, from another version, or fails its integrity check."""


class DuplicateIngestError(HarmonizeError):
    """A file was already ingested under another configuration (use --replace)."""


class HarmonizeWarning(UserWarning):
    """Warnings harmonize emits itself (turned into errors in the test suite)."""


def one_line(text: str) -> str:
    """The text with its control characters (line breaks, NUL, bidi overrides) shown escaped."""
    return text if text.isprintable() else "".join(c if c.isprintable() else ascii(c)[1:-1] for c in text)


def short_text(value: object, limit: int = 60) -> str:
    """A cell as shown in a message: at most ``limit`` characters, on one line."""
    text = str(value)
    return one_line(text if len(text) <= limit else text[: limit - 3] + "...")


def failure_line(exc: BaseException) -> tuple[str, int] | None:
    """A one-line message and exit code for failures of the machine, not of harmonize.

    A full disk (exit 3) and a folder that cannot be written (exit 2), whether Python
    (``OSError``) or DuckDB ("No space left on device", "Permission denied", "Read-only file
    system" in its message) reports it; None for anything else.
    """
    import errno
    import re
    from pathlib import Path

    from harmonize.files import public_name

    text = str(exc)
    path = getattr(exc, "filename", None)
    if path is None:
        # DuckDB names the file in its message, with the quotes escaped when the message is
        # wrapped in JSON ('Async write failed ...: {"exception_message": "... file \\"x\\" ..."}')
        quoted = (re.search(r'[Ff]ile \\?"((?:[^"\\]|\\.)+?)\\?"', text)
                  or re.search(r'"(/[^"]+)"', text))
        path = quoted.group(1) if quoted else None
    if path:
        # a file written all or nothing is named by the name it was to have
        path = str(Path(path).with_name(public_name(Path(path))))
    where = f" at {path}" if path else ""
    code = getattr(exc, "errno", None)
    if code == errno.ENOSPC or "No space left on device" in text:
        return f"no space left on device{where}; the store is unchanged", 3
    if code in (errno.EROFS, errno.EACCES, errno.EPERM) or "Read-only file system" in text \
            or "Permission denied" in text:
        why = "read-only file system" if code == errno.EROFS or "Read-only" in text else "permission denied"
        return f"cannot write{where} ({why}); the store is unchanged", 2
    return None
