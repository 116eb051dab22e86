"""Build the Keldmar Sea demo: write the study, generate messy inputs, ingest, audit, export."""

from __future__ import annotations

import importlib
import re
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from harmonize.demo.sea import DemoInput, write_study
from harmonize.errors import HarmonizeError
from harmonize.ingest import IngestResult, run
from harmonize.study import load_study

#: Source kinds in the order the demo ingests them (agency surveys before volunteers, so
#: that volunteer twins of agency sightings are found).
DEMO_KINDS = ("trawl", "plankton", "transect", "gridded", "effort", "opportunistic")
DEFAULT_SEED = 20261201
#: The demo audits twice: before the files of this year arrive (the previous delivery's audit,
#: kept as JSON) and after, with a corrected file of an earlier year in between.
LATE_YEAR = 2023
#: The planted correction: the trawl provider re-delivers this year's catch with these weights
#: fixed (a decimal slip: they had been typed ten times too large).
CORRECTED_YEAR = 2022
CORRECTED_ROWS = 12
#: The planning example: added summer trawl hauls against the reduced survey of CORRECTED_YEAR.
PLAN_SAMPLES = 20


@dataclass
class DemoRun:
    """What the demo did, for the summary the CLI prints."""

    folder: Path
    ingests: list[tuple[DemoInput, IngestResult]] = field(default_factory=list)
    outputs: dict[str, Path] = field(default_factory=dict)
    skipped: list[str] = field(default_factory=list)
    findings: list[str] = field(default_factory=list)
    #: "Since the last audit" and the sampling plan, in a few lines each.
    planning: list[str] = field(default_factory=list)


def generators() -> dict[str, Callable[[Path, np.random.Generator], list[DemoInput]]]:
    """Demo generators of the source kinds that have one, in ingest order."""
    found = {}
    for kind in DEMO_KINDS:
        found[kind] = importlib.import_module(f"harmonize.demo.sources.{kind}").generate
    return found


def build_demo(folder: str | Path, seed: int = DEFAULT_SEED,
               progress: Callable[[str], None] | None = None) -> DemoRun:
    """Write the demo study into ``folder`` (which must be new or empty) and run everything."""
    folder = Path(folder).resolve()
    if folder.exists() and any(folder.iterdir()):
        raise HarmonizeError(f"{folder} exists and is not empty; the demo writes into a new folder")
    say = progress or (lambda _msg: None)
    write_study(folder)
    rng = np.random.default_rng(seed)
    planned: list[DemoInput] = []
    gens = generators()
    for kind, generate in gens.items():
        say(f"generating {kind} data")
        planned += generate(folder, np.random.default_rng(rng.integers(2**32)))
    result = DemoRun(folder, skipped=[k for k in DEMO_KINDS if k not in gens])
    study = load_study(folder)
    late = [item for item in planned if _is_late(item)]
    for item in [item for item in planned if not _is_late(item)]:
        _ingest(study, folder, item, result, say)
    previous = _audit_before(study, result, say) if late else None
    for item in late:
        _ingest(study, folder, item, result, say)
    correction = _corrected_delivery(folder, planned)
    if correction is not None:
        _ingest(study, folder, correction, result, say, replace=True)
    _run_optional(study, result, say, previous)
    return result


def _is_late(item: DemoInput) -> bool:
    """Files of LATE_YEAR alone (hauls_2023.csv; not a multi-year file such as tows_2018_2023.csv)."""
    return any(re.fullmatch(rf"[A-Za-z]+_{LATE_YEAR}\.csv", Path(p).name) for p in item.inputs.values())


def _ingest(study, folder: Path, item: DemoInput, result: DemoRun, say: Callable[[str], None],  # type: ignore[no-untyped-def]
            replace: bool = False) -> None:
    say(f"ingesting {item.description}")
    inputs = {role: folder / rel for role, rel in item.inputs.items()}
    result.ingests.append((item, run(study, folder / item.profile, inputs, replace=replace)))


def _audit_before(study, result: DemoRun, say: Callable[[str], None]) -> Path | None:  # type: ignore[no-untyped-def]
    """The previous delivery's audit (before the LATE_YEAR files), kept as JSON."""
    from harmonize.audit import run as audit

    say(f"auditing the store before the {LATE_YEAR} files")
    path = audit.audit(study).write_json(result.folder / "outputs" / f"audit_before_{LATE_YEAR}.json")
    result.outputs[f"previous audit (before the {LATE_YEAR} files)"] = path
    return path


def _corrected_delivery(folder: Path, planned: list[DemoInput]) -> DemoInput | None:
    """The trawl provider's corrected CORRECTED_YEAR files: CORRECTED_ROWS catch weights fixed."""
    import pandas as pd

    original = next((item for item in planned if item.inputs.get("records", "").endswith(f"catch_{CORRECTED_YEAR}.csv")), None)
    if original is None:
        return None
    # a re-delivery replaces the provider's file in place: the same path, new content, so that
    # `--replace` supersedes the earlier ingest (an ingest is its source, path and content)
    records = folder / original.inputs["records"]
    catch = pd.read_csv(records, dtype=str, keep_default_na=False)
    weights = pd.to_numeric(catch["catch_kg"], errors="coerce")
    rows = weights.index[weights.notna() & (weights > 1.0)][:CORRECTED_ROWS]
    catch.loc[rows, "catch_kg"] = (weights[rows] / 10).round(3).astype(str)
    catch.to_csv(records, index=False)
    inputs = dict(original.inputs)
    return DemoInput(original.profile, inputs,
                     f"bottom-trawl survey {CORRECTED_YEAR}, corrected delivery ({len(rows)} catch weights fixed)")


def _plan(study, result: DemoRun, say: Callable[[str], None]):  # type: ignore[no-untyped-def]
    """Where PLAN_SAMPLES added summer trawl hauls would help most, against the CORRECTED_YEAR survey."""
    from harmonize.audit import plan as planning

    say("planning added samples")
    plan = planning.plan_samples(study, "trawl", PLAN_SAMPLES, seasons=["summer"], depth_layers=["near_bottom"],
                                 season_year=CORRECTED_YEAR, min_distance_km=30.0)
    out = result.folder / "outputs"
    result.outputs["sampling plan (CSV)"] = plan.write_csv(out / "plan_trawl_summer.csv")
    result.outputs["sampling plan (GeoPackage)"] = plan.write_gpkg(out / "plan_trawl_summer.gpkg", study)
    added = plan.stations["stratum"].value_counts()
    st = plan.strata.set_index("stratum")
    where = ", ".join(f"{n} in {name} ({int(st.at[name, 'cells_sampled_before'])} cells sampled in {CORRECTED_YEAR})"
                      for name, n in added.items())
    before, after = plan.coverage()
    result.planning.append(
        f"plan: {len(plan.stations)} added summer trawl hauls against the {CORRECTED_YEAR} survey go {where}; "
        f"share of the domain's cells sampled {before:.1%} -> {after:.1%} "
        f"(harmonize --study {result.folder} plan trawl {PLAN_SAMPLES} --season summer --layer near_bottom "
        f"--year {CORRECTED_YEAR} --min-distance 30; map: 'Where {PLAN_SAMPLES} more samples would help most' "
        "in the audit report)")
    return plan


def _run_optional(study, result: DemoRun, say: Callable[[str], None],  # type: ignore[no-untyped-def]
                  previous: Path | None = None) -> None:
    """Audit (compared with ``previous``), report and exports."""
    from harmonize.audit import run as audit
    from harmonize.export import run as export

    say("auditing coverage")
    audited = audit.audit(study, since=previous)
    if audited.since is not None:
        _since_lines(audited.since, result)
    audited.plan = _plan(study, result, say)
    result.outputs.update(audit.demo_outputs(study, result.folder / "outputs", audited))
    counts = audited.counts()
    result.findings.append(
        "audit: " + ", ".join(f"{n} {sev}{'s' if n != 1 else ''}" for sev, n in counts.items() if n)
    )
    order = {"error": 0, "warning": 1, "info": 2}
    top = sorted(audited.findings, key=lambda f: order.get(f.severity, 3))[:3]
    result.findings += [f"[{f.severity}] {f.code}: {f.message}" for f in top]
    if len(audited.findings) > len(top):
        result.findings.append(f"... and {len(audited.findings) - len(top)} more findings in the audit report")
    say("writing exports")
    result.outputs.update(export.demo_outputs(study, result.folder / "outputs"))


def _since_lines(since, result: DemoRun) -> None:  # type: ignore[no-untyped-def]
    c = since.counts()
    result.planning.append(
        f"since the audit before the {LATE_YEAR} files: {len(since.ingests_added)} ingests added, "
        f"{len(since.ingests_superseded)} superseded by a corrected file; findings {c['new']} new, "
        f"{c['resolved']} resolved, {c['severity changed']} with another severity "
        f"(see 'Since the last audit' at the top of {result.folder / 'outputs' / 'audit.html'})")
    for r in since.effects[since.effects["revises_earlier_year"]].itertuples(index=False):
        n = "some" if r.values_changed is None or r.values_changed != r.values_changed else f"{int(r.values_changed):,}"
        result.planning.append(f"  corrected {r.file_name} ({r.source_id}) changed {n} values in season year "
                               f"{r.season_year}, which the previous audit had seen")
