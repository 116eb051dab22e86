"""One entry point for every export format, and the exports the demo writes."""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import Any

from harmonize.disclosure import Disclosure
from harmonize.errors import HarmonizeError
from harmonize.export.dwca import export_dwca
from harmonize.export.gpkg import export_gpkg
from harmonize.export.grid import export_grid
from harmonize.export.long import export_long
from harmonize.export.metadata import ExportResult
from harmonize.export.selection import ExportFilters
from harmonize.export.wide import export_wide
from harmonize.study import Study

EXPORTERS: dict[str, Callable[..., ExportResult]] = {
    "long": export_long,
    "wide": export_wide,
    "grid": export_grid,
    "gpkg": export_gpkg,
    "dwca": export_dwca,
}
#: File names the demo writes, by format.
DEMO_FILES = {
    "long": "observations_long.parquet",
    "wide": "events_by_taxon.csv",
    "grid": "grid_summary.parquet",
    "gpkg": "coverage.gpkg",
    "dwca": "darwin_core_archive.zip",
}


def export(study: Study, fmt: str, out: str | Path, filters: ExportFilters | None = None, *,
           precise: bool = False, fishing_aggregate: bool = False, generalise_deg: float | None = None,
           **options: Any) -> ExportResult:
    """Write the export ``fmt`` (long, wide, grid, gpkg, dwca) of the study's store to ``out``.

    Every format passes the disclosure gate (:mod:`harmonize.disclosure`): ``precise`` turns
    it off (internal use only; logged and recorded in the provenance), ``fishing_aggregate``
    sums effort to coarser cells or periods until the rule of three holds, ``generalise_deg``
    overrides the study's rounding of events with a sensitive taxon. ``options`` go to the
    format's function (e.g. ``quantity="biomass"`` for wide).
    """
    try:
        fn = EXPORTERS[fmt]
    except KeyError:
        raise HarmonizeError(f"unknown export format {fmt!r}; choose from {', '.join(EXPORTERS)}") from None
    rules = Disclosure.for_study(study, precise=precise, fishing_aggregate=fishing_aggregate,
                                 generalise_deg=generalise_deg)
    return fn(study, out, filters or ExportFilters(), disclosure=rules, **options)


def demo_outputs(study: Study, out_dir: Path) -> dict[str, Path]:
    """Write every export of the demo into ``out_dir``; returns label -> path."""
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    written: dict[str, Path] = {}
    for fmt, name in DEMO_FILES.items():
        result = export(study, fmt, out_dir / name)
        written[f"export {fmt}"] = result.path
    return written
