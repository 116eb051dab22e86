"""Darwin Core input: archives (zip + meta.xml) and plain occurrence tables, read safely.

Darwin Core (TDWG, "Darwin Core List of Terms") names the fields of biodiversity records;
a Darwin Core Archive (TDWG, "Darwin Core Text Guide") is a zip of delimited text files
described by ``meta.xml``: exactly one core (occurrence or event rows), an ``id`` column when
extensions exist, and a ``coreid`` column in each extension. This module turns either form
into one text table whose columns are Darwin Core term names, plus the default mapping of
those terms onto the opportunistic adapter's fields.

An archive is untrusted input. Nothing is extracted to disk: members are read into memory by
the names listed in the zip's own directory, after refusing unsafe names (absolute paths,
``..``, backslashes), encrypted members, too many members, too much uncompressed data and
suspicious compression ratios (Python docs, zipfile, "Decompression pitfalls"); ``meta.xml``
is parsed with defusedxml, which refuses entity declarations and external references
(Python docs, "XML vulnerabilities": billion laughs, quadratic blow-up, external entities).
"""

from __future__ import annotations

import csv
import io
import zipfile
import zlib
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path, PurePosixPath

import defusedxml.ElementTree as safe_xml
import numpy as np
import pandas as pd
from defusedxml import DefusedXmlException

from harmonize.errors import InputFileError
from harmonize.files import file_sha256
from harmonize.reading.text import MAX_FIELD_CHARS, RawTable, csv_field_limit

DWC = "http://rs.tdwg.org/dwc/terms/"
ROW_OCCURRENCE = DWC + "Occurrence"
ROW_EVENT = DWC + "Event"

#: Adapter field -> Darwin Core terms that fill it, in order of preference.
FIELD_TERMS: Mapping[str, tuple[str, ...]] = {
    "record_id": ("occurrenceID",),
    "checklist_id": ("eventID",),
    "time": ("eventDate",),
    "lat": ("decimalLatitude",),
    "lon": ("decimalLongitude",),
    "observer": ("recordedBy",),
    "taxon": ("scientificName", "vernacularName"),
    "count": ("individualCount",),
    "occurrence_status": ("occurrenceStatus",),
    "life_stage": ("lifeStage",),
    "behavior": ("behavior",),
}
#: Terms whose presence marks a table as Darwin Core (two of them are enough).
_MARKER_TERMS = ("scientificName", "decimalLatitude", "decimalLongitude", "eventDate", "occurrenceID")

# Columns this module adds to an archive's table: where each row came from.
MEMBER_COLUMN = "dwca_file"
ROW_COLUMN = "dwca_row"


@dataclass(frozen=True)
class ArchiveLimits:
    """Caps that keep a hostile archive from exhausting memory.

    The ratio cap applies to members above ``ratio_min_bytes``: delimited text compresses
    about 5-20 times (common practice), deflate cannot exceed about 1032:1 on a single
    member, so a member above the cap is refused as a likely decompression bomb.
    """

    max_members: int = 10_000
    max_total_bytes: int = 4 * 1024**3
    max_ratio: float = 200.0
    ratio_min_bytes: int = 1024**2
    max_meta_bytes: int = 1024**2


@dataclass
class DwcTable:
    """One Darwin Core input as text, ready for the adapter.

    ``table`` holds one row per input row (the rows counted by the accounting), columns named
    by Darwin Core terms; ``malformed`` lists rows whose field count is wrong and ``orphans``
    extension rows whose core row does not exist (1-based row, message).
    """

    table: RawTable
    malformed: list[tuple[int, str, int]] = field(default_factory=list)
    orphans: list[tuple[int, str]] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)


def short_term(name: str) -> str:
    """The term name of a column header or term IRI ("http://.../terms/eventDate" -> "eventDate")."""
    text = str(name).strip()
    for sep in ("/", "#", ":"):
        text = text.rsplit(sep, 1)[-1]
    return text


def looks_like_dwc(columns: Sequence[str]) -> bool:
    """True when at least two Darwin Core marker terms are among the column names."""
    names = {short_term(c).casefold() for c in columns}
    return sum(t.casefold() in names for t in _MARKER_TERMS) >= 2


def default_columns(columns: Sequence[str], taken: Mapping[str, str] | None = None) -> dict[str, str]:
    """Adapter field -> column for the Darwin Core terms present among ``columns``.

    Fields in ``taken`` (the profile's own [columns]) and fields whose own name is a column
    are left alone: a profile always wins over the standard mapping.
    """
    taken = taken or {}
    by_term: dict[str, str] = {}
    for col in columns:
        by_term.setdefault(short_term(col).casefold(), col)
    own = {str(c).casefold() for c in columns}
    out: dict[str, str] = {}
    for fld, terms in FIELD_TERMS.items():
        if fld in taken or fld.casefold() in own:
            continue
        for term in terms:
            if term.casefold() in by_term:
                out[fld] = by_term[term.casefold()]
                break
    return out


def is_archive(path: Path) -> bool:
    """True for a zip file (checked by its signature, not its name)."""
    return Path(path).is_file() and zipfile.is_zipfile(path)


# ---------------------------------------------------------------------------- archives
def read_archive(path: str | Path, role: str = "rows", limits: ArchiveLimits | None = None) -> DwcTable:
    """Read a Darwin Core Archive into one table of occurrence rows.

    An occurrence core gives one row per occurrence. An event core with an occurrence
    extension gives one row per occurrence, with the event's terms (eventDate, position,
    recordedBy, samplingEffort, ...) filled in where the occurrence leaves them empty, plus
    one row with an empty scientificName per event that has no occurrence (a checklist in
    which nothing was seen). A zip without meta.xml must hold a single text file whose
    header row names the terms.

    Raises
    ------
    InputFileError
        Unsafe or oversized archive, unreadable or hostile meta.xml, missing members.
    """
    path = Path(path)
    limits = limits or ArchiveLimits()
    try:
        zf = zipfile.ZipFile(path)
    except (zipfile.BadZipFile, OSError) as exc:
        raise InputFileError(path, f"is not a readable zip archive ({exc})") from None
    with zf:
        members = _checked_members(path, zf, limits)
        reader = _MemberReader(path, zf, members, limits)
        if "meta.xml" not in members:
            texts = [n for n in members if not n.endswith("/") and n.lower().endswith((".txt", ".csv", ".tsv", ".tab"))]
            if len(texts) != 1:
                raise InputFileError(
                    path, "has no meta.xml and not exactly one data file; a Darwin Core Archive needs "
                    f"meta.xml describing its files (members: {', '.join(sorted(members)[:10])})")
            name = texts[0]
            delimiter = "\t" if name.lower().endswith((".txt", ".tsv", ".tab")) else ","
            spec = _FileSpec(name, ROW_OCCURRENCE, "UTF-8", delimiter, '"', 1, {}, {}, None)
            frame, malformed = _parse_member(path, reader, spec, header_names=True)
            return DwcTable(RawTable(path, role, frame, file_sha256(path)), malformed)
        core, extensions = _parse_meta(path, reader.read("meta.xml", limits.max_meta_bytes))
        notes: list[str] = []
        if core.row_type == ROW_OCCURRENCE:
            frame, malformed = _parse_member(path, reader, core)
            ignored = [e.row_type.rsplit("/", 1)[-1] for e in extensions]
            if ignored:
                notes.append(f"{path.name}: extension(s) {', '.join(ignored)} not read; only occurrences are used")
            return DwcTable(RawTable(path, role, frame, file_sha256(path)), malformed, notes=notes)
        if core.row_type != ROW_EVENT:
            raise InputFileError(
                path, f"meta.xml declares a core of rowType '{core.row_type}'; expected an occurrence core "
                f"({ROW_OCCURRENCE}) or an event core ({ROW_EVENT}) with an occurrence extension")
        occ_specs = [e for e in extensions if e.row_type == ROW_OCCURRENCE]
        if not occ_specs:
            raise InputFileError(path, "has an event core but no occurrence extension; there are no records to read")
        events, ev_bad = _parse_member(path, reader, core)
        occ, occ_bad = _parse_member(path, reader, occ_specs[0])
        ignored = [e.row_type.rsplit("/", 1)[-1] for e in extensions if e is not occ_specs[0]]
        if ignored:
            notes.append(f"{path.name}: extension(s) {', '.join(ignored)} not read; only occurrences are used")
        frame, orphans, malformed = _join_events(path, events, ev_bad, occ, occ_bad)
        return DwcTable(RawTable(path, role, frame, file_sha256(path)), malformed, orphans, notes)


@dataclass(frozen=True)
class _FileSpec:
    location: str
    row_type: str
    encoding: str
    delimiter: str
    quote: str
    header_lines: int
    fields: dict[int, str]  # column index -> term name
    defaults: dict[str, str]  # term name -> constant value
    id_index: int | None


def _unsafe_name(name: str) -> str | None:
    """Why a member name is unsafe, or None."""
    if "\x00" in name:
        return "contains a NUL character"
    if "\\" in name:
        return "contains a backslash"
    if name.startswith("/") or (len(name) > 1 and name[1] == ":"):
        return "is an absolute path"
    if ".." in PurePosixPath(name).parts:
        return "climbs out of the archive with '..'"
    return None


def _checked_members(path: Path, zf: zipfile.ZipFile, limits: ArchiveLimits) -> dict[str, zipfile.ZipInfo]:
    infos = zf.infolist()
    if len(infos) > limits.max_members:
        raise InputFileError(path, f"holds {len(infos)} members, more than the {limits.max_members} allowed")
    total = 0
    out: dict[str, zipfile.ZipInfo] = {}
    for info in infos:
        problem = _unsafe_name(info.filename)
        if problem:
            raise InputFileError(
                path, f"member '{info.filename!r}' {problem}; the archive is refused (path traversal)")
        if info.flag_bits & 0x1:
            raise InputFileError(path, f"member '{info.filename}' is encrypted; provide an unencrypted archive")
        total += info.file_size
        if total > limits.max_total_bytes:
            raise InputFileError(
                path, f"would unpack to more than {limits.max_total_bytes / 1024**2:.0f} MiB; "
                "the archive is refused (possible decompression bomb)")
        if (info.file_size > limits.ratio_min_bytes
                and info.file_size > limits.max_ratio * max(info.compress_size, 1)):
            raise InputFileError(
                path, f"member '{info.filename}' would expand {info.file_size / max(info.compress_size, 1):.0f} "
                f"times (limit {limits.max_ratio:g}); the archive is refused (possible decompression bomb)")
        if info.filename in out:
            raise InputFileError(path, f"member name '{info.filename}' appears twice; the archive is ambiguous")
        out[info.filename] = info
    return out


class _MemberReader:
    """Reads members into memory, counting bytes against the caps (sizes in headers can lie)."""

    def __init__(self, path: Path, zf: zipfile.ZipFile, members: Mapping[str, zipfile.ZipInfo],
                 limits: ArchiveLimits) -> None:
        self.path, self.zf, self.members, self.limits = path, zf, members, limits
        self.read_bytes = 0

    def read(self, name: str, cap: int | None = None) -> bytes:
        info = self.members.get(name)
        if info is None:
            raise InputFileError(
                self.path, f"meta.xml names the file '{name}', which is not in the archive "
                f"(members: {', '.join(sorted(self.members)[:10])})")
        limit = min(cap or self.limits.max_total_bytes, info.file_size)
        chunks, size = [], 0
        try:
            with self.zf.open(info) as fh:
                while True:
                    block = fh.read(1 << 20)
                    if not block:
                        break
                    size += len(block)
                    self.read_bytes += len(block)
                    if size > limit or self.read_bytes > self.limits.max_total_bytes:
                        raise InputFileError(
                            self.path, f"member '{name}' unpacks to more than its declared or allowed size; "
                            "the archive is refused (possible decompression bomb)")
                    chunks.append(block)
        except (zipfile.BadZipFile, OSError, EOFError, zlib.error) as exc:  # zlib: damaged deflate data
            raise InputFileError(self.path, f"member '{name}' cannot be read ({exc})") from None
        return b"".join(chunks)


def _local(tag: str) -> str:
    return tag.rsplit("}", 1)[-1]


def _unescape(value: str) -> str:
    return value.replace("\\t", "\t").replace("\\n", "\n").replace("\\r", "\r")


def _parse_meta(path: Path, data: bytes) -> tuple[_FileSpec, list[_FileSpec]]:
    try:
        root = safe_xml.fromstring(data, forbid_dtd=True)
    except DefusedXmlException as exc:
        raise InputFileError(
            path, f"meta.xml uses a DTD or XML entities ({type(exc).__name__}), which are refused; "
            "a Darwin Core meta.xml needs neither") from None
    except safe_xml.ParseError as exc:
        raise InputFileError(path, f"meta.xml is not well-formed XML ({exc})") from None
    if _local(root.tag) != "archive":
        raise InputFileError(path, f"meta.xml has root element '{_local(root.tag)}'; expected 'archive'")
    cores = [el for el in root if _local(el.tag) == "core"]
    if len(cores) != 1:
        raise InputFileError(path, f"meta.xml declares {len(cores)} core files; a Darwin Core Archive has exactly one")
    core = _file_spec(path, cores[0], "id")
    extensions = [_file_spec(path, el, "coreid") for el in root if _local(el.tag) == "extension"]
    if extensions and core.id_index is None:
        raise InputFileError(path, "meta.xml declares extensions but the core has no <id index=...>")
    for ext in extensions:
        if ext.id_index is None:
            raise InputFileError(path, f"extension '{ext.location}' in meta.xml has no <coreid index=...>")
    return core, extensions


def _file_spec(path: Path, el: object, id_tag: str) -> _FileSpec:
    attrs = el.attrib  # type: ignore[attr-defined]
    row_type = attrs.get("rowType", "")
    locations = [loc.text.strip() for files in el if _local(files.tag) == "files"  # type: ignore[attr-defined]
                 for loc in files if _local(loc.tag) == "location" and loc.text]
    if not locations:
        raise InputFileError(path, f"meta.xml: the {_local(el.tag)} '{row_type}' names no <files><location>")  # type: ignore[attr-defined]
    fields_by_index: dict[int, str] = {}
    defaults: dict[str, str] = {}
    id_index = None
    for child in el:  # type: ignore[attr-defined]
        tag = _local(child.tag)
        if tag == id_tag:
            id_index = _index(path, child.attrib.get("index"), id_tag)
        elif tag == "field":
            term = child.attrib.get("term", "")
            if not term:
                raise InputFileError(path, "meta.xml has a <field> without a term attribute")
            name = short_term(term)
            if "index" in child.attrib:
                idx = _index(path, child.attrib["index"], name)
                fields_by_index.setdefault(idx, name)
            elif "default" in child.attrib:
                defaults[name] = child.attrib["default"]
    delimiter = _unescape(attrs.get("fieldsTerminatedBy", ","))
    if len(delimiter) != 1:
        raise InputFileError(path, f"meta.xml: fieldsTerminatedBy '{delimiter!r}' must be one character")
    quote = _unescape(attrs.get("fieldsEnclosedBy", '"'))
    try:
        header_lines = int(attrs.get("ignoreHeaderLines", "0"))
    except ValueError:
        raise InputFileError(path, f"meta.xml: ignoreHeaderLines '{attrs.get('ignoreHeaderLines')}' is not a whole number") from None
    return _FileSpec(locations[0], row_type, attrs.get("encoding", "UTF-8"), delimiter, quote,
                     header_lines, fields_by_index, defaults, id_index)


def _index(path: Path, value: str | None, what: str) -> int:
    try:
        idx = int(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        raise InputFileError(path, f"meta.xml: index '{value}' of {what} is not a whole number") from None
    if idx < 0:
        raise InputFileError(path, f"meta.xml: index {idx} of {what} is negative")
    if idx >= MAX_COLUMNS:  # every row is padded to the widest index: 1e20 asked for all memory
        raise InputFileError(path, f"meta.xml: index {idx} of {what} is beyond any table's width "
                                   f"(at most {MAX_COLUMNS:,} columns); fix meta.xml")
    return idx


#: Columns a Darwin Core data file may have (an index in meta.xml beyond this is refused).
MAX_COLUMNS = 10_000


def _parse_member(path: Path, reader: _MemberReader, spec: _FileSpec,
                  header_names: bool = False) -> tuple[pd.DataFrame, list[tuple[int, str, int]]]:
    """One data file as strings, columns named by term (plus id/coreid, member and row)."""
    data = reader.read(spec.location)
    encoding = "utf-8-sig" if spec.encoding.replace("_", "-").lower() in ("utf-8", "utf8") else spec.encoding
    try:
        text = data.decode(encoding)
    except (UnicodeDecodeError, LookupError) as exc:
        raise InputFileError(path, f"member '{spec.location}' is not {spec.encoding} text ({exc})") from None
    kwargs: dict[str, object] = {"delimiter": spec.delimiter}
    if spec.quote:
        kwargs["quotechar"] = spec.quote
    else:
        kwargs["quoting"] = csv.QUOTE_NONE
    reader_ = csv.reader(io.StringIO(text, newline=""), **kwargs)  # type: ignore[arg-type]
    header: list[str] = []
    try:
        with csv_field_limit(MAX_FIELD_CHARS):
            for _ in range(spec.header_lines):
                header = next(reader_, [])
            rows = [cells for cells in reader_ if cells and any(c.strip() for c in cells)]
    except csv.Error as exc:
        raise InputFileError(path, f"member '{spec.location}' cannot be parsed ({exc}); check its quoting") from None
    if header_names:
        names = [short_term(h) for h in header]
        if not names:
            raise InputFileError(path, f"member '{spec.location}' has no header row naming its terms")
        columns = {i: n for i, n in enumerate(names)}
        width = len(names)
    else:
        columns = dict(spec.fields)
        if spec.id_index is not None:
            columns.setdefault(spec.id_index, "id")
        width = max([*columns, spec.id_index or 0]) + 1 if columns else 0
    malformed: list[tuple[int, str, int]] = []
    fixed = rows
    for i, cells in enumerate(rows):
        if len(cells) < width or (header_names and len(cells) != width):
            malformed.append((i + 1, spec.delimiter.join(cells), len(cells)))
            fixed[i] = [""] * width
    grid = pd.DataFrame(fixed, dtype=object) if fixed else pd.DataFrame(columns=range(width), dtype=object)
    frame = pd.DataFrame({name: grid[idx] if idx in grid else "" for idx, name in columns.items()},
                         index=grid.index, dtype=object)
    if spec.id_index is not None:
        frame["id"] = grid[spec.id_index] if spec.id_index in grid else ""
    for name, value in spec.defaults.items():
        if name not in frame:
            frame[name] = value
        else:
            frame[name] = frame[name].where(frame[name].astype(str).str.strip() != "", value)
    frame[MEMBER_COLUMN] = spec.location
    frame[ROW_COLUMN] = np.arange(1, len(frame) + 1).astype(str)
    return frame.astype(object), malformed


def _join_events(
    path: Path, events: pd.DataFrame, ev_bad: list[tuple[int, str, int]],
    occ: pd.DataFrame, occ_bad: list[tuple[int, str, int]],
) -> tuple[pd.DataFrame, list[tuple[int, str]], list[tuple[int, str, int]]]:
    """Occurrences with their event's terms filled in, then one row per event without any."""
    ids = events["id"].astype(str).str.strip()
    dup = ids[ids.duplicated() & (ids != "")]
    if len(dup):
        raise InputFileError(path, f"event id '{dup.iloc[0]}' appears more than once in the event core; ids must be unique")
    events = events.assign(id=ids)
    if "eventID" not in events:
        events["eventID"] = ids
    else:
        events["eventID"] = events["eventID"].where(events["eventID"].astype(str).str.strip() != "", ids)
    coreid = occ["coreid"].astype(str).str.strip() if "coreid" in occ else occ["id"].astype(str).str.strip()
    known = coreid.isin(set(ids[ids != ""]))
    malformed_rows = np.zeros(len(occ), dtype=bool)
    malformed_rows[[r - 1 for r, *_ in occ_bad]] = True
    lost = np.flatnonzero(~known.to_numpy() & ~malformed_rows)
    member = occ[MEMBER_COLUMN].iloc[0] if len(occ) else "the occurrence file"
    orphans = [(int(i) + 1, f"occurrence row {i + 1} of {member} points to event '{coreid.iloc[i]}', "
                            "which is not in the event core") for i in lost]
    ev_terms = [c for c in events.columns if c not in ("id", MEMBER_COLUMN, ROW_COLUMN)]
    # blank ids (malformed core rows) repeat and join no occurrence: left out of the lookup
    lookup = events[events["id"] != ""].set_index("id")[ev_terms]
    joined = lookup.reindex(coreid.to_numpy())
    out = occ.copy()
    for col in ev_terms:
        from_event = joined[col].to_numpy(dtype=object)
        if col in out:
            empty = out[col].astype(str).str.strip().eq("").to_numpy()
            out[col] = np.where(empty & pd.notna(from_event), from_event, out[col].to_numpy(dtype=object))
        else:
            out[col] = np.where(pd.notna(from_event), from_event, "")
    # events with no occurrence: a checklist in which nothing was seen
    bare = events[~ids.isin(set(coreid))].copy()
    bare_rows = bare[ROW_COLUMN].astype(int).to_list()
    if len(bare):
        bare["coreid"] = bare["id"]
        for col in out.columns:
            if col not in bare:
                bare[col] = ""
        out = pd.concat([out, bare[out.columns]], ignore_index=True)
    n_occ = len(occ)
    ev_bad_text = {r: (text, n_fields) for r, text, n_fields in ev_bad}
    malformed = list(occ_bad) + [(n_occ + k + 1, *ev_bad_text[r]) for k, r in enumerate(bare_rows) if r in ev_bad_text]
    return out.fillna("").astype(object), orphans, malformed
