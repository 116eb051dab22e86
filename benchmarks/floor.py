"""The floor of an ingest: DuckDB reads the CSV file(s) and writes zstd parquet, nothing else.

Kept apart from :mod:`benchmarks.baselines` so that the measured process imports DuckDB only.
"""

from __future__ import annotations

from pathlib import Path

import duckdb


def duckdb_floor(files: list[Path], out_dir: Path) -> int:
    """CSV -> zstd parquet with DuckDB, nothing else; returns the rows copied."""
    out_dir.mkdir(parents=True, exist_ok=True)
    con = duckdb.connect()
    total = 0
    try:
        for path in files:
            target = out_dir / (path.stem + ".parquet")
            n = con.execute(f"COPY (SELECT * FROM read_csv('{path}')) TO '{target}' "
                            "(FORMAT parquet, COMPRESSION zstd)").fetchall()[0][0]
            total += int(n)
    finally:
        con.close()
    return total


def run_sql(sql_file: Path) -> int:
    """Run one DuckDB statement (e.g. the same-work floor of :mod:`benchmarks.pings_floor`,
    prepared by the parent so that this process imports DuckDB only); returns its row count."""
    con = duckdb.connect()
    try:
        con.execute("SET TimeZone = 'UTC'")
        return int(con.execute(sql_file.read_text()).fetchall()[0][0])
    finally:
        con.close()


def netcdf_floor(path: Path, variable: str, block: int = 50) -> int:
    """Read every value of a (time, lat, lon) variable once, block by block; returns the count."""
    import netCDF4
    import numpy as np

    total = 0
    with netCDF4.Dataset(path) as nc:
        var = nc.variables[variable]
        var.set_auto_maskandscale(False)
        checksum = 0
        for t0 in range(0, var.shape[0], block):
            data = var[t0:t0 + block]
            checksum += int(np.count_nonzero(data != var._FillValue))
            total += data.size
    return total
