"""Benchmark: ingest of N synthetic vessel pings against a raw DuckDB CSV -> parquet floor.

Run ``.venv/bin/python benchmarks/pings.py [N ...]`` (default 1e5 1e6). Each measurement
runs in a fresh subprocess so that its peak RSS is its own. The floor is DuckDB reading the
same CSV and writing zstd parquet with no checks at all; the ratio ingest / floor is what to
watch (the absolute times depend on the machine). Not part of the test suite.
"""

from __future__ import annotations

import json
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

PROFILE = """\
[source]
id = "bench_pings"
kind = "effort"
provider_type = "industry"

[columns]
vessel_id = "vessel_name"
time = "utc_time"
lat = "latitude"
lon = "longitude"
speed_kn = "sog_kn"
gear = "gear_code"

[fishing]
form = "pings"
pelagic_layer = "epipelagic"
"""


def make_study(folder: Path, n: int) -> Path:
    """A Keldmar Sea study with one ping file of ``n`` rows; returns the file."""
    import duckdb
    import numpy as np
    import pyarrow as pa

    from harmonize.demo.sea import write_study
    from harmonize.demo.sources.effort import simulate_pings

    write_study(folder)
    (folder / "profiles" / "bench_pings.toml").write_text(PROFILE, encoding="utf-8")
    rng = np.random.default_rng(7)
    vessels = max(10, n // 20_000)
    pings = simulate_pings(rng, vessels, n // vessels).drop(columns="fishing")
    path = folder / "data" / f"pings_{n}.csv"
    con = duckdb.connect()
    con.register("pings", pa.Table.from_pandas(pings, preserve_index=False))
    con.execute(
        f"""COPY (SELECT vessel_name, strftime(utc_time, '%Y-%m-%dT%H:%M:%SZ') AS utc_time, latitude,
                         longitude, sog_kn, gear_code FROM pings) TO '{path}' (HEADER)"""
    )
    con.close()
    return path


def _floor(path: Path) -> dict[str, float]:
    import duckdb

    out = path.with_suffix(".parquet")
    start = time.perf_counter()
    con = duckdb.connect()
    con.execute(f"COPY (SELECT * FROM read_csv('{path}')) TO '{out}' (FORMAT parquet, COMPRESSION zstd)")
    con.close()
    return {"seconds": time.perf_counter() - start}


def _ingest(path: Path) -> dict[str, float]:
    from harmonize import load_study, run

    folder = path.parent.parent
    start = time.perf_counter()
    result = run(load_study(folder), "bench_pings", {"rows": path})
    return {"seconds": time.perf_counter() - start, "rows_read": result.rows_read,
            "rows_quarantined": result.rows_quarantined, "records_written": result.records_written}


def _child(what: str, path: str) -> None:
    stats = (_floor if what == "floor" else _ingest)(Path(path))
    stats["peak_rss_mb"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(json.dumps(stats))


def _measure(what: str, path: Path) -> dict[str, float]:
    out = subprocess.run([sys.executable, __file__, "--child", what, str(path)],
                         check=True, capture_output=True, text=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def main(sizes: list[int]) -> None:
    print(f"{'pings':>12} {'floor s':>9} {'ingest s':>9} {'ratio':>6} {'ingest RSS MB':>14} {'pings/s':>12}")
    for n in sizes:
        with tempfile.TemporaryDirectory() as tmp:
            path = make_study(Path(tmp) / "study", n)
            floor = _measure("floor", path)
            ingest = _measure("ingest", path)
            ratio = ingest["seconds"] / floor["seconds"]
            print(f"{n:>12,} {floor['seconds']:>9.2f} {ingest['seconds']:>9.2f} {ratio:>6.2f} "
                  f"{ingest['peak_rss_mb']:>14.0f} {n / ingest['seconds']:>12,.0f}", flush=True)


if __name__ == "__main__":
    if len(sys.argv) > 1 and sys.argv[1] == "--child":
        _child(sys.argv[2], sys.argv[3])
    else:
        main([int(float(a)) for a in sys.argv[1:]] or [100_000, 1_000_000])
