"""Build the Keldmar Sea demo: write the study, generate messy inputs, ingest, audit, export."""

from __future__ import annotations

import importlib
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


@dataclass
class DemoRun:
    """What the demo did, for the summary the CLI prints."""

    folder: Path
    ingests: list[tuple[DemoInput, IngestResult]] = field(default_factory=list)
    outputs: dict[str, Path] = field(default_factory=dict)
    skipped: list[str] = field(default_factory=list)
    findings: list[str] = field(default_factory=list)


def generators() -> dict[str, Callable[[Path, np.random.Generator], list[DemoInput]]]:
    """Demo generators of the source kinds that have one, in ingest order."""
    found = {}
    for kind in DEMO_KINDS:
        try:
            module = importlib.import_module(f"harmonize.demo.sources.{kind}")
        except ModuleNotFoundError as exc:
            if exc.name != f"harmonize.demo.sources.{kind}":
                raise
            continue
        found[kind] = module.generate
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
    for item in planned:
        say(f"ingesting {item.description}")
        inputs = {role: folder / rel for role, rel in item.inputs.items()}
        result.ingests.append((item, run(study, folder / item.profile, inputs)))
    _run_optional(study, result, say)
    return result


def _run_optional(study, result: DemoRun, say: Callable[[str], None]) -> None:  # type: ignore[no-untyped-def]
    """Audit, report and exports, for the capabilities that are installed."""
    try:
        audit = importlib.import_module("harmonize.audit.run")
    except ModuleNotFoundError:
        audit = None
    if audit is not None:
        say("auditing coverage")
        audited = audit.audit(study)
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
    try:
        export = importlib.import_module("harmonize.export.run")
    except ModuleNotFoundError:
        export = None
    if export is not None:
        say("writing exports")
        result.outputs.update(export.demo_outputs(study, result.folder / "outputs"))
