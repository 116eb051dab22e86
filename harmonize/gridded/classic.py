"""Size check of NetCDF classic files (CDF-1, CDF-2, CDF-5), so a truncated file is refused.

The NetCDF library reads the missing tail of a truncated classic file as zeros without an
error; the header, however, says where every variable's data begins and how large it is.
Layout from the NetCDF Classic and 64-bit Offset Format specification (Unidata, "NetCDF
File Format Specification", netCDF-C documentation, file_format_specifications) and the
CDF-5 extension (PnetCDF, "CDF-5 file format specification").
"""

from __future__ import annotations

import struct
from pathlib import Path

_TYPE_SIZE = {1: 1, 2: 1, 3: 2, 4: 4, 5: 4, 6: 8, 7: 1, 8: 2, 9: 4, 10: 8, 11: 8}
_NC_DIMENSION, _NC_VARIABLE, _NC_ATTRIBUTE = 10, 11, 12
_STREAMING = 0xFFFFFFFF


class _Reader:
    def __init__(self, data: bytes, version: int) -> None:
        self.data = data
        self.pos = 4
        self.wide = version == 5  # CDF-5: 64-bit counts
        self.offset64 = version in (2, 5)

    def _unpack(self, fmt: str, size: int) -> int:
        if self.pos + size > len(self.data):
            raise EOFError
        (value,) = struct.unpack_from(fmt, self.data, self.pos)
        self.pos += size
        return int(value)

    def int32(self) -> int:
        return self._unpack(">I", 4)

    def count(self) -> int:
        return self._unpack(">Q", 8) if self.wide else self._unpack(">I", 4)

    def offset(self) -> int:
        return self._unpack(">Q", 8) if self.offset64 else self._unpack(">I", 4)

    def skip_padded(self, n: int) -> None:
        self.pos += (n + 3) // 4 * 4

    def name(self) -> None:
        self.skip_padded(self.count())

    def attributes(self) -> None:
        tag, n = self.int32(), self.count()
        if tag not in (0, _NC_ATTRIBUTE):
            raise ValueError("bad attribute list")
        for _ in range(n):
            self.name()
            nc_type = self.int32()
            self.skip_padded(self.count() * _TYPE_SIZE.get(nc_type, 1))


def classic_required_size(path: Path, header_bytes: int = 1 << 20) -> int | None:
    """Bytes a classic NetCDF file must have according to its header; None if not classic.

    Raises
    ------
    ValueError
        When the header itself is cut short or malformed.
    """
    with open(path, "rb") as fh:
        data = fh.read(header_bytes)
    if data[:3] != b"CDF" or len(data) < 4 or data[3] not in (1, 2, 5):
        return None
    r = _Reader(data, data[3])
    try:
        numrecs = r.count()
        tag, n_dims = r.int32(), r.count()
        if tag not in (0, _NC_DIMENSION):
            raise ValueError("bad dimension list")
        lengths = []
        for _ in range(n_dims):
            r.name()
            lengths.append(r.count())
        r.attributes()
        tag, n_vars = r.int32(), r.count()
        if tag not in (0, _NC_VARIABLE):
            raise ValueError("bad variable list")
        fixed_end, records = 0, []
        for _ in range(n_vars):
            r.name()
            dimids = [r.count() for _ in range(r.count())]
            r.attributes()
            nc_type = r.int32()
            r.count()  # vsize (may be clipped for huge variables; recomputed below)
            begin = r.offset()
            is_record = bool(dimids) and lengths[dimids[0]] == 0
            size = _TYPE_SIZE.get(nc_type, 1)
            for d in dimids[1:] if is_record else dimids:
                size *= lengths[d]
            if is_record:
                records.append((begin, size))
            else:
                fixed_end = max(fixed_end, begin + size)
    except EOFError:
        raise ValueError("the header is cut short") from None
    if numrecs == _STREAMING or not records:
        return max(fixed_end, r.pos)
    padded = [(s + 3) // 4 * 4 for _, s in records]
    record_size = records[0][1] if len(records) == 1 else sum(padded)
    last = max(b + (numrecs - 1) * record_size + s for b, s in records) if numrecs else 0
    return max(fixed_end, last, r.pos)
