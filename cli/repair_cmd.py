"""repair: take damaged ingests out of the live set, set unknown files aside, list what to ingest again."""

from __future__ import annotations

from typing import TYPE_CHECKING

import typer
from harmonize.cli.console import console, fmt_int, study_from

from harmonize.errors import one_line

if TYPE_CHECKING:
    from harmonize.repair import RepairPlan


def register(app: typer.Typer) -> None:
    app.command("repair", short_help="Take damaged ingests out of the store; say what to ingest again.")(repair_cmd)


def repair_cmd(
    ctx: typer.Context,
    apply: bool = typer.Option(False, "--apply", help="Act; without it, only say what would be done."),
    rebuild_manifest: bool = typer.Option(
        False, "--rebuild-manifest",
        help="When the store's database is lost or unreadable, rebuild it from the part files' metadata "
             "(refused files are moved to store/refused_parts/, never deleted)."),
) -> None:
    """Drop damaged ingests from the live set (marked damaged, never deleted) and rebuild the view.

    A dry run by default: exit 1 when something needs repair, 0 when nothing does.
    """
    from harmonize.repair import repair
    from harmonize.store import Store

    study = study_from(ctx)
    store = Store(study.store_dir)
    plan = repair(store, apply=apply, rebuild_manifest=rebuild_manifest)
    if plan.rebuild is not None:
        _report_rebuild(plan)
        return
    if not plan.needed:
        console.print("nothing to repair: every live file has its recorded size and checksum and reads to the end")
        return
    will = "" if plan.applied else "would be "
    if plan.gone_store:
        if plan.applied:
            console.print(f"the store folder is gone; its marker was renamed {plan.set_aside}: the next ingest "
                          "starts an empty store", markup=False)
            return
        console.print(one_line(store.lost() or ""), markup=False)
        console.print("nothing was changed; 'harmonize repair --apply' accepts the loss (the next ingest starts an "
                      "empty store)", markup=False)
        raise typer.Exit(1)
    if plan.lost_database:
        console.print(f"the store's database is lost; {fmt_int(len(plan.unlisted))} parquet file(s) remain, "
                      f"{will}set aside" + (f" in {plan.set_aside}" if plan.set_aside else "")
                      + (" and an empty database made" if plan.applied else ""), markup=False)
        if not plan.applied:
            console.print("or rebuild the database from the files' metadata: 'harmonize repair --rebuild-manifest'",
                          markup=False)
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


def _report_rebuild(plan: RepairPlan) -> None:
    """Say what a manifest rebuild found and did; exit 1 after a dry run that would act."""
    rb = plan.rebuild
    assert rb is not None
    if not rb.needed:
        console.print("nothing to rebuild: the store's database is readable (or there are no part files)", markup=False)
        return
    will = "" if plan.applied else "would be "
    console.print(f"the store's database {rb.database_problem}; {fmt_int(len(rb.ingests))} ingest(s) {will}rebuilt "
                  "from the part files' metadata", markup=False)
    for r in rb.ingests.itertuples():
        why = f": {r.damage_reason}" if isinstance(r.damage_reason, str) else ""
        console.print(f"  ingest {r.ingest_id} of {r.source_id}: {r.status}, {fmt_int(int(r.files))} file(s), "
                      f"{fmt_int(int(r.rows))} rows{one_line(why)}", markup=False)
    for rel, problem in rb.refused:
        console.print(f"refused: {one_line(rel)} {one_line(problem)}", markup=False)
    if rb.refused or (plan.applied and rb.refused_to is not None):
        where = f" to {rb.refused_to}" if rb.refused_to is not None else " to store/refused_parts/<time>/"
        console.print(f"{fmt_int(len(rb.refused))} refused file(s) {will}moved{where} (never deleted)", markup=False)
    console.print("the quarantine lived only in the database: ingest the files again with --replace to restore it",
                  markup=False)
    if not plan.applied:
        console.print("nothing was changed; run 'harmonize repair --rebuild-manifest --apply' to do this", markup=False)
        raise typer.Exit(1)
