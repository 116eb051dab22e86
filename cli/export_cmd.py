"""export: write the store as long, wide, grid, GeoPackage or Darwin Core Archive."""

from __future__ import annotations

import shutil
import sys
import tempfile
from pathlib import Path
from typing import Literal

import typer
from harmonize.cli.console import (
    consoles,
    emit_json,
    err_console,
    fmt_int,
    is_stdout,
    json_option,
    say,
    study_from,
    study_option,
    warn_precise,
)

from harmonize.export import FORMATS

ExportFormat = Literal[FORMATS]  # type: ignore[valid-type]
Quantity = Literal["count", "biomass"]

_UNITS = {"long": "observation rows", "wide": "events", "grid": "rows", "gpkg": "sample points",
          "dwca": "events"}
#: The file written when OUT is '-' (then streamed to stdout): CSV for the tables.
_STDOUT_NAME = {"long": "export.csv", "wide": "export.csv", "grid": "export.csv", "gpkg": "export.gpkg",
                "dwca": "export.zip"}


def register(app: typer.Typer) -> None:
    app.command("export", short_help="Write the store for models, GIS or a data portal.")(export_cmd)


def export_cmd(
    ctx: typer.Context,
    fmt: ExportFormat = typer.Argument(..., metavar="FORMAT",
                              help="The export format."),
    out: Path = typer.Argument(..., metavar="OUT", help="Output file: .parquet or .csv for long, wide and grid; "
                               ".gpkg; .zip for dwca. '-' writes to stdout (CSV for the tables)."),
    kind: list[str] = typer.Option(None, "--kind", metavar="KIND[,KIND]", help="Source kind(s); repeat or comma-separate."),
    years: str | None = typer.Option(None, "--years", metavar="YEARS", help="Season years, e.g. 2019-2021,2023."),
    seasons: str | None = typer.Option(None, "--seasons", metavar="SEASON[,SEASON]", help="Season names."),
    layers: str | None = typer.Option(None, "--layers", metavar="LAYER[,LAYER]", help="Depth layers."),
    variables: str | None = typer.Option(None, "--variables", metavar="NAME[,NAME]", help="Taxa or variables."),
    sources: str | None = typer.Option(None, "--sources", metavar="SOURCE_ID[,SOURCE_ID]", help="Source ids."),
    quantity: Quantity = typer.Option("count", "--quantity",
                                 help="wide: the quantity in the taxon columns."),
    by_life_stage: bool = typer.Option(False, "--by-life-stage", help="wide: one column per taxon and life stage."),
    generalise_deg: float | None = typer.Option(
        None, "--generalise-deg", metavar="DEGREES",
        help="Rounding (degrees) of events with a sensitive taxon (default: [confidentiality] generalise_deg, 0.1)."),
    fishing_aggregate: bool = typer.Option(
        False, "--fishing-aggregate",
        help="Sum fishing effort to coarser cells or whole season years until 3 vessels contribute "
             "(see docs/exports.md, What is withheld and why)."),
    precise: bool = typer.Option(
        False, "--precise",
        help="INTERNAL USE ONLY: include fishing rows of fewer than min_vessels vessels and exact positions of "
             "sensitive taxa; recorded in the export's provenance."),
    taxon_level: str | None = typer.Option(
        None, "--taxon-level", metavar="RANK",
        help="long/wide/dwca: roll taxa up to their ancestor of this rank (taxa.csv rank/parent)."),
    consistent_taxa: bool = typer.Option(
        False, "--consistent-taxa",
        help="long/wide/dwca: roll each taxon up to the finest level recorded the same way in every selected "
             "year and source."),
    with_effort: bool = typer.Option(
        False, "--with-effort",
        help="dwca: also write the public fishing-effort cell-periods as events with their fishing hours."),
    gpkg_version: str | None = typer.Option(
        None, "--gpkg-version", metavar="VERSION",
        help="gpkg: GeoPackage version to write (1.2, 1.3 or 1.4; default 1.4); 1.2 opens without warning "
             "in older GIS tools."),
    memory_limit: str | None = typer.Option(
        None, "--memory-limit", metavar="SIZE",
        help="wide: DuckDB working memory, e.g. 4GB (default: HARMONIZE_EXPORT_MEMORY_LIMIT, else 2GB)."),
    study_dir: Path | None = study_option(),
    as_json: bool = json_option(),
) -> None:
    """Export the store with the filters given.

    Every export passes the disclosure gate (docs/exports.md, "What is withheld and why").

    \b
    Examples:
      harmonize export long obs.parquet --kind trawl,plankton --years 2019-2023
      harmonize export wide samples.csv --quantity biomass
      harmonize export wide samples.csv --consistent-taxa
      harmonize export grid effort.parquet --kind effort --fishing-aggregate
      harmonize export grid - --kind effort | head
      harmonize export dwca archive.zip --json
    """
    if as_json and is_stdout(out):
        raise typer.BadParameter("--json prints its document on stdout; give OUT as a file, not '-'")
    consoles.json = as_json or is_stdout(out)
    from harmonize.export.metadata import CAUTION
    from harmonize.export.run import export
    from harmonize.export.selection import ExportFilters

    study = study_from(ctx, study_dir)
    if precise:
        warn_precise(study.min_vessels)
    filters = ExportFilters.build(",".join(kind) if kind else None, years, seasons, layers, variables, sources,
                                  taxon_level=taxon_level, consistent_taxa=consistent_taxa)
    options: dict[str, object] = {"precise": precise, "fishing_aggregate": fishing_aggregate,
                                  "generalise_deg": generalise_deg}
    if fmt == "wide":
        options.update(quantity=quantity, by_life_stage=by_life_stage, memory_limit=memory_limit)
    if with_effort and fmt != "dwca":
        raise typer.BadParameter("--with-effort applies to the dwca format only")
    if gpkg_version is not None and fmt != "gpkg":
        raise typer.BadParameter("--gpkg-version applies to the gpkg format only")
    if fmt == "dwca":
        options.update(with_effort=with_effort)
    if fmt == "gpkg" and gpkg_version is not None:
        options.update(version=gpkg_version)
    if is_stdout(out):
        with tempfile.TemporaryDirectory(prefix="harmonize-export-") as tmp:
            result = export(study, fmt, Path(tmp) / _STDOUT_NAME[fmt], filters, **options)
            with open(result.path, "rb") as fh:
                shutil.copyfileobj(fh, sys.stdout.buffer)
            sys.stdout.flush()
        err_console.print(f"wrote {fmt_int(result.rows)} {_UNITS[fmt]} to stdout (the metadata sidecar is "
                          "written only beside a file)", markup=False)
        for note in result.notes:
            err_console.print(f"note: {note}", markup=False)
        return
    result = export(study, fmt, out, filters, **options)
    say(f"wrote {fmt_int(result.rows)} {_UNITS[fmt]} to {result.path}")
    for extra in result.files[1:]:
        say(f"metadata: {extra}")
    suppressed = result.metadata["confidentiality"].get("effort_rows_withheld", 0)
    rollup = result.metadata["counts"].get("taxon_rollup") or {}
    if rollup:
        rolled = rollup.get("rolled_into", {})
        say(f"taxa rolled up: {len(rolled)} into {len(set(rolled.values()))} "
            f"({', '.join(sorted(set(rolled.values()))) or 'none'}); "
            f"{fmt_int(rollup.get('values_left_out_incomplete', 0))} values left out because not every "
            "member was recorded at the event")
    for note in result.notes:
        say(f"note: {note}")
    say(CAUTION)
    if as_json:
        emit_json("export", {"study": study.name, "export_format": fmt, "path": str(result.path), "rows": result.rows,
                             "files": [str(f) for f in result.files], "notes": list(result.notes),
                             "rows_suppressed": suppressed, "metadata": result.metadata})
