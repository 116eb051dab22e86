"""Ping ingest against the floor of the same work, the copy floor and the pandas script.

``python -m benchmarks.pings_same_work [--sizes 1e5 1e6] [--repeat 2]`` writes a synthetic
ping study per size (:func:`benchmarks.synth.ping_study`), then measures, each in a fresh
child process (time of the whole process, imports included; peak resident memory), paired
in one run on the same file: the copy floor (CSV -> parquet, :mod:`benchmarks.floor`), the
same-work floor (:mod:`benchmarks.pings_floor`: one DuckDB statement from the CSV to the
fishing cells), the pandas script (:mod:`benchmarks.baselines`) and harmonize's ingest into
a fresh store. The same-work floor's cells are checked equal to harmonize's store before any
ratio is printed. With ``--repeat k`` each is measured k times and the fastest kept (the
machine is shared). Prints a Markdown table; ``--json`` writes the raw figures.
"""

from __future__ import annotations

import argparse
import json
import shutil
import tempfile
from pathlib import Path
from typing import Any

from benchmarks.pings_floor import check_equal, floor_sql
from benchmarks.run import measure
from benchmarks.synth import ping_study


def _best(runs: list[dict[str, Any]]) -> dict[str, Any]:
    ok = [r for r in runs if "error" not in r]
    if not ok:
        return runs[-1]
    best = min(ok, key=lambda r: r["seconds"])
    return {**best, "peak_rss_mb": max(r["peak_rss_mb"] for r in ok)}


def bench(n: int, work: Path, repeat: int) -> dict[str, Any]:
    folder = work / f"pings_{n}"
    shutil.rmtree(folder, ignore_errors=True)
    path = ping_study(folder, n)
    res: dict[str, Any] = {"n": n, "file_mb": path.stat().st_size / 2**20}
    sql = folder / "floor.sql"  # prepared here: the measured process runs the statement and nothing else
    sql.write_text(floor_sql(folder, "bench_pings", path, folder / "floor_cells.parquet"))
    runs: dict[str, list[dict[str, Any]]] = {k: [] for k in ("copy", "same_work", "pandas", "harmonize")}
    for _ in range(repeat):
        runs["copy"].append(measure("floor", folder / "floor", path))
        runs["same_work"].append(measure("pings_floor", sql))
        runs["pandas"].append(measure("pandas_pings", path, folder / "pandas.parquet"))
        shutil.rmtree(folder / "store", ignore_errors=True)
        runs["harmonize"].append(measure("harmonize", folder, "bench_pings", "duckdb", path))
    res.update({k: _best(v) for k, v in runs.items()})
    res["check"] = check_equal(folder / "floor_cells.parquet", folder)
    shutil.rmtree(folder, ignore_errors=True)
    return res


def _cell(r: dict[str, Any]) -> str:
    return f"failed ({r['error'][:60]})" if "error" in r else f"{r['seconds']:.1f} s / {r['peak_rss_mb']:,.0f} MB"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", nargs="+", default=["1e5", "1e6"])
    parser.add_argument("--repeat", type=int, default=1)
    parser.add_argument("--json", type=Path, default=None)
    args = parser.parse_args()
    work = Path(tempfile.mkdtemp(prefix="pings-same-work-"))
    rows = []
    print("| N | CSV MB | copy floor | same-work floor | pandas script | harmonize | h / same-work | h / copy "
          "| h / pandas | cells equal |")
    print("|---:|---:|---|---|---|---|---:|---:|---:|---|")
    try:
        for size in args.sizes:
            r = bench(int(float(size)), work, args.repeat)
            rows.append(r)
            h = r["harmonize"]["seconds"]
            print(f"| {r['n']:.0e} | {r['file_mb']:,.0f} | {_cell(r['copy'])} | {_cell(r['same_work'])} "
                  f"| {_cell(r['pandas'])} | {_cell(r['harmonize'])} | {h / r['same_work']['seconds']:.2f} "
                  f"| {h / r['copy']['seconds']:.2f} | {h / r['pandas']['seconds']:.2f} "
                  f"| yes ({r['check']['cell_periods']:,.0f} cell-periods, {r['check']['hours']:,.1f} h) |",
                  flush=True)
    finally:
        shutil.rmtree(work, ignore_errors=True)
    if args.json:
        args.json.write_text(json.dumps(rows, indent=1, default=str))


if __name__ == "__main__":
    main()
