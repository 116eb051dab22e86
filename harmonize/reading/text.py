"""Delimited text (and parquet) files read as text: every cell a string, every row numbered.

Files are read as text so that a bad cell can be reported with its row, column and content.
Two readers give the same cells and row numbers: Arrow's CSV reader for well-formed UTF-8
files, and :class:`LineReader` (Python's csv module, line by line) for every other file and
wherever a malformed row must be found by its number.
"""

from __future__ import annotations

import codecs
import csv
import io
import json
import threading
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from harmonize.errors import InputFileError, short_text
from harmonize.files import file_sha256
from harmonize.profile import Profile

if TYPE_CHECKING:
    import pyarrow as pa

#: The longest cell the line-by-line reader parses (Arrow's reader has no such limit).
MAX_FIELD_CHARS = 1_000_000
#: Serialises the raising of the csv module's limit (see :func:`csv_field_limit`).
_LIMIT_LOCK = threading.RLock()


@contextmanager
def csv_field_limit(limit: int = MAX_FIELD_CHARS) -> Iterator[None]:
    """The csv module's field size limit at ``limit`` while the ``with`` block parses.

    The csv module keeps one limit for the whole process (128 KiB by default) and no limit
    per reader. The readers hold it raised only while they parse (never while a caller
    holds a block of rows) and put the caller's limit back afterwards. The lock makes the
    save-and-restore of two threads reading at once nest instead of interleave: without it,
    one thread could restore the other's raised limit and leave it raised for good.
    """
    with _LIMIT_LOCK:
        previous = csv.field_size_limit(limit)
        try:
            yield
        finally:
            csv.field_size_limit(previous)


#: A physical line longer than this is refused before parsing: a delimited file with such a
#: line is not tabular data (one endless line: wrong line endings, a binary or hostile file).
MAX_LINE_BYTES = 16 << 20


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
        check_header_names(path, list(fast.columns))
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
        check_header_names(self.path, header)
        seen: set[str] = set()  # one pass: header.count(h) per name was quadratic in the width
        dupes = sorted({h for h in header if h and (h in seen or seen.add(h))})
        if dupes:
            raise InputFileError(self.path, f"column name(s) {dupes} appear more than once in the header")
        return header

    def blocks(self, size: int = 100_000) -> Iterator[LineBlock]:
        """The data rows, ``size`` at a time (the csv limit is raised only while a block is parsed)."""
        while True:
            with csv_field_limit():
                block = self._next_block(size)
            if block is None:
                return
            yield block

    def _next_block(self, size: int) -> LineBlock | None:
        """Up to ``size`` further data rows; None at the end of the file."""
        width = self.width
        rows: list[list[str]] = []
        malformed: list[tuple[int, str, int]] = []
        first = self._rows + 1
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
                    break
        except csv.Error as exc:
            raise InputFileError(
                self.path, f"cannot be parsed as CSV after data row {self._rows} ({exc}); check quoting"
            ) from None
        return LineBlock(first, rows, malformed) if rows else None


def read_header(path: Path, profile: Profile) -> tuple[list[str], str]:
    """The header of a delimited text file and its delimiter, as :class:`LineReader` reads them.

    Reads only the first lines. Raises InputFileError as :class:`LineReader` does.
    """
    with LineReader(path, profile) as reader:
        return reader.header, reader.delimiter



#: Bytes read to find the delimiter and the header's width before the fast reader runs.
_HEAD_BYTES = 1 << 16


def arrow_layout(path: Path, profile: Profile) -> tuple[str, int] | None:
    """The delimiter and the number of fields of a UTF-8 CSV file Arrow's reader can take, or
    None where the line-by-line reader must (another encoding, a first line longer than the
    sniffing window, a delimiter of more than one character, no row with a non-blank cell)."""
    if profile.encoding.lower().replace("_", "-") not in ("utf-8", "utf8"):
        return None
    with open(path, "rb") as fh:
        head = fh.read(_HEAD_BYTES)
    text = head.decode("utf-8-sig", errors="ignore")
    if len(head) == _HEAD_BYTES and "\n" not in text and "\r" not in text:
        return None
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
    return delimiter, len(first)


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

    layout = arrow_layout(path, profile)
    if layout is None:
        return None
    delimiter, width = layout
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
    table = drop_blank_rows(table)
    if table.num_rows < 2:
        return None
    header = first_row_header(table)
    if len(set(header)) != len(header):
        return None
    body = table.slice(1)
    # Arrow-backed text columns: a tenth of the memory of one Python str per cell
    # (wrapped without copying: no Python string is made per cell)
    text = pd.StringDtype("pyarrow", na_value=np.nan)
    return pd.DataFrame({name: pd.Series(pd.arrays.ArrowStringArray(body.column(i).combine_chunks(), dtype=text))
                         for i, name in enumerate(header)})



def drop_blank_rows(table: pa.Table | pa.RecordBatch) -> pa.Table | pa.RecordBatch:
    """The rows of a text table read by Arrow less those whose cells are all blank (they are
    neither data rows nor a header)."""
    import pyarrow as pa
    import pyarrow.compute  # noqa: F401  (pa.compute)

    blank = None
    for column in table.columns:
        empty = pa.compute.equal(pa.compute.utf8_trim_whitespace(column), "")
        blank = empty if blank is None else pa.compute.and_(blank, empty)
    if blank is not None and pa.compute.any(blank).as_py():
        table = table.filter(pa.compute.invert(blank))
    return table


def first_row_header(table: pa.Table | pa.RecordBatch) -> list[str]:
    """The column names a text table read without names holds in its first row (trimmed, no BOM)."""
    return [str(h).strip().lstrip("\ufeff") for h in table.slice(0, 1).to_pylist()[0].values()]


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



def check_header_names(path: Path, header: Sequence[str]) -> None:
    """Refuse a header whose column names span lines (an unclosed quote swallowed the rows)."""
    broken = [h for h in header if "\n" in h or "\r" in h]
    if broken:
        raise InputFileError(
            path,
            f"the header row has a column name that spans lines ('{short_text(broken[0])}'); "
            "a quote in the header is probably not closed",
        )


def _sniff_delimiter(text: str, path: Path) -> str:
    if path.suffix.lower() in (".tsv", ".tab"):
        return "\t"
    first = text.lstrip("\ufeff").splitlines()[0] if text else ""
    counts = {d: first.count(d) for d in (",", ";", "\t", "|")}
    best = max(counts, key=lambda d: counts[d])
    return best if counts[best] > 0 else ","
