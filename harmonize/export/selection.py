"""Which observation rows an export takes: filters, the disclosure gate and the shared base view.

Every export reads the store through one temporary DuckDB view, ``export_base``: the public
rows of the ``observations`` view (:mod:`harmonize.disclosure`: fishing-effort rows resting
on fewer than ``min_vessels`` vessels withheld whole, events with a sensitive taxon
generalised) restricted by the user's filters, with the offset ``log_effort = ln(effort)``
added. The heavy lifting stays in DuckDB so that exports scale with the store, not with memory.
"""

from __future__ import annotations

import re
import shutil
import tempfile
from collections.abc import Iterable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import duckdb

from harmonize import parts, settings
from harmonize.adapters.registry import kinds
from harmonize.disclosure import Disclosure
from harmonize.errors import HarmonizeError
from harmonize.sql import sql_text
from harmonize.store import Store
from harmonize.study import Study


def source_kinds() -> tuple[str, ...]:
    """Every registered source kind, in display order."""
    return kinds()


def sample_kinds() -> tuple[str, ...]:
    """Source kinds whose events are samples of organisms (rows of the wide matrix)."""
    return kinds(is_sample=True)

#: The flag the twin finder sets on volunteer records that repeat another source's record.
DUPLICATE_FLAG = "probable_duplicate"
BASE_VIEW = "export_base"
#: DuckDB working memory of an export (its pivots and sorts spill to disk beyond it).
DEFAULT_MEMORY_LIMIT = "2GB"
#: Environment variable overriding :data:`DEFAULT_MEMORY_LIMIT` on the command line (DuckDB size
#: text: "4GB", "512MB"; :mod:`harmonize.settings`).
MEMORY_LIMIT_ENV = settings.ENVIRONMENT["export_memory_limit"]

_YEAR_RANGE = re.compile(r"^\s*(\d{4})\s*(?:(?:-|\.\.)\s*(\d{4}))?\s*$")


def _text_list(values: Iterable[str]) -> str:
    return "(" + ", ".join(sql_text(v) for v in values) + ")"


@dataclass(frozen=True)
class ExportFilters:
    """What to take from the store; an empty tuple means "all".

    Parameters
    ----------
    kinds
        Source kinds (trawl, plankton, transect, opportunistic, gridded, effort).
    years
        Season years (the year each season belongs to; a December winter counts with the
        following January).
    seasons, layers
        Season and depth-layer names from study.toml (layers also near_bottom, integrated).
    variables
        Canonical taxon names, physical variable names or fishing_hours.
    sources
        Source ids from the profiles.
    taxon_level, consistent_taxa
        Roll taxa up to their ancestor of this rank, and/or to the finest level recorded
        consistently across the selected years and sources (:mod:`harmonize.export.rollup`).
    """

    kinds: tuple[str, ...] = ()
    years: tuple[int, ...] = ()
    seasons: tuple[str, ...] = ()
    layers: tuple[str, ...] = ()
    variables: tuple[str, ...] = ()
    sources: tuple[str, ...] = field(default=())
    taxon_level: str | None = None
    consistent_taxa: bool = False

    @classmethod
    def build(cls, kinds: Iterable[str] | str | None = None, years: Iterable[int] | str | None = None,
              seasons: Iterable[str] | str | None = None, layers: Iterable[str] | str | None = None,
              variables: Iterable[str] | str | None = None,
              sources: Iterable[str] | str | None = None, taxon_level: str | None = None,
              consistent_taxa: bool = False) -> ExportFilters:
        """Filters from lists or comma-separated text (years also as ranges, ``2019-2021``)."""
        return cls(kinds=_names(kinds), years=parse_years(years), seasons=_names(seasons),
                   layers=_names(layers), variables=_names(variables), sources=_names(sources),
                   taxon_level=taxon_level or None, consistent_taxa=bool(consistent_taxa))

    def where_sql(self) -> str:
        """The SQL condition on observation columns (``TRUE`` when nothing is filtered)."""
        parts = []
        for column, values in (("source_kind", self.kinds), ("season", self.seasons),
                               ("depth_layer", self.layers), ("variable", self.variables),
                               ("source_id", self.sources)):
            if values:
                parts.append(f"{column} IN {_text_list(values)}")
        if self.years:
            parts.append("season_year IN (" + ", ".join(str(int(y)) for y in self.years) + ")")
        return " AND ".join(parts) if parts else "TRUE"

    def as_dict(self) -> dict[str, list[Any]]:
        """The filters as plain lists, for export metadata."""
        return {"kinds": list(self.kinds), "season_years": list(self.years), "seasons": list(self.seasons),
                "layers": list(self.layers), "variables": list(self.variables), "sources": list(self.sources),
                "taxon_level": self.taxon_level, "consistent_taxa": self.consistent_taxa}

    def validate(self, con: duckdb.DuckDBPyConnection, season_names: Sequence[str],
                 layer_names: Sequence[str]) -> None:
        """Raise HarmonizeError naming a filter value that can match nothing, and the valid ones."""
        known = source_kinds()
        unknown_kinds = [k for k in self.kinds if k not in known]
        if unknown_kinds:
            raise HarmonizeError(f"unknown source kind {unknown_kinds[0]!r} in the export filter; "
                                 f"choose from {', '.join(known)}")
        bad = [s for s in self.seasons if s not in season_names]
        if bad:
            raise HarmonizeError(f"season {bad[0]!r} is not in study.toml [seasons]; "
                                 f"choose from {', '.join(season_names)}")
        valid_layers = [*layer_names, "near_bottom", "integrated"]
        bad = [s for s in self.layers if s not in valid_layers]
        if bad:
            raise HarmonizeError(f"depth layer {bad[0]!r} is not in study.toml; "
                                 f"choose from {', '.join(valid_layers)}")
        for column, values, what in (("variable", self.variables, "variable"), ("source_id", self.sources, "source")):
            if not values:
                continue
            present = {r[0] for r in con.execute(
                f"SELECT DISTINCT {column} FROM observations WHERE {column} IN {_text_list(values)}").fetchall()}
            missing = [v for v in values if v not in present]
            if missing:
                raise HarmonizeError(f"{what} {missing[0]!r} is not in the store; "
                                     f"'harmonize status' lists what the store holds (names are case-sensitive)")


def parse_years(years: Iterable[int] | str | None) -> tuple[int, ...]:
    """Years from ints or text such as ``"2019-2021,2023"``; raises HarmonizeError on bad text."""
    if years is None:
        return ()
    if isinstance(years, str):
        out: list[int] = []
        for part in years.split(","):
            if not part.strip():
                continue
            m = _YEAR_RANGE.match(part)
            if not m:
                raise HarmonizeError(f"years filter {part.strip()!r} is not a year or a range such as 2019-2021")
            first = int(m.group(1))
            last = int(m.group(2) or first)
            if last < first:
                raise HarmonizeError(f"years filter {part.strip()!r} ends before it starts; write it as {last}-{first}")
            out.extend(range(first, last + 1))
        return tuple(sorted(set(out)))
    return tuple(sorted({int(y) for y in years}))


def _names(values: Iterable[str] | str | None) -> tuple[str, ...]:
    if values is None:
        return ()
    if isinstance(values, str):
        values = values.split(",")
    return tuple(dict.fromkeys(v.strip() for v in values if v and v.strip()))


def duplicate_sql() -> str:
    """SQL condition: the row is a probable twin of another source's record."""
    return f"coalesce(list_contains(flags, {sql_text(DUPLICATE_FLAG)}), FALSE)"


def define_base(con: duckdb.DuckDBPyConnection, filters: ExportFilters, rules: Disclosure) -> None:
    """Create the temporary view ``export_base`` over the public rows of ``observations``.

    Columns: the contract's observation columns as :meth:`Disclosure.public_sql` gives them
    (plus ``data_generalizations``), and ``log_effort`` (ln(effort); null where effort is
    null or not positive).
    """
    con.execute(
        f"""CREATE OR REPLACE TEMP VIEW {BASE_VIEW} AS
            SELECT *, CASE WHEN effort > 0 THEN ln(effort) END AS log_effort
            FROM ({rules.public_sql(filters.where_sql())})"""
    )


def base_counts(con: duckdb.DuckDBPyConnection, filters: ExportFilters, rules: Disclosure) -> dict[str, Any]:
    """Rows selected and flagged as probable twins, and what the disclosure gate withheld.

    Also returns ``ingest_ids``: the ingests the public rows come from.
    """
    rows = con.execute(
        f"""SELECT ingest_id, count(*), count(*) FILTER (WHERE {duplicate_sql()})
            FROM {BASE_VIEW} GROUP BY ingest_id ORDER BY ingest_id"""
    ).fetchall()
    withheld = rules.withheld_counts(con, filters.where_sql())
    # a merged gridded or effort row names one of its ingests: list every one behind it
    ingest_ids = sorted({r[0] for r in rows if r[0] is not None} | set(parts.ingests_behind(con, filters.where_sql())))
    return {"rows_selected": sum(int(r[1]) for r in rows),
            "rows_suppressed_confidential": withheld["effort_rows_withheld"],
            "rows_probable_duplicate": sum(int(r[2]) for r in rows),
            "disclosure": withheld,
            "ingest_ids": ingest_ids}


@contextmanager
def open_selection(study: Study, filters: ExportFilters, rules: Disclosure | None = None
                   ) -> Iterator[tuple[duckdb.DuckDBPyConnection, dict[str, Any]]]:
    """A read-only store connection with ``export_base`` defined, and the selection's counts.

    ``rules`` are the disclosure rules of the output (default: the study's, never precise);
    the counts carry them, prepared, under ``"rules"``. Raises HarmonizeError when a filter
    names something that does not exist.
    """
    rules = rules or Disclosure.for_study(study)
    with Store(study.store_dir).connect(read_only=True) as con:
        con.execute("SET enable_progress_bar = false")   # the library never prints
        filters.validate(con, list(study.seasons), [d.name for d in study.depth_layers])
        rules = rules.prepare(con, study, filters.where_sql())
        define_base(con, filters, rules)
        counts = base_counts(con, filters, rules)
        counts["rules"] = rules
        if filters.taxon_level or filters.consistent_taxa:
            from harmonize.export.rollup import apply_rollup  # the roll-up reads this module

            counts["taxon_rollup"] = apply_rollup(con, study, filters.taxon_level, filters.consistent_taxa)
        yield con, counts


def export_memory_limit(memory_limit: str | None = None) -> str:
    """The memory limit of an export: the one given, else the run's setting
    (``HARMONIZE_EXPORT_MEMORY_LIMIT`` on the command line), else 2GB."""
    text = memory_limit or settings.current().export_memory_limit or DEFAULT_MEMORY_LIMIT
    return str(text).strip()


@contextmanager
def bounded_memory(con: duckdb.DuckDBPyConnection, memory_limit: str | None = None,
                   beside: Path | None = None) -> Iterator[Path]:
    """Give ``con`` a memory limit and a private spill folder outside the store.

    DuckDB spills its hash tables and sorts to the folder beyond the limit. The folder is
    made beside the output file ``beside`` (``.harmonize-spill-<random>``: on the disk the
    user chose for the output, which a large spill needs), else, or where that folder
    cannot be written, in the system's temporary folder. It is deleted afterwards and the
    connection's settings are reset; the store folder is never written. Raises
    HarmonizeError when the limit is not a size DuckDB understands.
    """
    limit = export_memory_limit(memory_limit)
    try:
        spill = Path(tempfile.mkdtemp(prefix=".harmonize-spill-", dir=None if beside is None else beside.parent))
    except OSError:
        spill = Path(tempfile.mkdtemp(prefix="harmonize-spill-"))
    try:
        try:
            con.execute(f"SET memory_limit = {sql_text(limit)}")
        except duckdb.Error:
            raise HarmonizeError(
                f"export memory limit {limit!r} is not a size; write it as DuckDB does, e.g. \"2GB\" or "
                f"\"512MB\" (argument memory_limit or the environment variable {MEMORY_LIMIT_ENV})") from None
        con.execute(f"SET temp_directory = {sql_text(str(spill))}")
        yield spill
    finally:
        for setting in ("memory_limit", "temp_directory"):
            try:
                con.execute(f"RESET {setting}")
            except duckdb.Error:
                pass   # the connection is closing anyway
        shutil.rmtree(spill, ignore_errors=True)


def prepare_target(out: str | Path, suffixes: Sequence[str]) -> Path:
    """The output path, checked: a known suffix and an existing parent folder."""
    path = Path(out).expanduser().resolve()
    if path.suffix.lower() not in suffixes:
        raise HarmonizeError(f"{path.name}: unknown file type {path.suffix or '(none)'!r}; "
                             f"name the output with one of {', '.join(suffixes)}")
    if not path.parent.is_dir():
        raise HarmonizeError(f"{path.parent} does not exist; create the folder first")
    return path
