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


def gridded_floor(study_dir: Path, path: Path, variable: str, out: Path, chunk_mb: float = 64.0) -> int:
    """The same work as a gridded ingest of a packed (time, lat, lon) field, done directly.

    Reads the packed integers block by block (netCDF4, no decoding), masks fill values and
    values outside the variable's plausible range on the stored integers, sums the stored
    integers per pixel and month (a reduction along time), unpacks the per-pixel sums
    (sum x = scale x sum r + offset x n, then kelvin to degC) and takes one sparse
    pixels-to-cells product per month (scipy.sparse) for the area-weighted sums. Pixel
    geometry (window, areas, domain test, cells) comes from harmonize's own functions: it
    is computed once per grid, not per value. Writes period start, cell_id, value (degC,
    area-weighted mean), effort (valid pixel area per time step, km2) and n to ``out``
    (parquet) and returns the rows, for :func:`check_gridded_floor`.
    """
    import math

    import netCDF4
    import numpy as np
    import pyarrow as pa
    import pyarrow.parquet as pq
    from scipy import sparse

    from harmonize.gridded.area import axis_bounds, regular_pixel_area_km2
    from harmonize.gridded.cf import CANONICAL_VARIABLES
    from harmonize.study import load_study
    from harmonize.tagging import Grid, inside_domain, normalise_lon
    from harmonize.units import conversion as unit_conversion

    study = load_study(study_dir)
    with netCDF4.Dataset(path) as nc:
        var = nc.variables[variable]
        var.set_auto_maskandscale(False)
        lat = np.asarray(nc.variables["lat"][:], np.float64)
        lon = np.asarray(nc.variables["lon"][:], np.float64)
        days = np.asarray(nc.variables["time"][:], np.float64)  # "days since 2000-01-01", standard calendar
        fill = var._FillValue
        scale, offset = float(var.scale_factor), float(var.add_offset)
        to_canonical = unit_conversion("temperature", var.units)
        # the window of rows and columns that can reach the domain (as the adapter reads it)
        lat_lo, lat_hi = axis_bounds(lat)
        lon_lo, lon_hi = axis_bounds(lon)
        xmin, ymin, xmax, ymax = study.domain.bounds
        pad_y, pad_x = float(np.nanmax(np.abs(lat_hi - lat_lo))), float(np.nanmax(np.abs(lon_hi - lon_lo)))
        lon_n = normalise_lon(lon)
        rows = np.flatnonzero((lat >= ymin - pad_y) & (lat <= ymax + pad_y))
        cols = np.flatnonzero((lon_n >= xmin - pad_x) & (lon_n <= xmax + pad_x))
        y0, y1, x0, x1 = int(rows.min()), int(rows.max()) + 1, int(cols.min()), int(cols.max()) + 1
        g_lon, g_lat = np.meshgrid(lon_n[x0:x1], lat[y0:y1])
        area = regular_pixel_area_km2(lat_lo[y0:y1], lat_hi[y0:y1], lon_lo[x0:x1], lon_hi[x0:x1]).ravel()
        inside = np.flatnonzero(inside_domain(study.domain, g_lon.ravel(), g_lat.ravel()) & (area > 0))
        ix, iy = Grid(study.crs, study.cell_size_km).indices(g_lon.ravel()[inside], g_lat.ravel()[inside])
        cx0, cy0, span_y = int(ix.min()), int(iy.min()), int(iy.max() - iy.min()) + 1
        keys, pixel_cell = np.unique((ix - cx0) * span_y + (iy - cy0), return_inverse=True)
        cells = np.stack([keys // span_y + cx0, keys % span_y + cy0], axis=1)
        to_cells = sparse.csr_matrix((np.ones(inside.size), (pixel_cell.ravel(), np.arange(inside.size))),
                                     shape=(len(cells), inside.size))
        w = area[inside]
        # plausible values of the canonical variable, as stored integers
        lo, hi = CANONICAL_VARIABLES["sea_surface_temperature"].plausible
        c_scale, c_offset = to_canonical
        r_lo = math.ceil(((lo - c_offset) / c_scale - offset) / scale)
        r_hi = math.floor(((hi - c_offset) / c_scale - offset) / scale)
        # months of the time steps
        stamp = np.datetime64("2000-01-01T00:00:00", "s") + np.round(days * 86400).astype("timedelta64[s]")
        month_key = stamp.astype("datetime64[M]").astype(np.int64)  # months since 1970-01
        n_win = (y1 - y0) * (x1 - x0)
        steps_per_block = max(1, int(chunk_mb * 2**20 // (n_win * 16)))
        sums: dict[int, tuple[np.ndarray, np.ndarray]] = {}
        for t0 in range(0, var.shape[0], steps_per_block):
            t1 = min(t0 + steps_per_block, var.shape[0])
            raw = var[t0:t1, y0:y1, x0:x1].reshape(t1 - t0, -1)
            ok = (raw != fill) & (raw >= r_lo) & (raw <= r_hi)
            keys = month_key[t0:t1]
            for key in np.unique(keys).tolist():
                sel = keys == key
                r = np.where(ok[sel], raw[sel], 0).sum(axis=0, dtype=np.int64)[inside]
                n = ok[sel].sum(axis=0)[inside]
                if key in sums:
                    sums[key] = (sums[key][0] + r, sums[key][1] + n)
                else:
                    sums[key] = (r, n)
    steps = dict(zip(*np.unique(month_key, return_counts=True), strict=True))
    out_cols: dict[str, list] = {"period_start": [], "cell_id": [], "value": [], "effort": [], "n": []}
    for key, (r, n) in sorted(sums.items()):
        x = (scale * r + offset * n) * c_scale + c_offset * n  # sum of the unpacked values, degC
        sum_w, sum_wx, count = (to_cells @ np.stack([w * n, w * x, n.astype(np.float64)], axis=1)).T
        hit = np.flatnonzero(count > 0)
        out_cols["period_start"].append(np.full(hit.size, np.datetime64(int(key), "M").astype("datetime64[us]")))
        out_cols["cell_id"].append(np.char.add(np.char.add("x", cells[hit, 0].astype(str)),
                                               np.char.add("_y", cells[hit, 1].astype(str))))
        out_cols["value"].append(sum_wx[hit] / sum_w[hit])
        out_cols["effort"].append(sum_w[hit] / steps[key])
        out_cols["n"].append(count[hit].astype(np.int64))
    table = pa.table({k: np.concatenate(v) for k, v in out_cols.items()})
    pq.write_table(table, out)
    return table.num_rows


def check_gridded_floor(store_dir: Path, floor_file: Path, rtol: float = 1e-9) -> dict[str, int]:
    """Rows of the floor's output and of the store's gridded rows, and how many differ."""
    con = duckdb.connect()
    try:
        con.execute(f"SET file_search_path = '{store_dir}'")
        con.execute(f"ATTACH '{store_dir / 'harmonized.duckdb'}' AS s (READ_ONLY)")
        h = "(SELECT cell_id, CAST(timezone('UTC', event_start) AS TIMESTAMP) AS period_start, value, effort, " \
            "n_values AS n FROM s.observations WHERE source_kind = 'gridded')"
        f = f"read_parquet('{floor_file}')"
        n_h = con.execute(f"SELECT count(*) FROM {h}").fetchall()[0][0]
        n_f = con.execute(f"SELECT count(*) FROM {f}").fetchall()[0][0]
        differ = con.execute(f"""
            SELECT count(*) FROM {h} h FULL JOIN {f} f USING (cell_id, period_start)
            WHERE h.n IS DISTINCT FROM f.n
               OR NOT (abs(h.value - f.value) <= {rtol} * abs(f.value))
               OR NOT (abs(h.effort - f.effort) <= {rtol} * abs(f.effort))""").fetchall()[0][0]
    finally:
        con.close()
    return {"harmonize_rows": int(n_h), "floor_rows": int(n_f), "rows_differing": int(differ)}
