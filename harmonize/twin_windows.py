"""The twin windows of a volunteer source: the ``[duplicates]`` section of its profile.

Read by the adapters whose kind finds twins (``Adapter.finds_twins``) and by the pipeline,
which hands them to the store's commit hook of :mod:`harmonize.twins` through
:attr:`harmonize.store.IngestRecord.hook_data` (key :data:`HOOK_NAME`).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from harmonize.errors import ConfigError

#: The key of the twin windows in :attr:`harmonize.store.IngestRecord.hook_data`.
HOOK_NAME = "twins"
#: Default windows (common practice).
DEFAULT_DISTANCE_KM = 2.0
DEFAULT_MINUTES = 60.0
#: Windows above these are refused: they would link unrelated sightings (common practice).
MAX_DISTANCE_KM = 50.0
MAX_MINUTES = 7 * 24 * 60.0


@dataclass(frozen=True)
class TwinSettings:
    """The twin windows of one opportunistic source (profile ``[duplicates]``)."""

    distance_km: float = DEFAULT_DISTANCE_KM
    minutes: float = DEFAULT_MINUTES
    rank: int | None = None


def twin_settings(section: Mapping[str, Any], path: str | Path) -> TwinSettings:
    """The validated ``[duplicates]`` section (``section``) of the profile at ``path``, whose
    kind finds twins (``Adapter.finds_twins``: volunteer records).

    Raises
    ------
    ConfigError
        A value that is not a positive number, or a window above the maximum.
    """
    sec = section  # its keys are checked by the profile's definition (harmonize.config_spec)
    values: dict[str, float] = {}
    for key, default, top in (("distance_km", DEFAULT_DISTANCE_KM, MAX_DISTANCE_KM),
                              ("minutes", DEFAULT_MINUTES, MAX_MINUTES)):
        value = sec.get(key, default)
        if isinstance(value, bool) or not isinstance(value, int | float) or not 0 < value <= top:
            raise ConfigError(path, f"duplicates.{key}", f"expected a number above 0 and at most {top:g}, got {value!r}")
        values[key] = float(value)
    rank = sec.get("rank")
    if rank is not None and (isinstance(rank, bool) or not isinstance(rank, int) or rank < 0):
        raise ConfigError(path, "duplicates.rank", f"expected a whole number 0 or more (0 = kept first), got {rank!r}")
    return TwinSettings(values["distance_km"], values["minutes"], rank)
