"""Mutations of valid delimited files and the oracle every fuzzed ingest must satisfy.

A mutation takes the bytes of a valid CSV file and breaks it the way files break in the
wild: a column deleted or two swapped, a wrong type or a hostile value in a cell, stray
delimiters and quotes, a byte-order mark, a line in another encoding, blank lines, a
truncated last line, the header repeated, other line endings. The oracle: harmonize either
refuses the file with one line naming it, or accounts for every data row: rows_read equals
the data rows counted here, apart from the code under test, with the csv module
(:func:`count_data_rows`), and every row is accepted or quarantined (one quarantine row per
rejected row). An internal error ("internal ... error", "please report this") is a bug,
never an acceptable refusal.
"""

from __future__ import annotations

import csv
import io
import json
import re
import shutil
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path

from hypothesis import strategies as st

from harmonize.errors import HarmonizeError
from harmonize.ingest import IngestResult, run
from harmonize.store import Store
from harmonize.study import Study

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"

#: kind -> (profile in fixtures/keldmar/profiles, role -> valid-but-messy fixture file).
#: One-table kinds use the role "rows".
TARGETS: dict[str, tuple[str, dict[str, Path]]] = {
    "trawl": ("trawl_agency", {"events": FIXTURES / "trawl" / "hauls_messy.csv",
                               "records": FIXTURES / "trawl" / "catch_messy.csv"}),
    "plankton": ("plankton_agency", {"events": FIXTURES / "plankton" / "tows_messy.csv",
                                     "records": FIXTURES / "plankton" / "counts_messy.csv"}),
    "transect": ("transect_agency", {"events": FIXTURES / "transect" / "segments_messy.csv",
                                     "records": FIXTURES / "transect" / "birds_messy.csv"}),
    "opportunistic": ("opportunistic_volunteer", {"rows": FIXTURES / "opportunistic" / "volunteer_messy.csv"}),
    "darwin_core": ("opportunistic_dwc", {"rows": FIXTURES / "opportunistic" / "portal_occurrences.csv"}),
    "effort": ("effort_pings", {"rows": FIXTURES / "effort" / "pings_hand.csv"}),
    "darwin_core_archive": ("opportunistic_dwc", {"rows": FIXTURES / "fuzz" / "dwca_sound.zip"}),
}

#: Cell values that have broken CSV readers, numeric parsers or SQL before.
NASTY_VALUES = [
    "", " ", "NaN", "nan", "inf", "-inf", "Infinity", "1e308", "1e400", "-1e400", "-0", "0",
    "-1", "-999999", "9" * 400, "0x1F", "1,5", "1.2.3", "١٢٣", "½", "TRUE", "null", "None",
    "2020-02-30", "1799-12-31", "0001-01-01", "9999-12-31T23:59:59", "2020-06-10T08:00:00+25:00",
    "2020-06-10T08:00:00Z", "10/06/2020", "\"", "\"\"", "'", ",", ";", "\t", "|", "\\",
    "\x00", "\r", "=HYPERLINK(\"http://x\")", "+1", "@SUM(A1)", "'; DROP TABLE ingests; --",
    "\" OR 1=1 --", "Robert'); DROP TABLE quarantine;--", "\u202eevil", "\ufeff", "é", "Ø",
    "x" * 5000, "🐟",
]


@dataclass(frozen=True)
class Mutation:
    """One way to break a file; ``apply`` works on the decoded text's parsed rows or bytes."""

    name: str
    args: tuple[int | str, ...]

    def __str__(self) -> str:
        return f"{self.name}{self.args}"


def _rows(data: bytes) -> list[list[str]]:
    return list(csv.reader(io.StringIO(data.decode("utf-8-sig"), newline="")))


def _unparse(rows: list[list[str]], newline: str = "\n") -> bytes:
    buf = io.StringIO(newline="")
    csv.writer(buf, lineterminator=newline).writerows(rows)
    return buf.getvalue().encode("utf-8")


def _lines(data: bytes) -> list[bytes]:
    return data.split(b"\n")


def _pick(seq_len: int, k: int | str) -> int:
    return int(k) % max(seq_len, 1)


def apply_mutation(data: bytes, m: Mutation) -> bytes:
    """The bytes of ``data`` broken by mutation ``m`` (deterministic)."""
    a = m.args
    if m.name in ("drop_column", "swap_header", "swap_columns", "set_cell", "duplicate_header",
                  "duplicate_row", "delete_row", "crlf", "blank_rows"):
        try:
            rows = _rows(data)
        except (UnicodeDecodeError, csv.Error):
            return data  # an earlier mutation made the file unparseable: leave it so
        if not rows or not rows[0]:
            return data
        width = len(rows[0])
        if m.name == "drop_column":
            j = _pick(width, a[0])
            return _unparse([r[:j] + r[j + 1:] for r in rows])
        if m.name == "swap_header":
            j, k = _pick(width, a[0]), _pick(width, a[1])
            head = list(rows[0])
            head[j], head[k] = head[k], head[j]
            return _unparse([head, *rows[1:]])
        if m.name == "swap_columns":  # data swapped, header kept: values land in the wrong field
            j, k = _pick(width, a[0]), _pick(width, a[1])
            out = [rows[0]]
            for r in rows[1:]:
                r = list(r)
                if max(j, k) < len(r):
                    r[j], r[k] = r[k], r[j]
                out.append(r)
            return _unparse(out)
        if m.name == "set_cell":
            i, j = 1 + _pick(len(rows) - 1, a[0]), _pick(width, a[1])
            if i >= len(rows) or j >= len(rows[i]):
                return data
            rows[i] = list(rows[i])
            rows[i][j] = str(a[2])
            return _unparse(rows)
        if m.name == "duplicate_header":
            i = 1 + _pick(len(rows), a[0])
            return _unparse(rows[:i] + [rows[0]] + rows[i:])
        if m.name == "duplicate_row":
            i = 1 + _pick(len(rows) - 1, a[0])
            return _unparse(rows[:i + 1] + rows[i:i + 1] + rows[i + 1:])
        if m.name == "delete_row":
            i = 1 + _pick(len(rows) - 1, a[0])
            return _unparse(rows[:i] + rows[i + 1:]) if len(rows) > 2 else data
        if m.name == "crlf":
            return _unparse(rows, "\r\n")
        if m.name == "blank_rows":
            i = 1 + _pick(len(rows), a[0])
            return _unparse(rows[:i] + [[], [""] * width] + rows[i:])
    lines = _lines(data)
    if m.name in ("stray_delimiter", "stray_quote", "insert_bytes"):
        i = _pick(len(lines), a[0])
        line = lines[i]
        p = _pick(len(line) + 1, a[1])
        token = {"stray_delimiter": b",", "stray_quote": b'"'}.get(m.name) or str(a[2]).encode("utf-8")
        lines[i] = line[:p] + token + line[p:]
        return b"\n".join(lines)
    if m.name == "bom":
        return b"\xef\xbb\xbf" + data
    if m.name == "latin1_line":  # one line re-encoded: a file of mixed encodings
        i = _pick(len(lines), a[0])
        lines[i] = lines[i].decode("utf-8", "replace").replace("e", "é", 1).encode("latin-1", "replace")
        return b"\n".join(lines)
    if m.name == "truncate":  # the last line cut short (a copy that stopped half-way)
        body = data.rstrip(b"\n")
        last = body.rfind(b"\n") + 1
        cut = last + _pick(len(body) - last, a[0])
        return body[:max(cut, last + 1)]
    if m.name == "semicolons":  # a spreadsheet's "CSV" in a locale with decimal commas
        return data.replace(b",", b";").replace(b".", b",")
    if m.name == "cr_only":
        return data.replace(b"\n", b"\r")
    if m.name == "utf16":
        return data.decode("utf-8", "replace").encode("utf-16")
    raise ValueError(f"unknown mutation {m.name}")


def mutations(exclude: frozenset[str] = frozenset()) -> st.SearchStrategy[Mutation]:
    """One mutation, with its positions and values drawn by hypothesis (minus ``exclude``)."""
    idx = st.integers(0, 1000)
    where = st.tuples(idx, idx)
    cells = st.one_of(st.sampled_from(NASTY_VALUES), st.text(max_size=30))
    if "line_breaks_in_cells" in exclude:
        cells = cells.filter(lambda v: "\r" not in v and "\n" not in v)
    strategies = {
        "drop_column": st.tuples(idx),
        "swap_header": where,
        "swap_columns": where,
        "set_cell": st.tuples(idx, idx, cells),
        "duplicate_header": st.tuples(idx),
        "duplicate_row": st.tuples(idx),
        "delete_row": st.tuples(idx),
        "blank_rows": st.tuples(idx),
        "crlf": st.just(()),
        "stray_delimiter": where,
        "stray_quote": where,
        "insert_bytes": st.tuples(idx, idx, st.sampled_from(
            ["\x00", "\ufeff", "\r", "\r\n", '",', ',"', "\u2028", "\x1a"])),
        "bom": st.just(()),
        "latin1_line": st.tuples(idx),
        "truncate": st.tuples(idx),
        "semicolons": st.just(()),
        "cr_only": st.just(()),
        "utf16": st.just(()),
    }
    return st.one_of(*(st.builds(Mutation, st.just(name), args)
                       for name, args in strategies.items() if name not in exclude))


#: Mutations that change where lines begin and end (blank lines, bare carriage returns,
#: quotes that join lines, line breaks written into a cell).
LINE_STRUCTURE = frozenset({"blank_rows", "cr_only", "insert_bytes", "stray_quote", "line_breaks_in_cells"})


def mutate_all(data: bytes, ms: list[Mutation]) -> bytes:
    for m in ms:
        data = apply_mutation(data, m)
    return data


# ---------------------------------------------------------------------------------- oracle
@dataclass
class Outcome:
    """What one fuzzed ingest did: refused with a message, or accounted for every row."""

    refused: str | None
    result: IngestResult | None


def check_outcome(study: Study, profile: str, inputs: Mapping[str, Path], *, write: bool = False,
                  replace: bool = True) -> Outcome:
    """Run one (possibly broken) ingest and assert the reliability contract on it.

    Anything but a HarmonizeError escaping is a bug (the test fails with it). A refusal must
    be one line naming one of the input files or the profile. A result must account for
    every row: rows_read = rows_accepted + rows_quarantined per file, one quarantine row per
    rejected row with a 1-based row number inside the file, a reason code and a one-line
    message.
    """
    try:
        result = run(study, profile, inputs, write=write, replace=replace)
    except HarmonizeError as exc:
        msg = str(exc)
        assert msg.strip(), "an error without a message"
        assert "\n" not in msg.strip(), f"the error is not one line: {msg!r}"
        assert not INTERNAL_ERROR.search(msg), f"an internal error is a bug, not a refusal: {msg!r}"
        names = [Path(p).name for p in inputs.values()] + [profile, Path(profile).stem]
        assert any(n in msg for n in names), f"the error does not name the file: {msg!r}"
        return Outcome(msg, None)
    assert_accounted(result)
    assert_rows_read(result, inputs)
    return Outcome(None, result)


#: Words of the tool's own errors that mean a bug in it (an accounting that does not add up).
INTERNAL_ERROR = re.compile(r"internal (accounting )?error|please report", re.IGNORECASE)
#: Delimiters a provider's text file may use (the most frequent on the header line wins).
DELIMITERS = (",", ";", "\t", "|")
TEXT_SUFFIXES = (".csv", ".txt", ".tsv", ".tab")


def count_data_rows(data: bytes) -> int | None:
    """The data rows of a delimited text file as a person counts them; None if it is not one.

    Independent of harmonize's readers: the bytes are decoded as UTF-8 (a byte-order mark
    allowed) and split into records by Python's csv module (a quoted cell may span lines;
    CR, LF and CRLF end a line); a record whose cells are all blank is no row; the first
    other record is the header and every later one a data row (a repeated header, a short or
    long row included: they are rows the ingest must quarantine). Common practice (RFC 4180
    with blank lines skipped, as spreadsheet programs show a file).
    """
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError:
        return None
    records = csv.reader(io.StringIO(text, newline=""), delimiter=_delimiter(text))
    try:
        filled = [r for r in records if any(cell.strip() for cell in r)]
    except csv.Error:
        return None
    return max(len(filled) - 1, 0) if filled else None


def _delimiter(text: str) -> str:
    header = next((line for line in io.StringIO(text, newline="") if line.strip()), "")
    counts = {d: header.count(d) for d in DELIMITERS}
    best = max(counts, key=lambda d: counts[d])
    return best if counts[best] else ","


def assert_rows_read(result: IngestResult, inputs: Mapping[str, Path]) -> None:
    """rows_read of each delimited text input equals the data rows counted by the test."""
    paths = {Path(p).name: Path(p) for p in inputs.values()}
    for f in result.files:
        path = paths.get(f.path.name)
        if path is None or path.suffix.lower() not in TEXT_SUFFIXES:
            continue
        expected = count_data_rows(path.read_bytes())
        if expected is not None:
            assert f.rows_read == expected, (f"{f.path.name}: rows_read {f.rows_read}, "
                                             f"but the file holds {expected} data rows")


def assert_accounted(result: IngestResult) -> None:
    """Every row of every input file accepted or quarantined, with reasons and one-line messages."""
    q = result.quarantine
    masked = result.masked
    for f in result.files:
        assert f.rows_read == f.rows_accepted + f.rows_quarantined, f
        assert f.rows_read >= 0 and f.rows_accepted >= 0 and f.rows_quarantined >= 0, f
        part = q[q["source_file"] == f.path.name] if len(q) else q
        n_masked = int(masked.loc[masked["source_file"] == f.path.name, "n_values"].sum()) if len(masked) else 0
        assert len(part) + n_masked == f.rows_quarantined, (f, len(part), n_masked)
        if len(part):
            rows = part["source_row"].astype("int64")
            assert rows.is_unique, f"a row quarantined twice in {f.path.name}"
            assert rows.between(1, f.rows_read).all(), f"quarantine row numbers outside 1..{f.rows_read}"
    if len(q):
        assert q["reason_code"].notna().all() and (q["reason_code"].str.len() > 0).all()
        msgs = q["message"].astype(str)
        assert (msgs.str.strip().str.len() > 0).all(), "an empty quarantine message"
        multi = msgs[msgs.str.contains("\n|\r", regex=True)]
        assert multi.empty, f"quarantine messages span lines: {multi.head(3).tolist()!r}"
        for raw in q["raw"].head(50):
            json.loads(raw)  # the raw row is kept as valid JSON text


def store_state(store: Store) -> tuple[object, ...]:
    """What a refused ingest must leave as it was: the ingests, the quarantine, the parquet files."""
    folder = store.directory / "observations"
    files = sorted((str(p.relative_to(store.directory)), p.stat().st_size) for p in folder.rglob("*.parquet")) \
        if folder.is_dir() else []
    if not store.exists():
        return (None, None, files)
    with store.connect(read_only=True, view=False) as con:
        ingests = con.execute("SELECT ingest_id, status, rows_read, rows_accepted, rows_quarantined, "
                              "records_written FROM ingests ORDER BY ingest_id").fetchall()
        quarantined = con.execute("SELECT count(*) FROM quarantine").fetchall()[0][0]
    return (ingests, quarantined, files)


def write_inputs(folder: Path, originals: Mapping[str, Path], broken: Mapping[str, bytes]) -> dict[str, Path]:
    """Write the (mutated) inputs of one example into ``folder`` under their original names."""
    folder.mkdir(parents=True, exist_ok=True)
    out = {}
    for role, src in originals.items():
        target = folder / src.name
        if role in broken:
            target.write_bytes(broken[role])
        else:
            shutil.copyfile(src, target)
        out[role] = target
    return out


def reason_counts(result: IngestResult) -> dict[str, int]:
    return {str(k): int(v) for k, v in result.reasons().items()}

