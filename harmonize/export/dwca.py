"""Darwin Core Archive export: Event core, Occurrence and Extended Measurement or Fact extensions.

The archive follows the Darwin Core text guide (Darwin Core Maintenance Group, TDWG,
"Darwin Core Text Guide"): tab-separated UTF-8 files with a header line, a ``meta.xml``
naming one core (row type ``http://rs.tdwg.org/dwc/terms/Event``, with an ``id``) and
extensions with a ``coreid``, every column mapped to a term URI, and an EML metadata
document (``eml.xml``, Ecological Metadata Language 2.2.0). What goes where:

- Event core: one row per sample event, with sampling protocol, effort
  (sampleSizeValue/sampleSizeUnit, samplingEffort), date interval, coordinates and depth
  range. Gridded model or satellite fields are not biodiversity events and are left out;
  fishing-effort cell-periods (not samples of organisms either) only with ``with_effort``.
- Occurrence extension: one row per event x taxon x life stage; occurrenceStatus "absent"
  where every value is zero (recorded zeros and absences inferred from complete-catch
  protocols), "present" otherwise. individualCount is the number counted, summed over
  behaviours (``behavior`` lists the behaviours seen); for a split plankton sample it is the
  number counted, the raised count being a measurement. catalogNumber carries the provider's
  record id(s). scientificNameID, taxonRank and kingdom come from taxa.csv (``taxon_id``,
  ``rank``, ``kingdom``) where given. Rows flagged ``probable_duplicate`` are left out.
- Extended Measurement or Fact (row type ``http://rs.iobis.org/obis/terms/
  ExtendedMeasurementOrFact``): counts, biomass, densities (value / effort), physical values
  measured at the event (and fishing hours with ``with_effort``). measurementTypeID and
  measurementUnitID (OBIS terms) come from the shipped mapping ``schemas/dwca_vocabulary.json``
  to the NERC Vocabulary Server collections P01 and P06; empty where it has no identifier.
- Identifiers (eventID, occurrenceID, measurementID) are their parts joined by ``:``, each
  part percent-encoded (RFC 3986, section 2.1) as ``urllib.parse.quote(part, safe="/")`` does,
  with a leading ``-`` also encoded (``%2D``): no spaces, no ``:`` inside a part, nothing a
  spreadsheet takes for a formula. :func:`decode_id` splits an id on ``:`` and unquotes each
  part, giving back the source id, event id, taxon and life stage.
- Disclosure (:mod:`harmonize.disclosure`, the same gate as every output): fishing-effort
  cell-periods resting on fewer than the study's ``min_vessels`` vessels are not in the
  archive at all (no Event row, no measurement); an event where a sensitive taxon was recorded
  present has coordinates rounded to the study's ``generalise_deg``, no cell id, and
  dataGeneralizations / informationWithheld filled (Chapman 2020, "Current best practices
  for generalizing sensitive species occurrence data", GBIF, doi 10.15468/doc-5jp4-5g10).

Text cells are guarded against spreadsheet formula injection (OWASP ASVS 5.0 V1.2.10) the
same way in the core and the extensions, so identifiers still link; tabs and line breaks
inside text become spaces because the files use no quoting.
"""

from __future__ import annotations

import json
import math
import os
import tempfile
import urllib.parse
import zipfile
from collections.abc import Sequence
from dataclasses import dataclass
from functools import cache
from importlib import resources
from pathlib import Path
from typing import Any
from xml.etree import ElementTree as ET

import defusedxml.ElementTree as SafeET
import pandas as pd

from harmonize.adapters.registry import kinds as registered_kinds
from harmonize.adapters.registry import kinds_sql, list_adapters
from harmonize.disclosure import Disclosure
from harmonize.export.atomic import all_or_nothing
from harmonize.export.metadata import CAUTION, ExportResult, provenance
from harmonize.export.safe_csv import neutralise_sql
from harmonize.export.selection import (
    BASE_VIEW,
    ExportFilters,
    duplicate_sql,
    open_selection,
    prepare_target,
    sample_kinds,
)
from harmonize.sql import sql_text
from harmonize.study import Study

SUFFIXES = (".zip",)
DWC = "http://rs.tdwg.org/dwc/terms/"
TEXT_NS = "http://rs.tdwg.org/dwc/text/"
EML_NS = "https://eml.ecoinformatics.org/eml-2.2.0"
ROW_TYPES = {
    "event": DWC + "Event",
    "occurrence": DWC + "Occurrence",
    "emof": "http://rs.iobis.org/obis/terms/ExtendedMeasurementOrFact",
}
FILES = {"event": "event.txt", "occurrence": "occurrence.txt", "emof": "extendedmeasurementorfact.txt"}
#: Namespace of the OBIS eMoF extension's own terms (measurementTypeID, measurementUnitID).
OBIS = "http://rs.iobis.org/obis/terms/"
VOCABULARY_FILE = "dwca_vocabulary.json"


def effort_words() -> dict[str, str]:
    """What the effort of each source kind is, in words (samplingEffort; Adapter.effort_words)."""
    return {kind: cls.effort_words for kind, cls in list_adapters().items() if cls.effort_words}

#: Effort units in words (sampleSizeUnit); the Darwin Core examples spell units out.
UNIT_WORDS = {"km2": "square kilometre", "m2": "square metre", "m3": "cubic metre", "h": "hour", "min": "minute"}
MAX_EML_BYTES = 50_000_000


@dataclass(frozen=True)
class Column:
    """One column of an archive file: the Darwin Core term it carries and its SQL."""

    term: str
    sql: str
    text: bool = True
    namespace: str = DWC

    @property
    def uri(self) -> str:
        return self.namespace + self.term


def _clean(expr: str) -> str:
    """Text for a tab-separated file without quoting, guarded against formula injection."""
    scrubbed = f"regexp_replace(CAST({expr} AS VARCHAR), '[\\t\\r\\n]', ' ', 'g')"
    return neutralise_sql(scrubbed)


def id_part_sql(expr: str) -> str:
    """SQL: one part of an identifier, percent-encoded (see the module docstring).

    DuckDB's ``url_encode`` encodes every byte outside the RFC 3986 unreserved characters
    (``A-Z a-z 0-9 - . _ ~``), as ``urllib.parse.quote(text, safe="")``; ``/`` is put back
    (it separates the parts of fishing cell-period ids) and a leading ``-`` encoded.
    """
    return f"regexp_replace(replace(url_encode(CAST({expr} AS VARCHAR)), '%2F', '/'), '^-', '%2D')"


def encode_id_part(text: str) -> str:
    """Python twin of :func:`id_part_sql` (for readers and tests)."""
    out = urllib.parse.quote(str(text), safe="/")
    return "%2D" + out[1:] if out.startswith("-") else out


def decode_id(identifier: str) -> list[str]:
    """The parts of an archive identifier: ``source_id, event_id[, taxon[, life_stage]]``."""
    return [urllib.parse.unquote(part) for part in identifier.split(":")]


def _event_key(prefix: str = "") -> str:
    return f"{id_part_sql(prefix + 'source_id')} || ':' || {id_part_sql(prefix + 'event_id')}"


@cache
def vocabulary() -> dict[str, Any]:
    """The shipped mapping of measurement types and units to NERC vocabulary identifiers."""
    text = resources.files("harmonize.schemas").joinpath(VOCABULARY_FILE).read_text(encoding="utf-8")
    return dict(json.loads(text))


def _vocabulary_tables(con: Any) -> None:
    """Temporary tables ``dwca_vocab_types`` (key, id) and ``dwca_vocab_units`` (unit, id)."""
    vocab = vocabulary()
    for table, key, section in (("dwca_vocab_types", "key", "measurementType"),
                                ("dwca_vocab_units", "unit", "measurementUnit")):
        entries = vocab[section]
        rows = pd.DataFrame({key: list(entries), "id": [e.get("id") for e in entries.values()]}, dtype=object)
        con.register("_dwca_vocab", rows)
        con.execute(f"CREATE OR REPLACE TEMP TABLE {table} AS SELECT CAST({key} AS VARCHAR) AS {key}, "
                    f"CAST(id AS VARCHAR) AS id FROM _dwca_vocab")
        con.unregister("_dwca_vocab")


def _case(column: str, mapping: dict[str, str], default: str = "NULL") -> str:
    whens = " ".join(f"WHEN {sql_text(k)} THEN {sql_text(v)}" for k, v in mapping.items())
    return f"CASE {column} {whens} ELSE {default} END"


def _event_columns(generalise_deg: float) -> list[Column]:
    p = repr(float(generalise_deg))
    effort_text = (f"CASE WHEN effort IS NOT NULL THEN {_case('source_kind', effort_words(), sql_text('sampling effort'))}"
                   f" || ': ' || CAST(round(effort, 6) AS VARCHAR) || ' ' || effort_unit END")
    return [
        Column("eventID", _clean(_event_key())),
        Column("datasetName", _clean("dataset_name")),
        Column("samplingProtocol", _clean("coalesce(protocol, source_kind)")),
        Column("sampleSizeValue", "effort", text=False),
        Column("sampleSizeUnit", _clean(_case("effort_unit", UNIT_WORDS, "effort_unit"))),
        Column("samplingEffort", _clean(effort_text)),
        Column("eventDate", _clean("strftime(event_start, '%Y-%m-%dT%H:%M:%SZ') || "
                                   "coalesce('/' || strftime(event_end, '%Y-%m-%dT%H:%M:%SZ'), '')")),
        Column("year", "year(event_start)", text=False),
        Column("month", "month(event_start)", text=False),
        Column("day", "day(event_start)", text=False),
        Column("decimalLatitude", "lat", text=False),
        Column("decimalLongitude", "lon", text=False),
        Column("geodeticDatum", "'EPSG:4326'"),
        Column("coordinatePrecision", f"CASE WHEN sensitive THEN {p} END", text=False),
        Column("minimumDepthInMeters", "depth_min_m", text=False),
        Column("maximumDepthInMeters", "depth_max_m", text=False),
        Column("locality", _clean("stratum")),
        Column("locationID", _clean("cell_id")),
        Column("eventRemarks", _clean("concat_ws('; ', 'season ' || season || ' ' || season_year, "
                                      "'depth layer ' || depth_layer, 'source kind ' || source_kind)")),
        Column("dataGeneralizations", _clean("data_generalizations")),
        Column("informationWithheld", _clean("CASE WHEN sensitive THEN 'precise coordinates and grid cell withheld' END")),
    ]


def _occurrence_key() -> str:
    return (f"{_event_key()} || ':' || {id_part_sql('variable')} "
            f"|| coalesce(':' || {id_part_sql('life_stage')}, '')")


_COUNTED = "sum(coalesce(count_observed, value)) FILTER (WHERE quantity = 'count')"

_OCCURRENCE_COLUMNS = [
    Column("eventID", _clean(_event_key())),
    Column("occurrenceID", _clean(_occurrence_key())),
    Column("basisOfRecord", "'HumanObservation'"),
    Column("scientificName", _clean("variable")),
    # the user's authority identifier, rank and kingdom of the taxon (taxa.csv taxon_id, rank,
    # kingdom), empty where none is given
    Column("scientificNameID", _clean("any_value(dwc_taxon_id)")),
    Column("taxonRank", _clean("any_value(dwc_rank)")),
    Column("kingdom", _clean("any_value(dwc_kingdom)")),
    Column("lifeStage", _clean("life_stage")),
    Column("occurrenceStatus", "CASE WHEN bool_or(quantity = 'presence' OR value > 0) THEN 'present' ELSE 'absent' END"),
    # the individuals counted, summed over behaviours (birds on the water + birds in flight);
    # for a split plankton sample the number counted, not the raised number (in the measurements)
    Column("individualCount", f"CAST(CASE WHEN {_COUNTED} = round({_COUNTED}) THEN {_COUNTED} END AS BIGINT)",
           text=False),
    Column("behavior", _clean("nullif(string_agg(DISTINCT behavior, ' | ' ORDER BY behavior) "
                              "FILTER (WHERE value > 0 OR quantity = 'presence'), '')")),
    Column("catalogNumber", _clean("nullif(string_agg(DISTINCT provider_record_id, '|' ORDER BY provider_record_id), '')")),
    Column("occurrenceRemarks", "CASE WHEN bool_and(zero_filled) THEN 'absence inferred: a target taxon of a "
                                "complete-catch protocol that was not in the catch' "
                                "WHEN bool_or(count_observed IS NOT NULL AND quantity = 'count') THEN "
                                "'individualCount is the number counted in a subsample; the count raised to the "
                                "whole sample and the subsample fraction are in the measurements' END"),
]

_EMOF_COLUMNS = [
    Column("eventID", _clean(_event_key())),
    Column("occurrenceID", _clean("occurrence_key")),
    Column("measurementID", _clean("measurement_id")),
    Column("measurementType", _clean("measurement_type")),
    Column("measurementTypeID", _clean("vt.id"), namespace=OBIS),
    Column("measurementValue", "measurement_value", text=False),
    Column("measurementUnit", _clean("measurement_unit")),
    Column("measurementUnitID", _clean("vu.id"), namespace=OBIS),
    Column("measurementMethod", _clean("measurement_method")),
    Column("measurementRemarks", _clean("measurement_remarks")),
]


def _select(columns: Sequence[Column]) -> str:
    return ", ".join(f'{c.sql} AS "{c.term}"' for c in columns)


def _events_sql(study: Study, generalise_deg: float, with_effort: bool = False) -> str:
    kinds = ", ".join(sql_text(k) for k in _archive_kinds(with_effort))
    sampled = "variable_kind = 'taxon' AND quantity IN ('count', 'biomass')"
    return f"""
        WITH ev AS (
            SELECT source_id, event_id, any_value(source_kind) AS source_kind, any_value(protocol) AS protocol,
                   min(event_start) AS event_start, max(event_end) AS event_end,
                   any_value(season_year) AS season_year, any_value(season) AS season,
                   any_value(depth_layer) AS depth_layer, any_value(lat) AS lat, any_value(lon) AS lon,
                   any_value(cell_id) AS cell_id, any_value(stratum) AS stratum,
                   any_value(depth_min_m) AS depth_min_m, any_value(depth_max_m) AS depth_max_m,
                   max(effort) FILTER (WHERE {sampled}) AS effort,
                   any_value(effort_unit) FILTER (WHERE {sampled} AND effort IS NOT NULL) AS effort_unit,
                   any_value(data_generalizations) AS data_generalizations,
                   bool_or(data_generalizations IS NOT NULL) AS sensitive
            FROM {BASE_VIEW} WHERE source_kind IN ({kinds})
            GROUP BY source_id, event_id)
        SELECT {_select(_event_columns(generalise_deg))}
        FROM ev, (SELECT {sql_text(study.name)} AS dataset_name)
        ORDER BY source_id, event_start, event_id"""


def _occurrences_sql() -> str:
    kinds = ", ".join(sql_text(k) for k in sample_kinds())
    return f"""
        SELECT {_select(_OCCURRENCE_COLUMNS)}
        FROM (SELECT b.*, t.taxon_id AS dwc_taxon_id, t.rank AS dwc_rank, t.kingdom AS dwc_kingdom
              FROM {BASE_VIEW} b LEFT JOIN dwca_taxa t ON t.taxon = b.variable)
        WHERE source_kind IN ({kinds}) AND variable_kind = 'taxon' AND NOT {duplicate_sql()}
        GROUP BY source_id, event_id, variable, life_stage"""


def _emof_sql(with_effort: bool = False) -> str:
    kinds = ", ".join(sql_text(k) for k in sample_kinds())
    keep = f"source_kind IN ({kinds}) AND NOT {duplicate_sql()}"
    zero_note = "CASE WHEN zero_filled THEN 'inferred zero: target taxon of a complete-catch protocol' END"
    taxon_unit = "CASE WHEN quantity = 'count' THEN 'individuals' ELSE unit END"
    # an inferred zero of an occurrence that is present (a seabird seen on the water, none
    # in flight) is left out, so that no taxon is both present and absent at one event
    present = ("bool_or(value > 0 OR quantity = 'presence') OVER (PARTITION BY source_id, event_id, variable, "
               "life_stage)")
    taxa = f"""(SELECT *, {present} AS occurrence_present FROM {BASE_VIEW}
                WHERE {keep} AND variable_kind = 'taxon')"""
    shown = "NOT (zero_filled AND occurrence_present)"
    what = ("CASE quantity WHEN 'count' THEN 'abundance (count of individuals' || "
            "CASE WHEN count_observed IS NOT NULL THEN ', raised to the whole sample' ELSE '' END || ')' "
            "ELSE quantity END || coalesce(', ' || replace(behavior, '_', ' '), '')")
    raised = "CASE WHEN count_observed IS NOT NULL THEN 'count_raised' ELSE 'count' END"
    rid = id_part_sql("record_id")
    fishing = f"""
            UNION ALL
            SELECT source_id, event_id, NULL, {rid}, 'fishing hours', 'fishing_hours', value, unit,
                   coalesce(protocol, source_kind),
                   'fishing hours of the cell and period', variable, life_stage, quantity, 3
            FROM {BASE_VIEW} WHERE {kinds_sql(is_fishing_effort=True)} AND value IS NOT NULL""" if with_effort else ""
    return f"""
        SELECT {_select(_EMOF_COLUMNS)} FROM (
            SELECT source_id, event_id, {_occurrence_key()} AS occurrence_key, {rid} AS measurement_id,
                   {what} AS measurement_type,
                   CASE quantity WHEN 'count' THEN {raised} ELSE quantity END AS type_key,
                   value AS measurement_value, {taxon_unit} AS measurement_unit,
                   coalesce(protocol, source_kind) AS measurement_method, {zero_note} AS measurement_remarks,
                   variable, life_stage, quantity, 0 AS part
            FROM {taxa} WHERE quantity <> 'presence' AND {shown}
            UNION ALL
            SELECT source_id, event_id, {_occurrence_key()}, {rid} || ':counted',
                   'count of individuals in the counted subsample' || coalesce(', ' || replace(behavior, '_', ' '), ''),
                   'count_in_subsample', count_observed, 'individuals', 'counted in a subsample of the sample', NULL,
                   variable, life_stage, quantity, 0
            FROM {taxa} WHERE quantity = 'count' AND count_observed IS NOT NULL AND {shown}
            UNION ALL
            SELECT source_id, event_id, {_occurrence_key()}, {rid} || ':fraction',
                   'subsample fraction counted' || coalesce(', ' || replace(behavior, '_', ' '), ''),
                   'subsample_fraction', subsample_fraction, 'dimensionless', 'share of the sample that was counted',
                   NULL, variable, life_stage, quantity, 0
            FROM {taxa} WHERE quantity = 'count' AND subsample_fraction IS NOT NULL AND {shown}
            UNION ALL
            SELECT source_id, event_id, {_occurrence_key()}, {rid} || ':density',
                   CASE quantity WHEN 'count' THEN 'abundance' ELSE quantity END || ' per unit sampling effort'
                       || coalesce(', ' || replace(behavior, '_', ' '), ''),
                   'density:' || quantity || ':' || effort_unit,
                   density, {taxon_unit} || '/' || effort_unit,
                   'value divided by the sampling effort of the event (' || effort_unit || ')', {zero_note},
                   variable, life_stage, quantity, 1
            FROM {taxa} WHERE density IS NOT NULL AND {shown}
            UNION ALL
            SELECT source_id, event_id, NULL, {rid}, variable, variable, value, unit,
                   coalesce(protocol, source_kind), NULL, variable, life_stage, quantity, 2
            FROM {BASE_VIEW} WHERE {keep} AND variable_kind = 'physical' AND value IS NOT NULL{fishing}
        ) m
        LEFT JOIN dwca_vocab_types vt ON vt.key = m.type_key
        LEFT JOIN dwca_vocab_units vu ON vu.unit = m.measurement_unit"""


@all_or_nothing(SUFFIXES)
def export_dwca(study: Study, out: str | Path, filters: ExportFilters | None = None,
                generalise_deg: float | None = None, disclosure: Disclosure | None = None,
                with_effort: bool = False) -> ExportResult:
    """Write a Darwin Core Archive (zip) to ``out``; see the module docstring for what it holds.

    Parameters
    ----------
    study
        The study whose store is read.
    out
        Target ``.zip`` file (replaced if it exists).
    filters
        Which observation rows.
    generalise_deg
        Rounding of the coordinates of events with a sensitive taxon, in degrees (Chapman
        2020 uses 1, 0.1, 0.01 or 0.001 by sensitivity; 0.1 degree is about 11 km); default
        the study's ``[confidentiality] generalise_deg``. Ignored when ``disclosure`` is given.
    disclosure
        The disclosure rules (default: the study's; see :mod:`harmonize.disclosure`).
    with_effort
        Also write the public fishing-effort cell-periods as Event rows with their fishing
        hours as measurements (default: left out; they are not samples of organisms, and
        biodiversity portals read Event rows without occurrences as empty samples).
    """
    if disclosure is None:
        disclosure = Disclosure.for_study(study, generalise_deg=generalise_deg)
    generalise_deg = disclosure.generalise_deg
    path = prepare_target(out, SUFFIXES)
    filters = filters or ExportFilters()
    with open_selection(study, filters, disclosure) as (con, counts), \
            tempfile.TemporaryDirectory(dir=path.parent, prefix=".dwca-") as tmp:
        folder = Path(tmp)
        taxa = study.taxa.reindex(columns=["taxon", "taxon_id", "rank", "kingdom"]).astype(object)
        con.register("_dwca_taxa", taxa)
        con.execute("CREATE OR REPLACE TEMP TABLE dwca_taxa AS "
                    "SELECT CAST(taxon AS VARCHAR) AS taxon, nullif(CAST(taxon_id AS VARCHAR), '') AS taxon_id, "
                    "nullif(CAST(rank AS VARCHAR), '') AS rank, nullif(CAST(kingdom AS VARCHAR), '') AS kingdom "
                    "FROM _dwca_taxa")
        con.unregister("_dwca_taxa")
        _vocabulary_tables(con)
        written: dict[str, int] = {}
        for name, sql in (("event", _events_sql(study, generalise_deg, with_effort)),
                          ("occurrence", _occurrences_sql()), ("emof", _emof_sql(with_effort))):
            target = sql_text(str(folder / FILES[name]))
            written[name] = int(con.execute(
                f"COPY ({sql}) TO {target} (FORMAT csv, DELIMITER '\t', HEADER true, QUOTE '', ESCAPE '')"
            ).fetchall()[0][0])
        facts = _facts(con, folder)
        notes = [
            "gridded model and satellite fields are not in the archive (they are not biodiversity events)",
            f"{facts['occurrence_rows_probable_duplicate']} taxon rows flagged probable_duplicate were left out",
            "individualCount is the number of individuals counted, summed over behaviours (e.g. seabirds on the "
            "water and in flight); for a count of a split subsample it is the number counted, and the count raised "
            "to the whole sample (count / subsample fraction) and the fraction are measurements of the occurrence",
            "catalogNumber holds the provider's own record id(s) where the provider gave one",
            "set a licence, creators and contacts in eml.xml before publishing",
            "identifiers are their parts joined by ':', each part percent-encoded (RFC 3986; '/' kept, a leading "
            "'-' encoded): split on ':' and percent-decode each part to get source id, event id, taxon, life stage",
            "measurementTypeID and measurementUnitID: NERC Vocabulary Server P01 and P06 concepts where harmonize "
            "knows one (schemas/dwca_vocabulary.json), empty otherwise",
            ("fishing-effort cell-periods are Event rows with their fishing hours as measurements (with_effort)"
             if with_effort else "fishing-effort cell-periods are not in the archive (ask for them with --with-effort)"),
        ]
        facts["fishing_values_withheld"] = counts["disclosure"]["effort_rows_withheld"]
        options = {"generalise_deg": generalise_deg, "with_effort": with_effort, "files": {FILES[k]: v for k, v in written.items()}, **facts}
        meta = provenance(con, study, "dwca", filters, counts, options, notes)
        (folder / "meta.xml").write_bytes(meta_xml())
        (folder / "eml.xml").write_bytes(eml_xml(study, meta, con, _archive_kinds(with_effort)))
        staging = folder / "archive.zip"
        with zipfile.ZipFile(staging, "w", compression=zipfile.ZIP_DEFLATED) as zf:
            for member in ("meta.xml", "eml.xml", *FILES.values()):
                zf.write(folder / member, arcname=member)
        os.replace(staging, path)
    return ExportResult("dwca", path, written["event"], meta, [path])


def _facts(con: Any, folder: Path) -> dict[str, int]:
    """Counts for the metadata: twins left out (one scan of the selection), events generalised
    and absences (read back from the written files)."""
    row = con.execute(
        f"""SELECT count(*) FILTER (WHERE variable_kind = 'taxon' AND {duplicate_sql()})
            FROM {BASE_VIEW}""").fetchall()[0]

    def read(name: str) -> str:
        path = sql_text(str(folder / FILES[name]))
        return f"read_csv({path}, delim = '\t', header = true, quote = '', escape = '', all_varchar = true)"

    generalised = con.execute(
        f"SELECT count(*) FROM {read('event')} WHERE coalesce(\"dataGeneralizations\", '') <> ''").fetchall()[0][0]
    absent = con.execute(
        f"SELECT count(*) FROM {read('occurrence')} WHERE \"occurrenceStatus\" = 'absent'").fetchall()[0][0]
    return {"occurrence_rows_probable_duplicate": int(row[0]),
            "events_generalised": int(generalised), "occurrences_absent": int(absent)}


def meta_xml() -> bytes:
    """The archive descriptor: one Event core with ``id``, two extensions with ``coreid``."""
    ET.register_namespace("", TEXT_NS)
    root = ET.Element(f"{{{TEXT_NS}}}archive", {"metadata": "eml.xml"})
    for name, columns in (("event", _event_columns(0.1)), ("occurrence", _OCCURRENCE_COLUMNS),
                          ("emof", _EMOF_COLUMNS)):
        tag = "core" if name == "event" else "extension"
        el = ET.SubElement(root, f"{{{TEXT_NS}}}{tag}", {
            "encoding": "UTF-8", "fieldsTerminatedBy": "\\t", "linesTerminatedBy": "\\n",
            "fieldsEnclosedBy": "", "ignoreHeaderLines": "1", "rowType": ROW_TYPES[name]})
        files = ET.SubElement(el, f"{{{TEXT_NS}}}files")
        ET.SubElement(files, f"{{{TEXT_NS}}}location").text = FILES[name]
        ET.SubElement(el, f"{{{TEXT_NS}}}{'id' if name == 'event' else 'coreid'}", {"index": "0"})
        for i, col in enumerate(columns):
            ET.SubElement(el, f"{{{TEXT_NS}}}field", {"index": str(i), "term": col.uri})
    ET.indent(root)
    return ET.tostring(root, encoding="utf-8", xml_declaration=True)


def _archive_kinds(with_effort: bool) -> tuple[str, ...]:
    """The source kinds whose events are Event rows of the archive."""
    return (*sample_kinds(), *(registered_kinds(is_fishing_effort=True) if with_effort else ()))


def eml_xml(study: Study, meta: dict[str, Any], con: Any, kinds: Sequence[str] | None = None) -> bytes:
    """A minimal EML 2.2.0 document: title, coverage, methods, caution and harmonize provenance."""
    ET.register_namespace("eml", EML_NS)
    listed = ", ".join(sql_text(k) for k in (kinds or _archive_kinds(True)))
    extent = con.execute(
        f"""SELECT min(lon), max(lon), min(lat), max(lat), min(event_start)::DATE, max(event_start)::DATE
            FROM {BASE_VIEW} WHERE source_kind IN ({listed})""").fetchall()[0]
    root = ET.Element(f"{{{EML_NS}}}eml", {
        "packageId": f"harmonize-{_slug(study.name)}-{meta['generated_at']}", "system": "harmonize",
        "{http://www.w3.org/XML/1998/namespace}lang": "en"})
    ds = ET.SubElement(root, "dataset")
    ET.SubElement(ds, "title").text = f"{study.name}: harmonised survey records"
    creator = ET.SubElement(ds, "creator")
    ET.SubElement(creator, "organizationName").text = "to be completed by the data owner before publishing"
    ET.SubElement(ds, "pubDate").text = str(meta["generated_at"])[:10]
    ET.SubElement(ds, "language").text = "en"
    abstract = ET.SubElement(ds, "abstract")
    ET.SubElement(abstract, "para").text = (
        f"Sampling events, occurrences (with absences) and measurements of the study '{study.name}', "
        f"harmonised by harmonize {meta['tool_version']} (contract version {meta['contract_version']}). {CAUTION}")
    rights = ET.SubElement(ds, "intellectualRights")
    ET.SubElement(rights, "para").text = ("No licence chosen yet: the data owner sets the licence before "
                                          "publishing; local confidentiality rules apply.")
    if extent[0] is not None:
        coverage = ET.SubElement(ds, "coverage")
        geo = ET.SubElement(coverage, "geographicCoverage")
        ET.SubElement(geo, "geographicDescription").text = f"Study area of {study.name}"
        box = ET.SubElement(geo, "boundingCoordinates")
        # generalised coordinates stay inside this box: it is rounded outwards to 0.1 degree
        for tag, value, fn in (("westBoundingCoordinate", extent[0], math.floor),
                               ("eastBoundingCoordinate", extent[1], math.ceil),
                               ("northBoundingCoordinate", extent[3], math.ceil),
                               ("southBoundingCoordinate", extent[2], math.floor)):
            ET.SubElement(box, tag).text = f"{fn(value * 10) / 10:.1f}"
        temporal = ET.SubElement(coverage, "temporalCoverage")
        dates = ET.SubElement(temporal, "rangeOfDates")
        for tag, value in (("beginDate", extent[4]), ("endDate", extent[5])):
            ET.SubElement(ET.SubElement(dates, tag), "calendarDate").text = str(value)
    contact = ET.SubElement(ds, "contact")
    ET.SubElement(contact, "organizationName").text = "to be completed by the data owner before publishing"
    methods = ET.SubElement(ds, "methods")
    for text in [*meta["notes"], f"Filters used: {json.dumps(meta['filters'])}",
                 f"Built from ingests: {', '.join(i['ingest_id'] for i in meta['ingests']) or 'none'}"]:
        step = ET.SubElement(methods, "methodStep")
        ET.SubElement(ET.SubElement(step, "description"), "para").text = text
    extra = ET.SubElement(ET.SubElement(root, "additionalMetadata"), "metadata")
    ET.SubElement(extra, "harmonizeProvenance").text = json.dumps(meta, default=str)
    ET.indent(root)
    return ET.tostring(root, encoding="utf-8", xml_declaration=True)


def read_provenance(path: str | Path) -> dict[str, Any]:
    """The harmonize provenance stored in the EML of an archive written by :func:`export_dwca`.

    Members are read by name into memory (never extracted to disk) and parsed with defusedxml.
    """
    with zipfile.ZipFile(path) as zf:
        info = zf.getinfo("eml.xml")
        if info.file_size > MAX_EML_BYTES:
            raise ValueError(f"{path}: eml.xml is {info.file_size} bytes; refusing to read more than {MAX_EML_BYTES}")
        root = SafeET.fromstring(zf.read(info))
    node = root.find("additionalMetadata/metadata/harmonizeProvenance")
    if node is None or not node.text:
        raise ValueError(f"{path} carries no harmonize provenance in eml.xml")
    return json.loads(node.text)


def read_archive_table(path: str | Path, member: str) -> pd.DataFrame:
    """One data file of an archive as text columns (for tests and quick looks)."""
    import io

    with zipfile.ZipFile(path) as zf:
        data = zf.read(member)
    return pd.read_csv(io.BytesIO(data), sep="\t", dtype=str, keep_default_na=False, quoting=3)


def _slug(name: str) -> str:
    return "".join(c.lower() if c.isalnum() else "-" for c in name).strip("-")
