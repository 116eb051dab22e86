"""Shared reading and field validation for tabular adapters.

Files are read as text (every cell a string) so that a bad cell can be reported with its
row, column and content; fields are then typed, unit-converted and checked against the
adapter's Table Schema with pandera, and every failure becomes a quarantine entry.
"""

from __future__ import annotations

import codecs
import csv
import difflib
import io
import json
from collections.abc import Iterable, Iterator, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pandera.errors

from harmonize import units
from harmonize.adapters.provider_formats import parse_angles, parse_fractions
from harmonize.clock import clock_change_message, localize
from harmonize.config_spec import COORDINATE_FORMATS, FRACTION_FORMATS, is_coordinate, is_fraction
from harmonize.contract import FieldSpec, pandera_schema
from harmonize.errors import ConfigError, InputFileError, ReasonCode, one_line
from harmonize.files import file_sha256  # noqa: F401  (re-exported: adapters hash their inputs with it)
from harmonize.profile import Profile

NA_TOKENS = frozenset({"", "na", "n/a", "nan", "null", "none", "-"})
_TRUE = frozenset({"true", "t", "yes", "y", "1"})
_FALSE = frozenset({"false", "f", "no", "n", "0"})
MAX_FIELD_CHARS = 1_000_000


@contextmanager
def csv_field_limit(limit: int = MAX_FIELD_CHARS) -> Iterator[None]:
    """The csv module's field size limit (process-wide) at ``limit`` for the ``with`` block only.

    The csv module keeps one limit for the whole process (128 KiB by default); the readers
    raise it while they parse and put the caller's limit back afterwards.
    """
    previous = csv.field_size_limit(limit)
    try:
        yield
    finally:
        csv.field_size_limit(previous)
#: A physical line longer than this is refused before parsing: a delimited file with such a
#: line is not tabular data (one endless line: wrong line endings, a binary or hostile file).
MAX_LINE_BYTES = 16 << 20
EARLIEST_TIME = "1800-01-01"


@dataclass
class RawTable:
    """One input file as text: original column names, one string per cell."""

    path: Path
    role: str
    frame: pd.DataFrame
    sha256: str
    #: Data rows of the file, once :meth:`keep_only` has dropped the text of the others.
    rows: int | None = None

    @property
    def n_rows(self) -> int:
        return len(self.frame) if self.rows is None else self.rows

    def keep_only(self, keep: np.ndarray) -> None:
        """Drop the text of the rows not in the mask ``keep`` (the file's row count stays).

        Adapters call it once every rejection is known, with the rejected rows: the
        quarantine needs their raw text, and the text of all other rows is memory spent.
        """
        n = self.n_rows
        positions = np.flatnonzero(keep)
        self.frame = self.frame.iloc[positions].set_axis(pd.Index(positions), axis=0)
        self.rows = n

    def raw_json(self, positions: np.ndarray) -> list[str]:
        """The rows at ``positions`` as JSON objects keyed by the provider's column names."""
        sub = self.frame.iloc[positions] if self.rows is None else self.frame.loc[positions]
        return [json.dumps(rec, ensure_ascii=False) for rec in sub.to_dict("records")]


def read_table(path: Path, profile: Profile, role: str) -> tuple[RawTable, list[tuple[int, str, int]]]:
    """Read a CSV/TSV (or parquet) file as strings.

    Returns the table and the malformed lines (1-based data row, raw text, number of fields
    found) whose number of fields differs from the header; those rows stay in the table (all cells empty except
    a marker) so that the caller quarantines them and the row numbering stays intact.

    Raises
    ------
    InputFileError
        Empty file, undecodable text, no header, duplicate column names.
    """
    path = Path(path)
    if not path.is_file():
        raise InputFileError(path, "no such file")
    if path.suffix.lower() != ".parquet":
        refuse_long_lines(path)  # before anything reads the whole file
    sha = file_sha256(path)
    if path.suffix.lower() == ".parquet":
        import pyarrow.parquet as pq

        frame = pq.read_table(path).to_pandas().astype("string")
        frame = frame.fillna("")
        return RawTable(path, role, frame.astype(object), sha), []

    fast = _read_csv_arrow(path, profile)
    if fast is not None:
        _check_header_names(path, list(fast.columns))
        return RawTable(path, role, fast, sha), []
    with LineReader(path, profile) as reader:
        rows: list[list[str]] = []
        malformed: list[tuple[int, str, int]] = []
        for block in reader.blocks():
            rows.extend(block.rows)
            malformed.extend(block.malformed)
        header = reader.header
    if not rows:
        raise InputFileError(path, "the file has a header but no data rows")
    frame = pd.DataFrame(rows, columns=header, dtype=object)
    return RawTable(path, role, frame, sha), malformed


@dataclass
class LineBlock:
    """Consecutive data rows read by :class:`LineReader`.

    ``rows`` holds one list of cells per data row, as many cells as the header; a malformed
    row (another number of fields) keeps its place with every cell empty and is listed in
    ``malformed`` as (1-based data row, raw text, number of fields found).
    """

    first_row: int
    rows: list[list[str]]
    malformed: list[tuple[int, str, int]]


class LineReader:
    """The line-by-line reader of delimited text: the reference for row numbers.

    Data rows are numbered as a person counts them: the first non-blank row is the header,
    and a row whose cells are all blank (an empty line, a line of spaces, a line made only
    of delimiters) is not a data row and takes no number. A quoted cell may span lines; a
    bare carriage return ends a line, as a line feed does. The file is read in a streaming
    way (one line at a time, rows handed out in blocks), so memory stays bounded whatever
    its size; a line longer than ``MAX_LINE_BYTES`` characters is refused.

    Raises
    ------
    InputFileError
        Empty file, undecodable text, no header, a header name spanning lines or repeated,
        text that cannot be parsed as CSV (a field over ``MAX_FIELD_CHARS``).
    """

    def __init__(self, path: Path, profile: Profile) -> None:
        self.path = Path(path)
        self.profile = profile
        self.encoding = ("utf-8-sig" if profile.encoding.lower().replace("_", "-") in ("utf-8", "utf8")
                         else profile.encoding)
        self._fh = open(self.path, "rb")  # noqa: SIM115 (closed by close())
        self._text = io.TextIOWrapper(self._fh, encoding=self.encoding, newline="")
        self._line = 0
        self._rows = 0
        try:
            self.delimiter = profile.delimiter or _sniff_delimiter(self._head(), self.path)
            self._reader = csv.reader(self._lines(), delimiter=self.delimiter)
            with csv_field_limit():
                self.header = self._read_header()
        except BaseException:
            self.close()
            raise
        self.width = len(self.header)

    def __enter__(self) -> LineReader:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        """Close the file."""
        self._text.close()
        self._fh.close()

    def _head(self) -> str:
        """The first lines of the text, to find the delimiter (the stream is rewound)."""
        with open(self.path, "rb") as fh:
            head = fh.read(_HEAD_BYTES)
        if not head.strip() and len(head) < _HEAD_BYTES:
            raise InputFileError(self.path, "the file is empty; expected a header row and data rows")
        try:
            return head.decode(self.encoding)
        except UnicodeDecodeError as exc:
            if exc.start < len(head) - 4:  # not a character cut by the end of the window
                self._undecodable()
            return head[:exc.start].decode(self.encoding, errors="ignore")

    def _lines(self):  # type: ignore[no-untyped-def]
        """Physical lines of the text (line ends kept), refusing one that is too long."""
        try:
            while line := self._text.readline(MAX_LINE_BYTES + 1):
                self._line += 1
                if len(line) > MAX_LINE_BYTES:
                    raise InputFileError(
                        self.path,
                        f"line {self._line} is longer than {MAX_LINE_BYTES / 2**20:g} MiB; this is not a "
                        "delimited text file with one record per line (check the line endings, or that "
                        "the right file was given)",
                    )
                yield line
        except UnicodeDecodeError:
            self._undecodable()

    def _undecodable(self) -> None:
        """Refuse the file, naming its first byte that is not valid text in its encoding."""
        # plain UTF-8 for utf-8-sig: a byte-order mark is valid UTF-8, and offsets stay file offsets
        decoder = codecs.getincrementaldecoder("utf-8" if self.encoding == "utf-8-sig" else self.encoding)()
        offset = 0
        lines = 1
        first = b""
        with open(self.path, "rb") as fh:
            while block := fh.read(1 << 20):
                first = first or block[:2]
                pending = decoder.getstate()[0]
                try:
                    decoder.decode(block)
                except UnicodeDecodeError as exc:
                    data = pending + block
                    at = offset - len(pending) + exc.start
                    lines += data.count(b"\n", 0, exc.start) - pending.count(b"\n")
                    hint = ("\"utf-16\"; the file starts with a UTF-16 byte-order mark"
                            if first in (b"\xff\xfe", b"\xfe\xff") else "\"latin-1\"")
                    raise InputFileError(
                        self.path,
                        f"is not valid {self.profile.encoding} text (byte 0x{data[exc.start]:02x} at offset "
                        f"{at}); re-save it as UTF-8 or set [source] encoding in the profile (e.g. {hint}); "
                        f"the first such byte is on line {lines}",
                    ) from None
                offset += len(block)
                lines += block.count(b"\n")
        raise InputFileError(self.path, f"is not valid {self.profile.encoding} text; re-save it as UTF-8 "
                                        "or set [source] encoding in the profile")

    def _read_header(self) -> list[str]:
        try:
            header = next(self._reader)
            while not any(c.strip() for c in header):
                header = next(self._reader)
        except StopIteration:
            raise InputFileError(self.path, "the file has no header row") from None
        except csv.Error as exc:
            raise InputFileError(self.path, f"the header row cannot be read ({exc})") from None
        header = [h.strip().lstrip("\ufeff") for h in header]
        _check_header_names(self.path, header)
        seen: set[str] = set()  # one pass: header.count(h) per name was quadratic in the width
        dupes = sorted({h for h in header if h and (h in seen or seen.add(h))})
        if dupes:
            raise InputFileError(self.path, f"column name(s) {dupes} appear more than once in the header")
        return header

    def blocks(self, size: int = 100_000) -> Iterator[LineBlock]:
        """The data rows, ``size`` at a time."""
        width = self.width
        rows: list[list[str]] = []
        malformed: list[tuple[int, str, int]] = []
        first = self._rows + 1
        previous = csv.field_size_limit(MAX_FIELD_CHARS)  # set while this reader parses only
        try:
            for cells in self._reader:
                if not cells or not any(c.strip() for c in cells):
                    continue  # blank lines are not data rows
                self._rows += 1
                if len(cells) != width:
                    malformed.append((self._rows, self.delimiter.join(cells), len(cells)))
                    cells = [""] * width
                rows.append(cells)
                if len(rows) >= size:
                    csv.field_size_limit(previous)  # the caller's limit while it holds the block
                    yield LineBlock(first, rows, malformed)
                    previous = csv.field_size_limit(MAX_FIELD_CHARS)
                    rows, malformed, first = [], [], self._rows + 1
        except csv.Error as exc:
            raise InputFileError(
                self.path, f"cannot be parsed as CSV after data row {self._rows} ({exc}); check quoting"
            ) from None
        finally:
            csv.field_size_limit(previous)
        if rows:
            yield LineBlock(first, rows, malformed)


def read_header(path: Path, profile: Profile) -> tuple[list[str], str]:
    """The header of a delimited text file and its delimiter, as :class:`LineReader` reads them.

    Reads only the first lines. Raises InputFileError as :class:`LineReader` does.
    """
    with LineReader(path, profile) as reader:
        return reader.header, reader.delimiter


#: Bytes read to find the delimiter and the header's width before the fast reader runs.
_HEAD_BYTES = 1 << 16


def _read_csv_arrow(path: Path, profile: Profile) -> pd.DataFrame | None:
    """The data rows of a well-formed UTF-8 CSV file as text, read by Arrow's CSV reader.

    Returns None whenever the file needs the line-by-line reader below (another encoding,
    rows whose number of fields differs from the header's, undecodable bytes, a header that
    is missing or repeats a name, no data rows): that reader then gives the row numbers,
    malformed-line accounting and messages. On files it accepts, the result equals the
    line-by-line reader's: blank rows (no cell with more than whitespace) are skipped and
    not counted, the first other row is the header, every cell is a string.
    """
    import pyarrow as pa
    import pyarrow.csv as pacsv

    if profile.encoding.lower().replace("_", "-") not in ("utf-8", "utf8"):
        return None
    with open(path, "rb") as fh:
        head = fh.read(_HEAD_BYTES)
    text = head.decode("utf-8-sig", errors="ignore")
    if len(head) == _HEAD_BYTES and "\n" not in text and "\r" not in text:
        return None  # a first line longer than the sniffing window
    delimiter = profile.delimiter or _sniff_delimiter(text, path)
    if len(delimiter) != 1:
        return None
    try:
        first = next((c for c in csv.reader(io.StringIO(text, newline=""), delimiter=delimiter)
                      if any(x.strip() for x in c)), None)
    except csv.Error:
        return None
    if not first:
        return None
    width = len(first)
    try:  # a row with another number of fields than the first raises: the line reader takes over
        table = pacsv.read_csv(
            path,
            read_options=pacsv.ReadOptions(autogenerate_column_names=True, block_size=1 << 24),
            parse_options=pacsv.ParseOptions(delimiter=delimiter, newlines_in_values=True),
            convert_options=pacsv.ConvertOptions(
                column_types={f"f{i}": pa.string() for i in range(width)},
                strings_can_be_null=False, quoted_strings_can_be_null=False),
        )
    except (pa.ArrowException, OSError):
        return None
    if table.num_columns != width:
        return None
    # rows whose cells are all blank are not data rows (nor a header)
    blank = None
    for column in table.columns:
        empty = pa.compute.equal(pa.compute.utf8_trim_whitespace(column), "")
        blank = empty if blank is None else pa.compute.and_(blank, empty)
    if blank is not None and pa.compute.any(blank).as_py():
        table = table.filter(pa.compute.invert(blank))
    if table.num_rows < 2:
        return None
    header = [str(h).strip().lstrip("\ufeff") for h in table.slice(0, 1).to_pylist()[0].values()]
    if len(set(header)) != len(header):
        return None
    body = table.slice(1)
    # Arrow-backed text columns: a tenth of the memory of one Python str per cell
    # (wrapped without copying: no Python string is made per cell)
    text = pd.StringDtype("pyarrow", na_value=np.nan)
    return pd.DataFrame({name: pd.Series(pd.arrays.ArrowStringArray(body.column(i).combine_chunks(), dtype=text))
                         for i, name in enumerate(header)})


def refuse_long_lines(path: Path, limit: int = MAX_LINE_BYTES, block_size: int = 1 << 20) -> None:
    """Refuse a file with a physical line longer than ``limit`` bytes, reading it in blocks.

    Memory stays at one block whatever the file holds; the scan stops at the first line
    that is too long, so a 1 GB single-line file costs ``limit`` bytes of reading.

    Raises
    ------
    InputFileError
        Naming the line and the limit.
    """
    block_size = min(block_size, limit)
    run = 0  # bytes since the last line break
    line = 1
    with open(path, "rb") as fh:
        while block := fh.read(block_size):
            last = max(block.rfind(b"\n"), block.rfind(b"\r"))
            if last < 0:
                run += len(block)
            else:
                firsts = [i for i in (block.find(b"\n"), block.find(b"\r")) if i >= 0]
                if run + min(firsts) > limit:
                    break
                line += block.count(b"\n")
                # lines inside one block are shorter than the block, and the block is below the limit
                run = len(block) - last - 1
            if run > limit:
                break
        else:
            return
    raise InputFileError(
        path,
        f"line {line} is longer than {limit / 2**20:g} MiB; this is not a delimited text file with "
        "one record per line (check the line endings, or that the right file was given)",
    )


#: Column names an error message lists at most.
MAX_LISTED_COLUMNS = 40


def _check_header_names(path: Path, header: Sequence[str]) -> None:
    """Refuse a header whose column names span lines (an unclosed quote swallowed the rows)."""
    broken = [h for h in header if "\n" in h or "\r" in h]
    if broken:
        raise InputFileError(
            path,
            f"the header row has a column name that spans lines ('{_short(broken[0])}'); "
            "a quote in the header is probably not closed",
        )


def _sniff_delimiter(text: str, path: Path) -> str:
    if path.suffix.lower() in (".tsv", ".tab"):
        return "\t"
    first = text.lstrip("\ufeff").splitlines()[0] if text else ""
    counts = {d: first.count(d) for d in (",", ";", "\t", "|")}
    best = max(counts, key=lambda d: counts[d])
    return best if counts[best] > 0 else ","


class Rejections:
    """Collects rejected rows; the first reason given for a row is the one stored."""

    def __init__(self) -> None:
        self._parts: list[pd.DataFrame] = []
        #: (file name, latitudes, longitudes) of every position read, rejected rows included
        self.positions: list[tuple[str, np.ndarray, np.ndarray]] = []

    def add(
        self,
        role: str,
        positions: Iterable[int] | np.ndarray,
        reason: ReasonCode,
        messages: str | Sequence[str] | pd.Series,
    ) -> None:
        pos = np.asarray(list(positions) if not isinstance(positions, np.ndarray) else positions, dtype=np.int64)
        if pos.size == 0:
            return
        if isinstance(messages, str):
            msgs: Any = [messages] * pos.size
        else:
            msgs = list(messages)
        self._parts.append(
            pd.DataFrame({"role": role, "pos": pos, "reason_code": str(reason), "message": msgs})
        )

    def _all(self) -> pd.DataFrame:
        if not self._parts:
            return pd.DataFrame({"role": [], "pos": np.array([], dtype=np.int64), "reason_code": [], "message": []})
        return pd.concat(self._parts, ignore_index=True)

    def mask(self, role: str, n: int) -> np.ndarray:
        """Boolean mask over the ``n`` rows of a table: True where rejected."""
        out = np.zeros(n, dtype=bool)
        for part in self._parts:
            sel = part["pos"].to_numpy()[part["role"].to_numpy() == role]
            out[sel] = True
        return out

    def count(self, role: str) -> int:
        allr = self._all()
        return int(allr.loc[allr["role"] == role, "pos"].nunique())

    def first_reasons(self, role: str) -> pd.DataFrame:
        """pos, reason_code, message of each rejected row of a table (first reason)."""
        allr = self._all()
        return allr[allr["role"] == role].drop_duplicates("pos")[["pos", "reason_code", "message"]]

    def to_frame(self, tables: Sequence[RawTable]) -> pd.DataFrame:
        """The quarantine rows: source_file, source_row, reason_code, message, raw."""
        allr = self._all()
        out = []
        for table in tables:
            part = allr[allr["role"] == table.role]
            if part.empty:
                continue
            grouped = part.groupby("pos", sort=True)
            first = grouped.first()
            n_more = grouped.size() - 1
            extra = grouped["message"].agg(lambda m: "; also: " + "; ".join(list(dict.fromkeys(m))[1:3]) if len(set(m)) > 1 else "")
            pos = first.index.to_numpy()
            out.append(
                pd.DataFrame(
                    {
                        "source_file": table.path.name,
                        "source_row": pos + 1,
                        "reason_code": first["reason_code"].to_numpy(),
                        "message": (first["message"] + extra).to_numpy(),
                        "raw": table.raw_json(pos),
                        "n_problems": (n_more + 1).to_numpy(),
                    }
                )
            )
        if not out:
            return pd.DataFrame(
                {"source_file": [], "source_row": np.array([], dtype=np.int64), "reason_code": [],
                 "message": [], "raw": [], "n_problems": np.array([], dtype=np.int64)}
            )
        return pd.concat(out, ignore_index=True)


def resolve_columns(
    table: RawTable, specs: Sequence[FieldSpec], profile: Profile
) -> dict[str, Any]:
    """Adapter field -> file column for the fields this file provides.

    A date-time field the profile maps to two columns ([date, time]) gives a tuple of both.

    A field the profile maps must exist in the file; an unmapped field is looked for under
    its own name (case-insensitive). A required field with neither column nor constant is
    an error naming the profile section to fill in.
    """
    mapping = dict(profile.column_map(table.role))
    columns = list(table.frame.columns)
    by_fold = {c.casefold(): c for c in columns}
    section = "[columns]" if table.role == "rows" else f"[columns.{table.role}]"
    found: dict[str, str] = {}
    for spec in specs:
        if spec.name in mapping:
            wanted = mapping[spec.name]
            if isinstance(wanted, tuple) and spec.type != "datetime":
                raise ConfigError(profile.path, f"{section[1:-1]}.{spec.name}",
                                  "two columns (date, time) can be joined for a date-time field only")
            actual_cols = []
            for col in (wanted if isinstance(wanted, tuple) else (wanted,)):
                actual = col if col in columns else by_fold.get(col.casefold())
                if actual is None:
                    # closest names among a bounded number of columns (a hostile header has millions)
                    close = difflib.get_close_matches(col, columns[:MAX_LISTED_COLUMNS * 500], n=3)
                    hint = f" (closest: {', '.join(close)})" if close else ""
                    listed = ", ".join(columns[:MAX_LISTED_COLUMNS])
                    if len(columns) > MAX_LISTED_COLUMNS:
                        listed += f", ... ({len(columns):,} columns in all)"
                    raise InputFileError(
                        table.path,
                        f"column '{col}', which {profile.path.name} {section} maps to field "
                        f"'{spec.name}', is not in the file{hint}; columns are: {one_line(listed)}",
                    )
                actual_cols.append(actual)
            found[spec.name] = actual_cols[0] if len(actual_cols) == 1 else tuple(actual_cols)
        elif spec.name.casefold() in by_fold:
            found[spec.name] = by_fold[spec.name.casefold()]
        elif spec.required and spec.name not in profile.constants:
            raise InputFileError(
                table.path,
                f"required field '{spec.name}' ({spec.description.rstrip('.')}) has no column; "
                f"map it in {section} of {profile.path.name} or add a column named '{spec.name}'. "
                f"Columns are: {', '.join(columns)}",
            )
    return found


def coerce_fields(
    table: RawTable,
    specs: Sequence[FieldSpec],
    profile: Profile,
    rejections: Rejections,
    schema_name: str,
    malformed: Sequence[tuple[int, str, int]] = (),
) -> pd.DataFrame:
    """Typed, unit-converted field frame of a table, with bad cells sent to ``rejections``.

    Columns are the adapter's field names (absent optional fields are all-null columns);
    the index is the 0-based position of the row in the file.
    """
    found = resolve_columns(table, specs, profile)
    n = table.n_rows
    if malformed:
        pos = np.array([r - 1 for r, *_ in malformed])
        rejections.add(
            table.role, pos, ReasonCode.BAD_TYPE,
            [f"row has a different number of fields than the header ({n_fields} instead of "
             f"{len(table.frame.columns)}); check delimiters and quotes" for _, _, n_fields in malformed],
        )
    out: dict[str, pd.Series] = {}
    for spec in specs:
        if spec.name in found and isinstance(found[spec.name], tuple):
            # date and time in two columns: "2021-06-14" + "08:30" -> "2021-06-14 08:30"
            date_col, time_col = found[spec.name]
            day = table.frame[date_col].astype("string").str.strip()
            clock = table.frame[time_col].astype("string").str.strip()
            day, clock = day.mask(_na_tokens(day)), clock.mask(_na_tokens(clock))
            text = (day + " " + clock.fillna("")).str.strip()
            null = day.isna()
            text = text.mask(null)
            label = f"{spec.name} (columns '{date_col}' + '{time_col}')"
        elif spec.name in found:
            col = found[spec.name]
            text = table.frame[col].astype("string").str.strip()
            null = _na_tokens(text)
            text = text.mask(null)
            label = f"{spec.name} (column '{col}')" if col != spec.name else f"column '{col}'"
        elif spec.name in profile.constants:
            text = pd.Series([str(profile.constants[spec.name])] * n, dtype="string")
            null = pd.Series(np.zeros(n, dtype=bool))
            label = f"{spec.name} (constant in {profile.path.name})"
        else:
            out[spec.name] = _empty(spec, n)
            continue
        out[spec.name] = _typed(text, null, spec, label, table, profile, rejections)
    frame = pd.DataFrame(out, index=pd.RangeIndex(n))
    _check_constraints(frame, specs, found, table, rejections, schema_name, profile)
    for spec in specs:  # lat/lon, start_lat/start_lon, end_lat/end_lon
        if spec.name.endswith("lat") and spec.name[:-3] + "lon" in frame and spec.name in found:
            rejections.positions.append((table.path.name, frame[spec.name].to_numpy(dtype=float, na_value=np.nan),
                                         frame[spec.name[:-3] + "lon"].to_numpy(dtype=float, na_value=np.nan)))
    return frame


_TOKEN_CHARS = max(len(t) for t in NA_TOKENS)
#: Plain decimal numbers, which Arrow's parser and pandas' read the same way.
_PLAIN_NUMBER = r"^[+-]?(?:[0-9]+\.?[0-9]*|\.[0-9]+)(?:[eE][+-]?[0-9]+)?$"


def _na_tokens(text: pd.Series) -> pd.Series:
    """True where the (stripped) text is missing or one of the NA_TOKENS, in any case.

    Case folding never shortens a string, so only strings as short as the longest token
    are folded (in Python); the length test runs in Arrow.
    """
    short = (text.str.len() <= _TOKEN_CHARS).fillna(False)
    null = text.isna().to_numpy().copy()
    if short.any():
        null[short.to_numpy()] = text[short].str.casefold().isin(NA_TOKENS).to_numpy()
    return pd.Series(null, index=text.index)


def to_float(text: pd.Series) -> pd.Series:
    """``pd.to_numeric(text, errors="coerce")`` as float64, with plain numbers parsed by Arrow.

    Cells that are plain decimal numbers (the bulk of any file) are cast in Arrow, several
    times faster; every other cell (``1e999``, ``inf``, words) goes through pandas, so the
    result and the cells that fail are those of ``pd.to_numeric``.
    """
    import pyarrow as pa
    import pyarrow.compute as pc

    try:
        arr = pa.array(text, type=pa.string(), from_pandas=True)
        plain = pc.fill_null(pc.match_substring_regex(arr, _PLAIN_NUMBER), False)
        out = np.array(pc.cast(pc.if_else(plain, arr, pa.scalar(None, pa.string())), pa.float64())
                       .to_numpy(zero_copy_only=False), dtype="float64", copy=True)
        rest = ~plain.to_numpy(zero_copy_only=False) & text.notna().to_numpy()
    except (pa.ArrowInvalid, pa.ArrowTypeError, TypeError, ValueError):
        return pd.to_numeric(text, errors="coerce").astype("float64")
    if rest.any():
        out[rest] = pd.to_numeric(text[rest], errors="coerce").astype("float64").to_numpy()
    return pd.Series(out, index=text.index)


def _empty(spec: FieldSpec, n: int) -> pd.Series:
    if spec.type == "number":
        return pd.Series(np.full(n, np.nan))
    if spec.type == "datetime":
        return pd.Series(pd.NaT, index=range(n), dtype="datetime64[us]")
    if spec.type == "boolean":
        return pd.Series([pd.NA] * n, dtype="boolean")
    if spec.type == "integer":
        return pd.Series([pd.NA] * n, dtype="Int64")
    return pd.Series([pd.NA] * n, dtype="string")


def _typed(
    text: pd.Series,
    null: pd.Series,
    spec: FieldSpec,
    label: str,
    table: RawTable,
    profile: Profile,
    rejections: Rejections,
) -> pd.Series:
    role = table.role
    if spec.type in ("number", "integer"):
        fmt = profile.formats.get(spec.name, "decimal")
        _check_format(spec, fmt, profile)
        if fmt in ("degrees_minutes", "degrees_minutes_seconds"):
            values, bad, messages = parse_angles(text, fmt, "lat" if spec.unit == "degree_north" else "lon")
            if bad.any():
                rejections.add(role, np.flatnonzero(bad), ReasonCode.BAD_TYPE, [f"{label}: {m}" for m in messages])
            return values
        values = to_float(text)
        if _is_fraction(spec):
            values = parse_fractions(text, values, fmt)
        bad = (~null & values.isna()).to_numpy()
        if bad.any():
            what = "a number, a fraction such as 1/4 or a percentage such as 25%" if _is_fraction(spec) else "a number"
            rejections.add(
                role, np.flatnonzero(bad), ReasonCode.BAD_TYPE,
                [f"{label} holds '{_short(v)}', which is not {what}" for v in text[bad]],
            )
        infinite = np.isinf(values.to_numpy())
        if infinite.any():
            rejections.add(role, np.flatnonzero(infinite), ReasonCode.OUT_OF_RANGE, f"{label} is not a finite number")
            values = values.mask(infinite)
        if spec.dimension and spec.name in profile.units:
            unit = profile.units[spec.name]
            try:
                converted = units.to_canonical(values.to_numpy(), spec.dimension, unit)
            except units.UnitError as exc:
                raise ConfigError(profile.path, f"[units] {spec.name}", str(exc)) from None
            values = pd.Series(converted, index=values.index)
        if spec.type == "integer":
            frac = (values % 1 != 0) & values.notna()
            if frac.any():
                rejections.add(role, np.flatnonzero(frac.to_numpy()), ReasonCode.BAD_TYPE, f"{label} must be a whole number")
        return values
    if spec.type == "boolean":
        folded = text.str.casefold()
        values = pd.Series(pd.NA, index=text.index, dtype="boolean")
        values[folded.isin(_TRUE).fillna(False).to_numpy()] = True
        values[folded.isin(_FALSE).fillna(False).to_numpy()] = False
        bad = (~null & values.isna()).to_numpy()
        if bad.any():
            rejections.add(
                role, np.flatnonzero(bad), ReasonCode.BAD_TYPE,
                [f"{label} holds '{_short(v)}'; expected true or false" for v in text[bad]],
            )
        return values
    if spec.type == "datetime":
        values, bad, future, twice, never = parse_times(text, profile)
        for mask, reason, kind in ((twice, ReasonCode.AMBIGUOUS_LOCAL_TIME, "ambiguous"),
                                   (never, ReasonCode.NONEXISTENT_LOCAL_TIME, "nonexistent")):
            if mask.any():
                local = pd.to_datetime(text[mask], format=profile.time_format or "mixed", dayfirst=profile.dayfirst)
                rejections.add(role, np.flatnonzero(mask), reason,
                               [clock_change_message(label, _short(v), t, profile.timezone, kind)
                                for v, t in zip(text[mask], local, strict=True)])
        if bad.any():
            rejections.add(
                role, np.flatnonzero(bad), ReasonCode.BAD_TIME,
                [f"{label} holds '{_short(v)}', which is not a date-time after {EARLIEST_TIME[:4]} (expected e.g. 2021-06-14T08:30)" for v in text[bad]],
            )
        if future.any():
            rejections.add(role, np.flatnonzero(future), ReasonCode.BAD_TIME, f"{label} lies in the future")
        return values
    return text.astype("string")


def _is_fraction(spec: FieldSpec) -> bool:
    return is_fraction(spec.type, spec.unit, spec.maximum)


def _check_format(spec: FieldSpec, fmt: str, profile: Profile) -> None:
    """The profile's [formats] entry must suit the field (ConfigError naming the key)."""
    if fmt == "decimal":
        return
    if is_coordinate(spec.unit):
        allowed = COORDINATE_FORMATS
    elif _is_fraction(spec):
        allowed = FRACTION_FORMATS
    else:
        allowed = ("decimal",)
    if fmt not in allowed:
        raise ConfigError(profile.path, f"formats.{spec.name}",
                          f"'{fmt}' does not apply to {spec.name}; expected one of {', '.join(allowed)}")


#: A date without a time (see parse_times): it never carries an offset.
_DATE_ALONE = r"\s*\d{1,4}[-/.]\d{1,2}[-/.]\d{1,4}\s*"


def parse_times(text: pd.Series, profile: Profile
                ) -> tuple[pd.Series, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Parse date-time strings into naive UTC timestamps (microseconds, years 1800-9999).

    Strings with an offset (Z, +02:00) are converted to UTC; strings without one are read in
    the profile's time zone (:func:`harmonize.clock.localize`). The rule: a date alone
    (``01-01-2021``, ``2021-01-01``, ``1.1.2021``) has no offset, so the year of a day-first
    date with dashes is never read as an offset "-2021" and that date is local like
    "2021-01-01"; an offset (``Z``, ``+hh:mm``, ``-hhmm``) is recognised at the end of a date
    with a time. Returns (timestamps, unparseable mask, future mask, ambiguous-local-time
    mask, nonexistent-local-time mask); a row is in at most one mask.
    """
    twice = np.zeros(len(text), dtype=bool)
    never = np.zeros(len(text), dtype=bool)
    present = text.notna().to_numpy()
    has_zone = (text.str.contains(r"(?:[zZ]|[+-]\d{2}:?\d{2})$", regex=True)
                & ~text.str.fullmatch(_DATE_ALONE)).fillna(False).to_numpy()
    out = pd.Series(pd.NaT, index=text.index, dtype="datetime64[us]")
    fmt = profile.time_format or "ISO8601"
    for zoned in (True, False):
        sel = present & (has_zone == zoned)
        if not sel.any():
            continue
        part = text[sel]
        parsed = pd.to_datetime(part, format=fmt, errors="coerce", utc=zoned, dayfirst=profile.dayfirst)
        retry = parsed.isna()
        if retry.any() and profile.time_format is None:
            again = pd.to_datetime(part[retry], format="mixed", errors="coerce", utc=zoned, dayfirst=profile.dayfirst)
            parsed = parsed.copy()
            parsed[retry] = again
        if zoned:
            parsed = parsed.dt.tz_convert("UTC").dt.tz_localize(None)
        elif profile.timezone != "UTC":
            parsed, amb, non = localize(parsed, profile.timezone, profile.ambiguous_times)
            twice[sel], never[sel] = amb, non
        out[sel] = parsed.astype("datetime64[us]").to_numpy()
    # Dates before 1800 are typing errors (a lone "-1" parses as year -1), not survey data.
    ancient = (out < pd.Timestamp(EARLIEST_TIME)).fillna(False).to_numpy()
    out = out.mask(ancient)
    bad = present & out.isna().to_numpy() & ~twice & ~never
    now = datetime.now(UTC).replace(tzinfo=None) + timedelta(days=1)
    future = (out > pd.Timestamp(now)).fillna(False).to_numpy()
    out = out.mask(future)
    return out, bad, future, twice, never


def _check_constraints(
    frame: pd.DataFrame,
    specs: Sequence[FieldSpec],
    found: Mapping[str, str],
    table: RawTable,
    rejections: Rejections,
    schema_name: str,
    profile: Profile,
) -> None:
    """Required fields and ranges, validated lazily by pandera from the Table Schema."""
    already = rejections.mask(table.role, table.n_rows)
    try:
        pandera_schema(schema_name).validate(frame[~already], lazy=True)
    except pandera.errors.SchemaErrors as err:
        cases = err.failure_cases
        cases = cases[cases["index"].notna()]
        by_name = {s.name: s for s in specs}
        for (column, check), part in cases.groupby(["column", "check"], sort=False):
            spec = by_name.get(str(column))
            if spec is None:
                continue
            pos = part["index"].astype(np.int64).to_numpy()
            col = found.get(spec.name)
            label = f"{spec.name} (column '{col}')" if col and col != spec.name else f"column '{col or spec.name}'"
            if str(check) == "not_nullable":
                rejections.add(table.role, pos, ReasonCode.MISSING_VALUE, f"{label} is empty; {spec.description[:1].lower()}{spec.description[1:].rstrip('.')} is required")
            else:
                raw_col = table.frame[col] if col in table.frame else None
                shown = [str(raw_col.iloc[p]).strip() if raw_col is not None else _fmt(v)
                         for p, v in zip(pos, part["failure_case"], strict=True)]
                given = profile.units.get(spec.name) or (spec.unit if spec.unit not in (None, "1", "degree_north", "degree_east") else "")
                unit = f" {given}" if given else ""
                canon = f" {spec.unit}" if spec.unit not in (None, "1", "degree_north", "degree_east") else ""
                # whether latitude and longitude look swapped is told once per file, with a count,
                # where the swapped position falls inside the domain (ingest.store_output)
                rejections.add(
                    table.role, pos, ReasonCode.OUT_OF_RANGE,
                    [f"{label} = {v}{unit} is outside the allowed range ({spec.range_text()}{canon})" for v in shown],
                )


def _fmt(value: Any) -> str:
    try:
        return f"{float(value):g}"
    except (TypeError, ValueError):
        return str(value)


def _short(value: Any, limit: int = 60) -> str:
    """A cell as shown in a message: at most ``limit`` characters, on one line."""
    text = str(value)
    return one_line(text if len(text) <= limit else text[: limit - 3] + "...")


def closest_names(unknown: Iterable[str], known: Sequence[str], n: int = 3) -> dict[str, list[str]]:
    """For each unknown name, the closest known names (for actionable messages).

    Names are compared without case, diacritics or extra spaces, whole and by their first
    word (a misspelt genus is still found: "Østravix" -> "Ostravix keldensis").
    """
    keyed: dict[str, str] = {}
    for name in known:
        key = _fold(name)
        keyed.setdefault(key, name)
        first = key.split(" ")[0]
        if first and first != key:
            keyed.setdefault(first, name)
    out = {}
    for u in unknown:
        key = _fold(u)
        hits = difflib.get_close_matches(key, list(keyed), n=n * 2, cutoff=0.6)
        hits += difflib.get_close_matches(key.split(" ")[0], list(keyed), n=n, cutoff=0.75)
        out[u] = list(dict.fromkeys(keyed[h] for h in hits))[:n]
    return out


def _fold(text: str) -> str:
    import unicodedata

    table = str.maketrans({"ø": "o", "æ": "ae", "œ": "oe", "ß": "ss", "ł": "l", "đ": "d"})
    plain = unicodedata.normalize("NFKD", str(text).casefold().translate(table))
    return " ".join("".join(c for c in plain if not unicodedata.combining(c)).split())
