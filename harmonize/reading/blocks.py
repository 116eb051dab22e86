"""A large table read and typed in blocks of rows: text fields kept as categories, the raw
text of a row read again from the file only when the quarantine needs it."""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.csv as pacsv
from pandas.api.types import union_categoricals

from harmonize.contract import FieldSpec
from harmonize.errors import InputFileError
from harmonize.files import file_sha256
from harmonize.memory import release_free_memory
from harmonize.profile import Profile
from harmonize.reading.fields import coerce_fields
from harmonize.reading.quarantine import Rejections
from harmonize.reading.text import (
    LineReader,
    RawTable,
    arrow_layout,
    check_header_names,
    drop_blank_rows,
    first_row_header,
    refuse_long_lines,
)

#: Bytes of text Arrow reads per block (a catch file of 1e7 rows is ~400 MB: 25 blocks).
#: Arrow's reader reads several blocks ahead of the one handed over, so the block size
#: bounds that memory: measured on 1e7 catch rows, 64 MB blocks peaked at 1,758 MiB in
#: 19.6 s, 16 MB at 1,550 MiB in 16.2 s, 8 MB at 1,457 MiB in 17.1 s (BENCHMARKS.md).
BLOCK_BYTES = 16 << 20
#: Bytes of text per block when the rows of the quarantine are read again (few rows are kept).
FETCH_BLOCK_BYTES = 4 << 20
#: Rows per block of the line-by-line reader (files Arrow's reader does not take).
LINE_BLOCK_ROWS = 500_000

#: (offset of the block's first data row, its text, its malformed lines with file row numbers)
_Block = tuple[int, pd.DataFrame, list[tuple[int, str, int]]]


class _NotForArrow(Exception):
    """The file needs the line-by-line reader (see ``harmonize.reading.text._read_csv_arrow``)."""


@dataclass
class BlockRawTable(RawTable):
    """A :class:`~harmonize.reading.text.RawTable` that holds no text until asked: the
    rows at given positions are read again from the file (by the same reader, so with the
    same row numbers and cells)."""

    profile: Profile | None = None
    arrow: bool = True
    kept: bool = False

    def keep_only(self, keep: np.ndarray) -> None:
        positions = np.flatnonzero(keep)
        self.frame = self._fetch(positions)
        self.kept = True

    def raw_json(self, positions: np.ndarray) -> list[str]:
        if self.kept:
            return super().raw_json(positions)
        return RawTable(self.path, self.role, self._fetch(np.asarray(positions)), self.sha256, self.rows).raw_json(
            np.asarray(positions))

    def _fetch(self, positions: np.ndarray) -> pd.DataFrame:
        """The text of the data rows at ``positions`` (0-based), indexed by position."""
        assert self.profile is not None
        positions = np.sort(np.asarray(positions, dtype=np.int64))
        parts = [self.frame.iloc[:0]]
        if positions.size:
            # small blocks: Arrow's streaming reader reads a few dozen blocks ahead of the one
            # handed over (measured: ~540 MB of a 400 MB file held with 64 MB blocks, ~150 MB
            # with 4 MB blocks), and only a few rows of each block are wanted here
            blocks = _arrow_blocks(self.path, self.profile, min(FETCH_BLOCK_BYTES, BLOCK_BYTES)) if self.arrow \
                else _line_blocks(self.path, self.profile)
            for offset, text, _ in blocks:
                lo, hi = np.searchsorted(positions, [offset, offset + len(text)])
                if hi > lo:
                    wanted = positions[lo:hi]
                    parts.append(text.iloc[wanted - offset].set_axis(pd.Index(wanted), axis=0))
                if hi == positions.size:
                    break
        frame = pd.concat(parts) if len(parts) > 1 else parts[0]
        return frame.set_axis(pd.Index(frame.index, dtype=np.int64), axis=0)


def read_typed_blocks(path: str | object, profile: Profile, role: str, specs: Sequence[FieldSpec], rejections: Rejections,
                      schema_name: str) -> tuple[BlockRawTable, pd.DataFrame]:
    """A table's typed fields, read and typed block by block, and its raw table.

    The result equals :func:`~harmonize.reading.text.read_table` followed by
    :func:`~harmonize.reading.fields.coerce_fields` on the whole file (same rejections,
    same messages, same row numbers), except that text fields come back as categoricals and
    the raw table holds no text (:class:`BlockRawTable`). Memory holds one block of text.
    """
    from pathlib import Path

    path = Path(str(path))
    if not path.is_file():
        raise InputFileError(path, "no such file")
    refuse_long_lines(path)
    sha = file_sha256(path)
    try:
        return _typed(path, profile, role, specs, rejections, schema_name, sha, arrow=True)
    except _NotForArrow:
        return _typed(path, profile, role, specs, rejections, schema_name, sha, arrow=False)


def _typed(path, profile, role, specs, rejections, schema_name, sha, arrow: bool):  # type: ignore[no-untyped-def]
    parts: list[pd.DataFrame] = []
    found: list[tuple[int, Rejections]] = []
    header: list[str] | None = None
    n = 0
    blocks = _arrow_blocks(path, profile) if arrow else _line_blocks(path, profile)
    for offset, text, malformed in blocks:
        header = list(text.columns)
        block_rej = Rejections()
        table = RawTable(path, role, text, sha)
        typed = coerce_fields(table, specs, profile, block_rej, schema_name,
                              [(r - offset, line, k) for r, line, k in malformed])
        found.append((offset, block_rej))
        parts.append(_categories(typed, specs))
        n = offset + len(text)
        del table, typed, text
        release_free_memory()  # the block's text and its typing are freed: hand them back
    if header is None:
        if arrow:
            raise _NotForArrow
        raise InputFileError(path, "the file has a header but no data rows")
    for offset, block_rej in found:
        rejections.extend(block_rej, offset)  # positions of the block -> of the file
    if found:  # the positions read, one entry per lat/lon pair as for a whole file
        for entries in zip(*(r.positions for _, r in found), strict=True):
            rejections.positions.append((entries[0][0], np.concatenate([e[1] for e in entries]),
                                         np.concatenate([e[2] for e in entries])))
    frame = _concat(parts)
    del parts
    release_free_memory()  # the blocks' frames, now concatenated
    raw = BlockRawTable(path, role, pd.DataFrame({h: pd.Series([], dtype=object) for h in header}), sha, n,
                        profile=profile, arrow=arrow)
    return raw, frame


def _categories(typed: pd.DataFrame, specs: Sequence[FieldSpec]) -> pd.DataFrame:
    """Text fields as categoricals: a catch file repeats a few names and haul ids millions of times."""
    text = [s.name for s in specs if s.type == "string" and s.name in typed]
    return typed.assign(**{c: typed[c].astype("category") for c in text})


def _concat(parts: list[pd.DataFrame]) -> pd.DataFrame:
    if len(parts) == 1:
        return parts[0].reset_index(drop=True)
    columns = {}
    for col in parts[0].columns:
        if isinstance(parts[0][col].dtype, pd.CategoricalDtype):
            columns[col] = pd.Series(union_categoricals([p[col] for p in parts]))
        else:
            columns[col] = pd.concat([p[col] for p in parts], ignore_index=True)
    return pd.DataFrame(columns, copy=False)  # the columns as concatenated, not copied again into blocks


def _line_blocks(path, profile: Profile) -> Iterator[_Block]:  # type: ignore[no-untyped-def]
    with LineReader(path, profile) as reader:
        for block in reader.blocks(LINE_BLOCK_ROWS):
            frame = pd.DataFrame(block.rows, columns=reader.header, dtype=object)
            yield block.first_row - 1, frame, block.malformed


def _arrow_blocks(path, profile: Profile, block_bytes: int | None = None,  # type: ignore[no-untyped-def]
                  use_threads: bool = True) -> Iterator[_Block]:
    """Blocks of a well-formed UTF-8 CSV file read by Arrow's streaming reader; raises
    :class:`_NotForArrow` (possibly after some blocks) where ``harmonize.reading.text._read_csv_arrow``
    would give the file to the line-by-line reader. The block size and threads change the
    memory and time of a read, never its rows or cells."""
    layout = arrow_layout(path, profile)
    if layout is None:
        raise _NotForArrow
    delimiter, width = layout
    try:
        reader = pacsv.open_csv(
            path,
            read_options=pacsv.ReadOptions(autogenerate_column_names=True, block_size=block_bytes or BLOCK_BYTES,
                                           use_threads=use_threads),
            parse_options=pacsv.ParseOptions(delimiter=delimiter, newlines_in_values=True),
            convert_options=pacsv.ConvertOptions(
                column_types={f"f{i}": pa.string() for i in range(width)},
                strings_can_be_null=False, quoted_strings_can_be_null=False),
        )
    except (pa.ArrowException, OSError):
        raise _NotForArrow from None
    header: list[str] | None = None
    offset = 0
    dtype = pd.StringDtype("pyarrow", na_value=np.nan)
    with reader:
        while True:
            try:
                batch = reader.read_next_batch()
            except StopIteration:
                break
            except (pa.ArrowException, OSError):
                raise _NotForArrow from None
            if batch.num_columns != width:
                raise _NotForArrow
            batch = drop_blank_rows(batch)
            if header is None:
                if batch.num_rows == 0:
                    continue
                header = first_row_header(batch)
                if len(set(header)) != len(header):
                    raise _NotForArrow
                check_header_names(path, header)
                batch = batch.slice(1)
            if batch.num_rows == 0:
                continue
            frame = pd.DataFrame({name: pd.Series(pd.arrays.ArrowStringArray(batch.column(i), dtype=dtype))
                                  for i, name in enumerate(header)})
            yield offset, frame, []
            offset += batch.num_rows
    if offset == 0:
        raise _NotForArrow
