"""Positions against the study domain: outside_domain rejections and the swapped-coordinates note."""

from __future__ import annotations

import numpy as np

from harmonize.errors import ReasonCode
from harmonize.reading.quarantine import Rejections
from harmonize.study import Study
from harmonize.tagging import inside_domain, normalise_lon


def reject_outside_domain(
    study: Study,
    lon: np.ndarray,
    lat: np.ndarray,
    positions: np.ndarray,
    role: str,
    rejections: Rejections,
    what: str = "position",
) -> np.ndarray:
    """Quarantine rows whose point lies outside the study domain; returns the inside mask."""
    lon = normalise_lon(lon)
    inside = inside_domain(study.domain, lon, lat)
    out = ~inside
    if out.any():
        rejections.add(
            role, positions[out], ReasonCode.OUTSIDE_DOMAIN,
            [f"{what} ({la:.4f}, {lo:.4f}) lies outside the study domain"
             for la, lo in zip(lat[out], lon[out], strict=True)],
        )
    return inside


def reject_live_outside(
    study: Study, lon: np.ndarray, lat: np.ndarray, alive: np.ndarray, rejections: Rejections,
    what: str = "position", role: str = "events",
) -> np.ndarray:
    """Quarantine the rows still alive whose (finite) point lies outside the study domain.

    Returns the rows of ``role`` that no rejection has hit so far.
    """
    pos = np.arange(len(lon))
    checkable = alive & np.isfinite(lon) & np.isfinite(lat)
    reject_outside_domain(study, lon[checkable], lat[checkable], pos[checkable], role, rejections, what)
    return ~rejections.mask(role, len(lon))


def swapped_positions(study: Study, lat: np.ndarray, lon: np.ndarray) -> int:
    """How many positions lie outside the domain (or off the globe) but inside it once swapped.

    Only such positions suggest that a file's latitude and longitude columns are swapped; a
    vessel in port or at anchor outside the domain does not.
    """
    lat = np.asarray(lat, dtype=float)
    lon = np.asarray(lon, dtype=float)
    ok = np.isfinite(lat) & np.isfinite(lon)

    def inside(la: np.ndarray, lo: np.ndarray) -> np.ndarray:
        valid = ok & (np.abs(la) <= 90) & (lo >= -180) & (lo <= 360)
        hit = np.zeros(la.shape, dtype=bool)
        if valid.any():
            hit[valid] = inside_domain(study.domain, normalise_lon(lo[valid]), la[valid])
        return hit

    return int((inside(lon, lat) & ~inside(lat, lon)).sum())


def swapped_position_notes(study: Study, positions: list[tuple[str, np.ndarray, np.ndarray]]) -> list[str]:
    """One note per file whose positions would fall inside the domain with latitude and longitude swapped."""
    counts: dict[str, int] = {}
    for file_name, lat, lon in positions:
        counts[file_name] = counts.get(file_name, 0) + swapped_positions(study, lat, lon)
    return [f"{name}: {n:,} position{'s lie' if n != 1 else ' lies'} outside the study domain but would lie inside "
            "it with latitude and longitude swapped; check which columns the profile maps to the latitude "
            "and longitude fields" for name, n in counts.items() if n]
