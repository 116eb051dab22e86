"""A Python API over the library that mirrors the CLI, for scripts and notebooks.

Example
-------
>>> import harmonize.api as hz                                    # doctest: +SKIP
>>> s = hz.open_study("my-study")
>>> s.ingest("trawl_agency", events="hauls.csv", records="catch.csv")
>>> s.status()["ingests"]
>>> df = s.observations(kinds="trawl", years="2019-2021", seasons="summer")
>>> s.export("wide", "outputs/events_by_taxon.parquet", kinds="trawl")
>>> s.audit().findings                       # when the audit is installed
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pandas as pd

from harmonize.adapters.registry import kinds as adapter_kinds
from harmonize.disclosure import Disclosure, public_quarantine_rows
from harmonize.errors import HarmonizeError
from harmonize.export.grid import read_grid
from harmonize.export.long import read_long
from harmonize.export.metadata import ExportResult
from harmonize.export.run import EXPORTERS, export
from harmonize.export.selection import ExportFilters
from harmonize.export.wide import read_wide
from harmonize.ingest import IngestResult, assign_inputs, prepare, run
from harmonize.store import Store
from harmonize.study import Study, load_study

Names = Iterable[str] | str | None


@dataclass
class StoreStatus:
    """What the store holds: its ingests and observation rows by kind, year, season and layer.

    ``events_without_values`` holds the accepted events that yield no observation row (an
    empty haul under a profile without a zero-filling protocol, a segment whose bird rows
    were all quarantined), one row per event (see :meth:`harmonize.store.Store.events_without_values`).
    """

    ingests: pd.DataFrame
    summary: pd.DataFrame
    problems: list[str] = field(default_factory=list)
    events_without_values: pd.DataFrame = field(default_factory=pd.DataFrame)

    def __getitem__(self, key: str) -> Any:
        return getattr(self, key)


class StudyHandle:
    """An open study: the Python counterpart of ``harmonize --study DIR VERB``.

    Parameters
    ----------
    study
        The loaded study (see :func:`open_study`).
    """

    def __init__(self, study: Study) -> None:
        self.study = study
        self.store = Store(study.store_dir)

    def __repr__(self) -> str:
        return f"StudyHandle({self.study.name!r} at {self.study.root})"

    @property
    def root(self) -> Path:
        return self.study.root

    # ------------------------------------------------------------------ check and ingest
    def _inputs(self, profile: str | Path, files: Sequence[str | Path] | str | Path, events: str | Path | None,
                records: str | Path | None) -> list[dict[str, Path]]:
        adapter, prof = prepare(self.study, profile)
        if isinstance(files, str | Path):
            files = [files]
        resolved = [self._path(f) for f in files]
        return assign_inputs(adapter, prof, resolved, self._path(events) if events else None,
                             self._path(records) if records else None)

    def _path(self, p: str | Path) -> Path:
        path = Path(p)
        return path if path.is_absolute() else (self.study.root / path if not path.exists() else path.resolve())

    def check(self, profile: str | Path, files: Sequence[str | Path] | str | Path = (), *,
              events: str | Path | None = None, records: str | Path | None = None) -> list[IngestResult]:
        """Validate input files against a profile without writing (``harmonize check``).

        Relative paths are taken from the current folder, else from the study folder.
        Returns one result per ingest unit with the row accounting and the quarantine rows.
        """
        return [run(self.study, profile, i, write=False) for i in self._inputs(profile, files, events, records)]

    def ingest(self, profile: str | Path, files: Sequence[str | Path] | str | Path = (), *,
               events: str | Path | None = None, records: str | Path | None = None,
               replace: bool = False) -> list[IngestResult]:
        """Validate, harmonise and write input files to the store (``harmonize ingest``).

        Re-ingesting the same files with the same configuration changes nothing; ``replace``
        supersedes an earlier ingest of a file of the same name.
        """
        return [run(self.study, profile, i, write=True, replace=replace)
                for i in self._inputs(profile, files, events, records)]

    # ------------------------------------------------------------------ reading the store
    def status(self, check: bool = False, include_superseded: bool = False) -> StoreStatus:
        """Ingests and rows by kind, season year, season and layer (``harmonize status``)."""
        return StoreStatus(self.store.ingests(include_superseded=include_superseded), self.store.summary(),
                           self.store.check(legacy_row_traced_kinds=adapter_kinds(row_traced=True)) if check else [],
                           self.store.events_without_values())

    def quarantine(self, reason: str | None = None, ingest_id: str | None = None, source_id: str | None = None,
                   limit: int | None = None, precise: bool = False) -> pd.DataFrame:
        """Rejected input rows with reason codes and messages (``harmonize quarantine``).

        As every output, they pass :mod:`harmonize.disclosure`: the raw text of a rejected
        fishing row or of a row naming a sensitive taxon is withheld unless ``precise``.
        """
        return public_quarantine_rows(self.study, Disclosure.for_study(self.study, precise=precise),
                                      ingest_id=ingest_id, reason=reason, source_id=source_id, limit=limit)

    @staticmethod
    def filters(kinds: Names = None, years: Iterable[int] | str | None = None, seasons: Names = None,
                layers: Names = None, variables: Names = None, sources: Names = None,
                taxon_level: str | None = None, consistent_taxa: bool = False) -> ExportFilters:
        """Export filters from lists or comma-separated text (years also ``"2019-2021"``).

        ``taxon_level`` (a rank) and ``consistent_taxa`` roll taxa up (see
        :mod:`harmonize.export.rollup`).
        """
        return ExportFilters.build(kinds, years, seasons, layers, variables, sources, taxon_level, consistent_taxa)

    def observations(self, kinds: Names = None, years: Iterable[int] | str | None = None, seasons: Names = None,
                     layers: Names = None, variables: Names = None, sources: Names = None,
                     columns: list[str] | None = None, limit: int | None = None, taxon_level: str | None = None,
                     consistent_taxa: bool = False, precise: bool = False,
                     fishing_aggregate: bool = False, as_: str = "pandas") -> Any:
        """The long table (observations plus ``log_effort``) for the filters.

        ``as_``: ``"pandas"`` (a DataFrame; integer columns as nullable ``Int64``, times as
        ``datetime64[us, UTC]``), ``"arrow"`` (a pyarrow Table) or ``"duckdb"`` (a DuckDB
        relation over that table). As every export, it passes :mod:`harmonize.disclosure`:
        fishing rows resting on fewer than the study's ``min_vessels`` vessels are withheld and
        events with a sensitive taxon generalised, unless ``precise`` (internal use; logged as a
        warning). For very large selections prefer :meth:`export` to parquet.
        """
        rules = Disclosure.for_study(self.study, precise=precise, fishing_aggregate=fishing_aggregate)
        return read_long(self.study, self.filters(kinds, years, seasons, layers, variables, sources, taxon_level,
                                                  consistent_taxa), columns, limit, disclosure=rules, as_=as_)

    def wide(self, quantity: str = "count", by_life_stage: bool = False, precise: bool = False,
             **filters: Any) -> pd.DataFrame:
        """The event x taxon table (see :mod:`harmonize.export.wide`) as a DataFrame."""
        return read_wide(self.study, self.filters(**filters), quantity, by_life_stage,
                         disclosure=Disclosure.for_study(self.study, precise=precise))

    def grid(self, precise: bool = False, fishing_aggregate: bool = False, **filters: Any) -> pd.DataFrame:
        """The cell x period x layer x variable summary (see :mod:`harmonize.export.grid`)."""
        rules = Disclosure.for_study(self.study, precise=precise, fishing_aggregate=fishing_aggregate)
        return read_grid(self.study, self.filters(**filters), disclosure=rules)

    # ------------------------------------------------------------------ outputs
    def export(self, fmt: str, out: str | Path, *, kinds: Names = None, years: Iterable[int] | str | None = None,
               seasons: Names = None, layers: Names = None, variables: Names = None, sources: Names = None,
               taxon_level: str | None = None, consistent_taxa: bool = False, **options: Any) -> ExportResult:
        """Write an export (``harmonize export FORMAT OUT``): long, wide, grid, gpkg or dwca.

        A relative ``out`` is taken from the current folder. ``options`` are the disclosure
        options of :func:`harmonize.export.run.export` (``precise``, ``fishing_aggregate``,
        ``generalise_deg``) and the format's (``quantity``/``by_life_stage`` for wide,
        ``with_effort`` for dwca, ``version`` for gpkg).
        """
        if fmt not in EXPORTERS:
            raise HarmonizeError(f"unknown export format {fmt!r}; choose from {', '.join(EXPORTERS)}")
        return export(self.study, fmt, out, self.filters(kinds, years, seasons, layers, variables, sources,
                                                         taxon_level, consistent_taxa), **options)

    def audit(self, **options: Any) -> Any:
        """The coverage audit (``harmonize audit``) as an object with DataFrames and findings."""
        from harmonize.audit.run import audit

        return audit(self.study, **options)

    def model_readiness(self, taxon_level: str | None = None, consistent_taxa: bool = False,
                        year: int | None = None) -> Any:
        """Which taxa the data can carry (see :mod:`harmonize.audit.readiness`).

        Returns a ``ModelReadiness``: ``table`` (per taxon x source kind x season x layer:
        samples, encounters, share of zeros, years with encounters), ``too_sparse`` (taxa
        below ``[audit] min_encounters`` everywhere: merge, roll up or drop) and
        ``resolution_changes``. ``taxon_level`` (a rank) or ``consistent_taxa`` count taxa
        rolled up as the exports would; ``year`` ignores later season years.
        """
        from harmonize.audit.readiness import model_readiness

        with Store(self.study.store_dir).connect(read_only=True) as con:
            return model_readiness(con, self.study, year, taxon_level, consistent_taxa)


def open_study(path: str | Path = ".") -> StudyHandle:
    """Open the study folder ``path`` (holding study.toml).

    Raises
    ------
    harmonize.errors.ConfigError
        When study.toml is missing or wrong, naming the key and what is expected.
    """
    return StudyHandle(load_study(path))


__all__ = ["ExportFilters", "ExportResult", "StoreStatus", "StudyHandle", "open_study"]
