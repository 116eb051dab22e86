"""repair: take damaged ingests out of the live set, set unknown files aside, list what to ingest again."""

from __future__ import annotations

import typer
from harmonize.cli.console import console, fmt_int, study_from

from harmonize.errors import one_line


def register(app: typer.Typer) -> None:
    app.command("repair", short_help="Take damaged ingests out of the store; say what to ingest again.")(repair_cmd)


def repair_cmd(
    ctx: typer.Context,
    apply: bool = typer.Option(False, "--apply", help="Act; without it, only say what would be done."),
) -> None:
    """Drop damaged ingests from the live set (marked damaged, never deleted) and rebuild the view.

    A dry run by default: exit 1 when something needs repair, 0 when nothing does.
    """
    from harmonize.repair import repair
    from harmonize.store import Store

    study = study_from(ctx)
    plan = repair(Store(study.store_dir), apply=apply)
    if not plan.needed:
        console.print("nothing to repair: every live file has its recorded size and checksum and reads to the end")
        return
    will = "" if plan.applied else "would be "
    if plan.lost_database:
        console.print(f"the store's database is lost; {fmt_int(len(plan.unlisted))} parquet file(s) remain, "
                      f"{will}set aside" + (f" in {plan.set_aside}" if plan.set_aside else "")
                      + (" and an empty database made" if plan.applied else ""), markup=False)
    for d in plan.damage:
        console.print(f"damaged: {one_line(str(d))}", markup=False)
    if len(plan.ingests) and not plan.lost_database:
        console.print(f"{fmt_int(len(plan.ingests))} ingest(s) {will}marked damaged; their rows "
                      f"{'have left' if plan.applied else 'would leave'} the observations view", markup=False)
    if plan.unlisted and not plan.lost_database:
        console.print(f"{fmt_int(len(plan.unlisted))} parquet file(s) that no ingest lists {will}set aside"
                      + (f" in {plan.set_aside}" if plan.set_aside else "") + ":", markup=False)
        for rel in plan.unlisted[:20]:
            console.print(f"  {one_line(rel)}", markup=False)
    again = plan.to_ingest_again()
    if again:
        console.print("ingest these again:", markup=False)
        for line in again:
            console.print(f"  {one_line(line)}", markup=False)
    if not plan.applied:
        console.print("nothing was changed; run 'harmonize repair --apply' to do this", markup=False)
        raise typer.Exit(1)
