"""Benchmark: peak memory of a gridded ingest when the time axis gets ten times longer.

Run ``.venv/bin/python benchmarks/gridded_memory.py [--steps 146] [--factor 10] [--ny 240 --nx 320]``.
It writes two packed (int16, Kelvin) SST files over the Keldmar Sea that differ only in the
length of their time axis, ingests each in a fresh subprocess (full pipeline: read, aggregate,
tag, write the store) and reports the peak RSS of each and their ratio. A baseline subprocess
that only imports harmonize and opens the study gives the fixed cost. The file is written
step block by step block, so files larger than RAM can be made with ``--steps``. Not part of
the test suite: the ratio, not the absolute numbers, is what to watch.
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

PROFILE = """\
[source]
id = "bench_sst"
kind = "gridded"
provider_type = "remote_sensing"

[variables]
analysed_sst = "sea_surface_temperature"

[aggregate]
period = "month"
layer = "surface"
chunk_mb = {chunk_mb}
"""


def write_file(path: Path, steps: int, ny: int, nx: int, block: int = 50) -> int:
    """A (time, lat, lon) int16 packed Kelvin SST file over the demo sea, 2-day steps; returns bytes."""
    import netCDF4
    import numpy as np

    lat = np.linspace(46.4, 40.6, ny)  # north to south
    lon = np.linspace(203.6, 212.4, nx)  # 0..360 longitudes
    rng = np.random.default_rng(1)
    with netCDF4.Dataset(path, "w") as nc:
        nc.createDimension("time", None)
        nc.createDimension("lat", ny)
        nc.createDimension("lon", nx)
        t = nc.createVariable("time", "f8", ("time",))
        t.units, t.calendar = "days since 2000-01-01", "standard"
        la = nc.createVariable("lat", "f8", ("lat",))
        la.units, la[:] = "degrees_north", lat
        lo = nc.createVariable("lon", "f8", ("lon",))
        lo.units, lo[:] = "degrees_east", lon
        v = nc.createVariable("analysed_sst", "i2", ("time", "lat", "lon"), fill_value=np.int16(-32768),
                              chunksizes=(1, ny, nx))
        v.set_auto_maskandscale(False)
        v.units, v.scale_factor, v.add_offset = "kelvin", 0.01, 273.15
        base = np.round((10.0 - 0.6 * (lat[:, None] - 43.5) + 0 * lon[None, :]) / 0.01).astype(np.int16)
        for t0 in range(0, steps, block):
            n = min(block, steps - t0)
            t[t0:t0 + n] = np.arange(t0, t0 + n) * 2.0
            data = np.broadcast_to(base, (n, ny, nx)) + rng.integers(-50, 50, (n, ny, nx), dtype=np.int16)
            data[rng.random((n, ny, nx)) < 0.3] = -32768
            v[t0:t0 + n] = data
    return path.stat().st_size


def _child(study_dir: str, nc_file: str | None) -> None:
    """In a fresh process: ingest (or only import, for the baseline); print JSON.

    The peak RSS is taken after the adapter has read and aggregated the file, and again at
    the end of the ingest (tagging, parquet writing and the store's commit, which grow with
    the number of output rows and season_year partitions, not with the grid values).
    """
    start = time.perf_counter()
    from harmonize import load_study
    from harmonize.ingest import prepare, store_output

    study = load_study(study_dir)
    out: dict[str, object] = {}
    if nc_file:
        adapter, profile = prepare(study, "bench_sst")
        read = adapter.read({"rows": Path(nc_file)}, profile, study)
        out["read_seconds"] = time.perf_counter() - start
        out["read_rss_mb"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
        result = store_output(study, profile, adapter.kind, read)
        out.update(values=result.rows_read, used=result.rows_accepted, rows_written=result.records_written)
    out["seconds"] = time.perf_counter() - start
    out["peak_rss_mb"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(json.dumps(out))


def _measure(study_dir: Path, nc_file: Path | None) -> dict[str, float]:
    cmd = [sys.executable, __file__, "--child", str(study_dir)] + ([str(nc_file)] if nc_file else [])
    proc = subprocess.run(cmd, capture_output=True, text=True, check=True)
    return json.loads(proc.stdout.strip().splitlines()[-1])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--steps", type=int, default=146, help="time steps of the short file (2-day steps)")
    parser.add_argument("--factor", type=int, default=10, help="how many times longer the long file is")
    parser.add_argument("--ny", type=int, default=240)
    parser.add_argument("--nx", type=int, default=320)
    parser.add_argument("--chunk-mb", type=float, default=128.0)
    parser.add_argument("--child", nargs="+", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        _child(args.child[0], args.child[1] if len(args.child) > 1 else None)
        return

    from harmonize.demo.sea import write_study

    with tempfile.TemporaryDirectory() as tmp:
        rows = []
        base_dir = Path(tmp) / "baseline"
        write_study(base_dir)
        baseline = _measure(base_dir, None)
        for label, steps in (("short", args.steps), ("long", args.steps * args.factor)):
            study_dir = Path(tmp) / label
            write_study(study_dir)
            (study_dir / "profiles" / "bench_sst.toml").write_text(PROFILE.format(chunk_mb=args.chunk_mb))
            nc_file = study_dir / "sst.nc"
            size = write_file(nc_file, steps, args.ny, args.nx)
            m = _measure(study_dir, nc_file)
            rows.append((label, steps, size, m))
            nc_file.unlink()
        print(f"grid {args.ny} x {args.nx}, int16, chunk_mb {args.chunk_mb:g}; baseline (imports + study): "
              f"{baseline['peak_rss_mb']:.0f} MB")
        print(f"{'file':<6} {'steps':>7} {'file MB':>9} {'values':>14} {'rows out':>9} {'read s':>7} "
              f"{'RSS after read':>15} {'total s':>8} {'RSS at end':>11}")
        for label, steps, size, m in rows:
            print(f"{label:<6} {steps:>7} {size / 2**20:>9.0f} {m['values']:>14,} {m['rows_written']:>9,} "
                  f"{m['read_seconds']:>7.1f} {m['read_rss_mb']:>12.0f} MB {m['seconds']:>8.1f} {m['peak_rss_mb']:>8.0f} MB")
        short, long = rows[0][3], rows[1][3]
        for key, what in (("read_rss_mb", "reading and aggregating"), ("peak_rss_mb", "the whole ingest")):
            print(f"peak RSS long / short, {what}: {long[key] / short[key]:.2f} for a {args.factor}x longer time axis "
                  f"({long[key] - short[key]:+.0f} MB)")


if __name__ == "__main__":
    main()
