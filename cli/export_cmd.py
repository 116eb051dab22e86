"""export: write the store as long, wide, grid, GeoPackage or Darwin Core Archive."""

from __future__ import annotations

from pathlib import Path

import typer
from harmonize.cli.console import console, fmt_int, study_from, warn_precise

from harmonize.export.metadata import CAUTION
from harmonize.export.run import EXPORTERS, export
from harmonize.export.selection import ExportFilters

_UNITS = {"long": "observation rows", "wide": "events", "grid": "rows", "gpkg": "event points",
          "dwca": "events"}


def register(app: typer.Typer) -> None:
    app.command("export")(export_cmd)


def export_cmd(
    ctx: typer.Context,
    fmt: str = typer.Argument(..., metavar="FORMAT", help=f"One of: {', '.join(EXPORTERS)}."),
    out: Path = typer.Argument(..., help="Output file (.parquet or .csv for long/wide/grid, .gpkg, .zip)."),
    kind: list[str] = typer.Option(None, "--kind", help="Source kind(s); repeat or comma-separate."),
    years: str | None = typer.Option(None, "--years", help="Season years, e.g. 2019-2021,2023."),
    seasons: str | None = typer.Option(None, "--seasons", help="Season names, comma-separated."),
    layers: str | None = typer.Option(None, "--layers", help="Depth layers, comma-separated."),
    variables: str | None = typer.Option(None, "--variables", help="Taxa or variables, comma-separated."),
    sources: str | None = typer.Option(None, "--sources", help="Source ids, comma-separated."),
    quantity: str = typer.Option("count", "--quantity", help="wide: count or biomass in the taxon columns."),
    by_life_stage: bool = typer.Option(False, "--by-life-stage", help="wide: one column per taxon and life stage."),
    generalise_deg: float | None = typer.Option(
        None, "--generalise-deg",
        help="Rounding (degrees) of events with a sensitive taxon (default: [confidentiality] generalise_deg, 0.1)."),
    fishing_aggregate: bool = typer.Option(
        False, "--fishing-aggregate",
        help="Sum fishing effort to coarser cells or whole season years until 3 vessels contribute "
             "(see docs/exports.md, What is withheld and why)."),
    precise: bool = typer.Option(
        False, "--precise",
        help="INTERNAL USE ONLY: include fishing rows of fewer than min_vessels vessels and exact positions of "
             "sensitive taxa; recorded in the export's provenance."),
    memory_limit: str | None = typer.Option(
        None, "--memory-limit",
        help="wide: DuckDB working memory, e.g. 4GB (default: HARMONIZE_EXPORT_MEMORY_LIMIT, else 2GB)."),
) -> None:
    """Export the store: long, wide, grid, gpkg or dwca, with the filters given."""
    if fmt not in EXPORTERS:
        console.print(f"unknown export format {fmt!r}; choose from {', '.join(EXPORTERS)}", markup=False)
        raise typer.Exit(2)
    study = study_from(ctx)
    if precise:
        warn_precise(study.min_vessels)
    filters = ExportFilters.build(",".join(kind) if kind else None, years, seasons, layers, variables, sources)
    options: dict[str, object] = {}
    if fmt == "wide":
        options = {"quantity": quantity, "by_life_stage": by_life_stage, "memory_limit": memory_limit}
    result = export(study, fmt, out, filters, precise=precise, fishing_aggregate=fishing_aggregate,
                    generalise_deg=generalise_deg, **options)
    console.print(f"wrote {fmt_int(result.rows)} {_UNITS[fmt]} to {result.path}", markup=False)
    for extra in result.files[1:]:
        console.print(f"metadata: {extra}", markup=False)
    for note in result.notes:
        console.print(f"note: {note}", markup=False)
    console.print(CAUTION, markup=False)
