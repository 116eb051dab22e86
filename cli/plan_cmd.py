"""plan: where N added samples would close the audit's coverage gaps most."""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING

import typer
from harmonize.cli.console import (
    CAUTION,
    console,
    consoles,
    emit_json,
    is_stdout,
    say,
    study_from,
    study_option,
    write_csv_out,
)

if TYPE_CHECKING:
    from harmonize.audit.plan import Plan


def register(app: typer.Typer) -> None:
    app.command("plan", short_help="Where N added samples would close coverage gaps most.")(plan_cmd)


def _split(text: str | None) -> list[str] | None:
    if text is None:
        return None
    return [x.strip() for x in text.split(",") if x.strip()] or None


def plan_cmd(
    ctx: typer.Context,
    kind: str = typer.Argument(..., help="Source kind of the added samples: a kind whose events are samples, e.g. trawl."),
    n: int = typer.Argument(..., help="How many samples to add."),
    season: str | None = typer.Option(None, "--season", metavar="SEASON[,SEASON]",
                                      help="Seasons whose samples count as existing (default: all)."),
    layer: str | None = typer.Option(None, "--layer", metavar="LAYER[,LAYER]",
                                     help="Depth layers whose samples count as existing (default: all)."),
    year: int | None = typer.Option(None, "--year", help="Reference season year (default: the latest with samples)."),
    stratum: str | None = typer.Option(None, "--stratum", metavar="NAME[,NAME]", help="Plan only in these strata."),
    depth_min: float | None = typer.Option(None, "--depth-min", help="Shallowest observed bottom depth of a cell (m)."),
    depth_max: float | None = typer.Option(None, "--depth-max", help="Deepest observed bottom depth of a cell (m)."),
    min_distance: float = typer.Option(0.0, "--min-distance", help="Minimum distance between added samples (km)."),
    keep: str | None = typer.Option(None, "--keep", metavar="CELL[,CELL]",
                                    help="Cells that must be in the plan (placed first, counted in N)."),
    seed: int = typer.Option(0, "--seed", help="Breaks exact ties; the same seed gives the same plan."),
    csv: Path | None = typer.Option(None, "--csv", metavar="OUT",
                                    help="Write the proposed stations to this CSV file ('-' for stdout)."),
    gpkg: Path | None = typer.Option(None, "--gpkg", metavar="OUT",
                                     help="Write stations, cells and coverage to this GeoPackage."),
    json_out: Path | None = typer.Option(None, "--json", metavar="[OUT]",
                                         help="Write the plan as JSON to OUT; '-' prints it on stdout and nothing else."),
    study_dir: Path | None = study_option(),
) -> None:
    """Where to sample next: the cells where N more samples would close the coverage gaps most.

    \b
    Examples:
      harmonize plan trawl 20 --season summer --csv stations.csv
      harmonize plan plankton 10 --stratum "Vossa Bank" --min-distance 30 --gpkg plan.gpkg
      harmonize plan trawl 5 --json -
    """
    import json

    from harmonize.audit.plan import plan_samples

    if is_stdout(csv) and is_stdout(json_out):
        raise typer.BadParameter("--csv and --json cannot both write to stdout")
    consoles.json = is_stdout(csv) or is_stdout(json_out)
    study = study_from(ctx, study_dir)
    depth = None if depth_min is None and depth_max is None else (depth_min, depth_max)
    plan = plan_samples(study, kind, n, seasons=_split(season), depth_layers=_split(layer), season_year=year,
                        strata=_split(stratum), depth_range_m=depth, min_distance_km=min_distance,
                        keep=_split(keep) or (), seed=seed)
    print_plan(plan)
    if csv is not None:
        if is_stdout(csv):
            # no sample anywhere yet: the distance to the nearest one is blank, not inf
            write_csv_out(plan.stations.replace([float("inf"), float("-inf")], float("nan")), csv)
        else:
            say(f"proposed stations written to {plan.write_csv(csv)}")
    if gpkg is not None:
        say(f"GeoPackage written to {plan.write_gpkg(gpkg, study)}")
    if json_out is not None:
        if is_stdout(json_out):
            emit_json("plan", plan.to_json_dict())
            return
        json_out.parent.mkdir(parents=True, exist_ok=True)
        json_out.write_text(json.dumps(plan.to_json_dict(), indent=2, ensure_ascii=False) + "\n", encoding="utf-8")
        say(f"plan JSON written to {json_out}")
    console.print(CAUTION, style="dim")


def print_plan(plan: Plan) -> None:
    """The plan as two tables: the stations, and coverage per stratum before and after."""
    from rich.table import Table

    r = plan.request
    console.print(f"plan: {len(plan.stations)} added {r.source_kind} samples in {', '.join(r.seasons)} "
                  f"({', '.join(r.depth_layers)}), against the samples of season year {r.season_year}", markup=False)
    t = Table(title="proposed stations (cell centres), in the order chosen", title_justify="left")
    for col in ("#", "cell", "stratum", "lon", "lat", "bottom m", "nearest sample km", "why"):
        t.add_column(col, justify="right" if col in ("#", "lon", "lat", "bottom m", "nearest sample km") else "left")
    for s in plan.stations.itertuples(index=False):
        depth = "" if s.bottom_depth_m != s.bottom_depth_m else f"{s.bottom_depth_m:.0f}"
        near = "-" if s.nearest_sample_km == float("inf") else f"{s.nearest_sample_km:.0f}"
        t.add_row(str(s.rank), s.cell_id, s.stratum, f"{s.lon:.3f}", f"{s.lat:.3f}", depth, near, s.reason)
    console.print(t)
    c = Table(title="cells sampled per stratum, before and after the plan", title_justify="left")
    for col in ("stratum", "domain cells", "area share", "before", "added", "after", "share before", "share after"):
        c.add_column(col, justify="left" if col == "stratum" else "right")
    for s in plan.strata.itertuples(index=False):
        c.add_row(s.stratum, str(s.domain_cells), f"{s.area_share:.0%}", str(s.cells_sampled_before), str(s.proposed),
                  str(s.cells_sampled_after), f"{s.share_sampled_before:.0%}", f"{s.share_sampled_after:.0%}")
    console.print(c)
    before, after = plan.coverage()
    console.print(f"share of the domain's cells sampled: {before:.1%} before, {after:.1%} after", markup=False)
    for note in plan.notes:
        console.print(f"note: {note}", markup=False)
    console.print(f"criterion: {plan.criterion} See docs/audit.md.", markup=False)
