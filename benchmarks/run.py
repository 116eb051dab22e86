"""Benchmark runner: harmonize against baselines measured in the same run, at several sizes.

Run from the repository root::

    .venv/bin/python -m benchmarks.run                 # ingest at 1e5, 1e6, 1e7; stores 1e7, 1e8; gridded
    .venv/bin/python -m benchmarks.run --quick         # ingest at 1e5, 1e6; store 1e6, 1e7; small gridded
    .venv/bin/python -m benchmarks.run --only ingest --sizes 1e5 3e6
    .venv/bin/python -m benchmarks.run --only store --store-sizes 1e7 --dask

Every measurement runs in a fresh child process (``python -m benchmarks.run --child ...``)
so that its peak resident memory (``VmHWM`` of that process, DuckDB's threads included)
is its own; its time is the child's whole run, imports included, as a user would see it. Times are reported as ratios against a baseline measured in the same run: the
absolute seconds depend on the machine and are printed only for context. Results are
printed as Markdown tables and written, with the machine description, to a JSON file
(``--json``, default ``benchmarks/results.json``). Not part of the test suite.

Comparisons:

- ``ingest``: N pings and N trawl catch rows. harmonize (``harmonize.ingest.run``: read,
  validate, tag, write the store) vs the raw DuckDB floor (CSV -> parquet, no checks) and vs
  a plain pandas script (:mod:`benchmarks.baselines`).
- ``store``: a synthetic store of N observation rows, registered through ``Store.commit``;
  the coverage audit vs one raw DuckDB group-by pass over the same parquet (the least an
  audit must read), and the wide export vs a raw DuckDB pivot of the same rows to parquet.
  With ``--dask`` the audit's aggregations also run on a local Dask cluster.
- ``gridded``: a gridded NetCDF ingest of a file larger than the memory budget it is given
  (:mod:`benchmarks.gridded_memory`).
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parent.parent
#: Address-space cap of every measured child (MB); set by --max-memory-gb.
MAX_MEMORY_MB: float | None = 12 * 1024
#: Another checkout whose harmonize is measured beside this one (``--before DIR``), or None.
BEFORE: Path | None = None
#: Runs of each measurement; the fastest is kept (``--repeat``): on a shared machine the
#: slowest runs measure the other work, not ours.
REPEAT = 1


# ---------------------------------------------------------------------------- child tasks

def _task(name: str, args: list[str]) -> dict[str, Any]:
    """Run one measured task in this (child) process; returns its stats."""
    start = time.perf_counter()
    stats: dict[str, Any] = {}
    if name == "import":
        import harmonize.ingest  # noqa: F401  (the fixed cost of importing the package)
    elif name == "floor":
        from benchmarks.floor import duckdb_floor

        stats["rows"] = duckdb_floor([Path(a) for a in args[1:]], Path(args[0]))
    elif name == "pandas_pings":
        from benchmarks.baselines import pandas_pings

        stats["rows_out"] = pandas_pings(Path(args[0]), Path(args[1]))
    elif name == "pandas_trawl":
        from benchmarks.baselines import pandas_trawl

        stats["rows_out"] = pandas_trawl(Path(args[0]), Path(args[1]), Path(args[2]))
    elif name == "harmonize":
        from harmonize import load_study
        from harmonize.ingest import run

        study_dir, profile, *files = args
        engine = files.pop(0) if files[0] in ("duckdb", "dask") else "duckdb"
        inputs = {"rows": Path(files[0])} if len(files) == 1 else {"events": Path(files[0]), "records": Path(files[1])}
        result = run(load_study(study_dir), profile, inputs, engine=engine)
        stats.update(rows_read=result.rows_read, rows_quarantined=result.rows_quarantined,
                     rows_out=result.records_written)
    elif name == "pings_floor":
        from benchmarks.floor import run_sql

        stats["rows_out"] = run_sql(Path(args[0]))
    elif name == "gridded":
        from harmonize import load_study
        from harmonize.ingest import prepare, store_output

        study = load_study(args[0])
        adapter, profile = prepare(study, "bench_sst")
        out = adapter.read({"rows": Path(args[1])}, profile, study)
        result = store_output(study, profile, adapter.kind, out)
        stats.update(values=result.rows_read, used=result.rows_accepted, rows_out=result.records_written)
    elif name == "trawl_floor":
        from benchmarks.trawl_floor import trawl_floor

        stats["rows_out"] = trawl_floor(Path(args[0]), Path(args[1]), Path(args[2]), Path(args[3]))
    elif name == "gridded_same_floor":
        from benchmarks.floor import gridded_floor

        stats["rows_out"] = gridded_floor(Path(args[0]), Path(args[1]), "analysed_sst", Path(args[2]))
    elif name == "gridded_floor":
        from benchmarks.floor import netcdf_floor

        stats["values"] = netcdf_floor(Path(args[0]), "analysed_sst")
    elif name == "make_store":
        from benchmarks.stores import make_store

        stats.update(make_store(Path(args[0]), int(args[1])))
    elif name == "audit":
        from benchmarks.stores import run_audit

        stats.update(run_audit(Path(args[0]), engine=args[1] if len(args) > 1 else "duckdb"))
    elif name == "audit_floor":
        from benchmarks.stores import audit_floor

        stats.update(audit_floor(Path(args[0])))
    elif name == "wide":
        from benchmarks.stores import run_wide

        stats.update(run_wide(Path(args[0]), Path(args[1])))
    elif name == "wide_floor":
        from benchmarks.stores import wide_floor

        stats.update(wide_floor(Path(args[0]), Path(args[1])))
    else:
        raise SystemExit(f"unknown task {name}")
    stats["work_seconds"] = time.perf_counter() - start
    usage = resource.getrusage(resource.RUSAGE_SELF)
    # CPU seconds of the whole process (all threads, imports included): on a shared machine
    # the wall clock also measures the other work, the CPU time much less so
    stats["cpu_seconds"] = usage.ru_utime + usage.ru_stime
    stats["peak_rss_mb"] = peak_rss_mb()
    return stats


def peak_rss_mb() -> float:
    """Peak resident memory of this process image (MB).

    ``VmHWM`` of /proc/self/status starts afresh at ``exec``; ``ru_maxrss`` does not (a
    child would report the runner's own peak at the moment it was forked), so it is only
    the fallback where /proc is missing.
    """
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024
    except OSError:
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def measure(name: str, *args: object, timeout: float | None = None, limit_mb: float | None = None,
            cwd: Path | None = None) -> dict[str, Any]:
    """Run a task in a fresh child process; returns its stats (``error`` on failure).

    ``limit_mb`` caps the child's address space (``RLIMIT_AS``): allocations beyond it fail.
    Without it, the cap is ``MAX_MEMORY_MB`` (``--max-memory-gb``): a task that needs more
    fails alone instead of waking the kernel's out-of-memory killer on a shared machine.
    ``cwd`` runs the child in another checkout (``--before``): its ``harmonize`` is imported.
    """
    cmd = [sys.executable, "-m", "benchmarks.run", "--child", name, *map(str, args)]
    cap_mb = limit_mb if limit_mb is not None else MAX_MEMORY_MB

    def cap() -> None:
        if cap_mb:
            limit = int(cap_mb * 2**20)
            resource.setrlimit(resource.RLIMIT_AS, (limit, limit))

    best: dict[str, Any] | None = None
    for i in range(REPEAT):
        if i and name in ("harmonize", "gridded") and args and Path(str(args[0])).is_dir():
            shutil.rmtree(Path(str(args[0])) / "store", ignore_errors=True)  # each run ingests afresh
            (Path(str(args[0])) / ".store.ingested").unlink(missing_ok=True)  # removed on purpose, not lost
        start = time.perf_counter()
        proc = subprocess.run(cmd, capture_output=True, text=True, cwd=cwd or ROOT, timeout=timeout, preexec_fn=cap)
        seconds = time.perf_counter() - start
        if proc.returncode != 0:
            tail = (proc.stderr.strip().splitlines() or ["(no output)"])[-1]
            return {"error": f"exit {proc.returncode}: {tail}"}
        stats = json.loads(proc.stdout.strip().splitlines()[-1])
        stats["seconds"] = seconds  # the whole child process: start-up and imports included
        stats["load_average"] = os.getloadavg()[0]
        if best is None or seconds < best["seconds"]:
            best = stats
    assert best is not None
    return best


# ---------------------------------------------------------------------------- comparisons

def bench_ingest(sizes: list[int], work: Path, dask: bool = False,
                 inputs: tuple[str, ...] = ("pings", "trawl")) -> list[dict[str, Any]]:
    """Pings and trawl catch rows: harmonize vs raw DuckDB floor vs pandas script.

    With ``dask``, the pings are also ingested with ``engine="dask"`` (a local cluster of
    threads in the ingest's process), into a fresh copy of the study.
    """
    from benchmarks.synth import ping_study, trawl_study

    rows = []
    for n in sizes:
        if "pings" not in inputs:
            break
        folder = work / f"pings_{n}"
        path = ping_study(folder, n)
        from benchmarks.pings_floor import check_equal, floor_sql

        sql = folder / "floor.sql"  # prepared here: the measured process runs the one statement
        sql.write_text(floor_sql(folder, "bench_pings", path, folder / "floor_cells.parquet"))
        res = {"what": "pings", "n": n, "file_mb": path.stat().st_size / 2**20,
               "floor": measure("floor", folder / "floor", path),
               "same_floor": measure("pings_floor", sql),
               "pandas": measure("pandas_pings", path, folder / "pandas.parquet")}
        if BEFORE is not None:
            res["before"] = measure("harmonize", folder, "bench_pings", "duckdb", path, cwd=BEFORE)
            shutil.rmtree(folder / "store", ignore_errors=True)
            (folder / ".store.ingested").unlink(missing_ok=True)  # removed on purpose, not lost
        res["harmonize"] = measure("harmonize", folder, "bench_pings", "duckdb", path)
        if "error" not in res["harmonize"] and "error" not in res["same_floor"]:
            # the floor's cells equal the store's (raises otherwise): hours, vessels, pings
            cells = int(check_equal(folder / "floor_cells.parquet", folder)["cell_periods"])
            res["same_floor_check"] = {"harmonize_rows": cells, "floor_rows": cells}
        if dask:
            shutil.rmtree(folder / "store", ignore_errors=True)
            (folder / ".store.ingested").unlink(missing_ok=True)  # removed on purpose, not lost
            res["harmonize_dask"] = measure("harmonize", folder, "bench_pings", "dask", path)
        rows.append(res)
        _print_ingest_row(res)
        _print_paired_row(res)
        shutil.rmtree(folder, ignore_errors=True)
    for n in sizes:
        if "trawl" not in inputs:
            break
        folder = work / f"trawl_{n}"
        ev, rc = trawl_study(folder, n)
        res = {"what": "trawl catch rows", "n": n, "file_mb": (ev.stat().st_size + rc.stat().st_size) / 2**20,
               "floor": measure("floor", folder / "floor", ev, rc),
               "same_floor": measure("trawl_floor", folder, ev, rc, folder / "floor_rows"),
               "pandas": measure("pandas_trawl", ev, rc, folder / "pandas.parquet")}
        if BEFORE is not None:
            res["before"] = measure("harmonize", folder, "bench_trawl", "duckdb", ev, rc, cwd=BEFORE)
            shutil.rmtree(folder / "store", ignore_errors=True)
            (folder / ".store.ingested").unlink(missing_ok=True)  # removed on purpose, not lost
        res["harmonize"] = measure("harmonize", folder, "bench_trawl", "duckdb", ev, rc)
        if "error" not in res["harmonize"] and "error" not in res["same_floor"]:
            from benchmarks.trawl_floor import check_trawl_floor

            res["same_floor_check"] = check_trawl_floor(folder / "store", folder / "floor_rows")
        rows.append(res)
        _print_ingest_row(res)
        _print_paired_row(res)
        shutil.rmtree(folder, ignore_errors=True)
    return rows


def bench_store(sizes: list[int], work: Path, dask: bool, keep: bool = False) -> list[dict[str, Any]]:
    """Audit and wide export over synthetic stores of N observation rows.

    With ``keep``, stores are left in ``work`` and a store already there is reused.
    """
    rows = []
    for n in sizes:
        folder = work / f"store_{n}"
        if keep and (folder / "store" / "harmonized.duckdb").is_file():
            size = sum(p.stat().st_size for p in (folder / "store" / "observations").rglob("*.parquet"))
            made = {"rows": n, "parquet_mb": size / 2**20, "seconds": float("nan"), "reused": True}
        else:
            made = measure("make_store", folder, n)
        res: dict[str, Any] = {"n": n, "make": made}
        if "error" not in made:
            res["audit_floor"] = measure("audit_floor", folder)
            res["audit"] = measure("audit", folder, "duckdb")
            if dask:
                res["audit_dask"] = measure("audit", folder, "dask")
            res["wide_floor"] = measure("wide_floor", folder, work / "wide_floor.parquet")
            res["wide"] = measure("wide", folder, work / "wide.parquet")
        rows.append(res)
        _print_store_row(res)
        if not keep:
            shutil.rmtree(folder, ignore_errors=True)
        for name in ("wide_floor.parquet", "wide.parquet"):
            (work / name).unlink(missing_ok=True)
    return rows


def bench_gridded_same(steps_list: list[int], work: Path) -> list[dict[str, Any]]:
    """Gridded ingest vs its same-work floor (:func:`benchmarks.floor.gridded_floor`) and the read floor.

    A packed SST file of ``steps`` two-day steps on a 720 x 960 grid (691,200 values per
    step); no address-space cap below the default. There is no pandas script for gridded files.
    """
    from benchmarks.floor import check_gridded_floor
    from benchmarks.gridded_memory import PROFILE, write_file
    from harmonize.demo.sea import write_study

    rows = []
    for steps in steps_list:
        folder = work / f"gridded_{steps}"
        write_study(folder)
        (folder / "profiles" / "bench_sst.toml").write_text(PROFILE.format(chunk_mb=64), encoding="utf-8")
        nc_file = folder / "sst.nc"
        size = write_file(nc_file, steps, 720, 960)
        res: dict[str, Any] = {"what": "gridded values", "n": steps * 720 * 960, "steps": steps,
                               "file_mb": size / 2**20,
                               "floor": measure("gridded_floor", nc_file),
                               "same_floor": measure("gridded_same_floor", folder, nc_file, folder / "floor.parquet")}
        if BEFORE is not None:
            res["before"] = measure("gridded", folder, nc_file, cwd=BEFORE)
            shutil.rmtree(folder / "store", ignore_errors=True)
            (folder / ".store.ingested").unlink(missing_ok=True)  # or the next ingest sees a lost store
        res["harmonize"] = measure("gridded", folder, nc_file)
        if "error" not in res["harmonize"] and "error" not in res["same_floor"]:
            res["same_floor_check"] = check_gridded_floor(folder / "store", folder / "floor.parquet")
        rows.append(res)
        _print_paired_row(res)
        shutil.rmtree(folder, ignore_errors=True)
    return rows


def bench_gridded(quick: bool, work: Path) -> dict[str, Any]:
    """Gridded ingest of a packed NetCDF file larger than the memory the process may use.

    The child runs under a hard address-space limit (``RLIMIT_AS``) smaller than the file;
    the ingest's own budget is ``[aggregate] chunk_mb``. The address space counts memory that
    is reserved but never used (thread arenas, DuckDB's allocator), so the cap sits just
    under the file size; the peak resident memory is the figure to read. The baseline reads
    every value of the file once, block by block, with netCDF4 (the least any tool must do).
    """
    from benchmarks.gridded_memory import PROFILE, write_file
    from harmonize.demo.sea import write_study

    # 720 x 960 int16 values per 2-day time step (1.3 MiB)
    steps, limit_mb, chunk_mb = (800, 1024, 64) if quick else (2400, 3072, 64)
    folder = work / "gridded"
    write_study(folder)
    (folder / "profiles" / "bench_sst.toml").write_text(PROFILE.format(chunk_mb=chunk_mb), encoding="utf-8")
    nc_file = folder / "sst.nc"
    size = write_file(nc_file, steps, 720, 960)
    res = {"file_mb": size / 2**20, "steps": steps, "limit_mb": limit_mb, "chunk_mb": chunk_mb,
           "floor": measure("gridded_floor", nc_file, limit_mb=limit_mb),
           "harmonize": measure("gridded", folder, nc_file, limit_mb=limit_mb)}
    h, f = res["harmonize"], res["floor"]
    print(f"\n### Gridded ingest under a hard memory limit\n\n"
          f"| file | values | limit (RLIMIT_AS) | netCDF4 read floor | harmonize ingest | harmonize / floor |\n"
          f"|---:|---:|---:|---|---|---:|\n"
          f"| {size / 2**20:,.0f} MB | {h.get('values', 0):,} | {limit_mb:,} MB | {_cell(f)} | {_cell(h)} "
          f"| {_fmt_ratio(h, f)} |", flush=True)
    shutil.rmtree(folder, ignore_errors=True)
    return res


# ---------------------------------------------------------------------------- printing

def _fmt_ratio(a: dict[str, Any], b: dict[str, Any]) -> str:
    if "error" in a or "error" in b:
        return "n/a"
    return f"{a['seconds'] / b['seconds']:.2f}"


def _cell(m: dict[str, Any]) -> str:
    if "error" in m:
        return f"failed ({m['error'][:60]})"
    return f"{m['seconds']:.1f} s / {m['peak_rss_mb']:,.0f} MB"


def _print_ingest_row(r: dict[str, Any]) -> None:
    if not getattr(_print_ingest_row, "header", False):
        print("\n### Ingest: harmonize vs raw DuckDB floor vs pandas script\n")
        print("| input | N | CSV MB | DuckDB floor (time / peak RSS) | pandas script | harmonize "
              "| harmonize / floor | pandas / harmonize | harmonize, dask engine (local) |")
        print("|---|---:|---:|---|---|---|---:|---:|---|")
        _print_ingest_row.header = True  # type: ignore[attr-defined]
    dask = _cell(r["harmonize_dask"]) if "harmonize_dask" in r else "-"
    print(f"| {r['what']} | {r['n']:.0e} | {r['file_mb']:,.0f} | {_cell(r['floor'])} | {_cell(r['pandas'])} "
          f"| {_cell(r['harmonize'])} | {_fmt_ratio(r['harmonize'], r['floor'])} "
          f"| {_fmt_ratio(r['pandas'], r['harmonize'])} | {dask} |", flush=True)


def _ratio(a: dict[str, Any] | None, b: dict[str, Any] | None) -> str:
    if not a or not b:
        return "-"
    return _fmt_ratio(a, b)


def _cpu(m: dict[str, Any] | None) -> str:
    return f"{m['cpu_seconds']:.1f} s" if m and "cpu_seconds" in m else "-"


def _cpu_ratio(a: dict[str, Any] | None, b: dict[str, Any] | None) -> str:
    if not a or not b or "cpu_seconds" not in a or "cpu_seconds" not in b:
        return "-"
    return f"{a['cpu_seconds'] / b['cpu_seconds']:.2f}"


def _print_paired_row(r: dict[str, Any]) -> None:
    """harmonize / same-work floor, / copy floor, / pandas script (and the --before checkout)."""
    if not getattr(_print_paired_row, "header", False):
        print("\n### Paired: harmonize against the same-work floor, the copy floor and the pandas script\n")
        print("| input | N | same-work floor | harmonize | h / same-work | h / copy floor | h / pandas "
              "| before (--before) | before / same-work | floor output equal |")
        print("|---|---:|---|---|---:|---:|---:|---|---:|---|")
        _print_paired_row.header = True  # type: ignore[attr-defined]
    chk = r.get("same_floor_check")
    if chk is None:
        equal = "not checked"
    else:
        diff = chk.get("columns_differing") or chk.get("rows_differing")
        same = chk["harmonize_rows"] == chk["floor_rows"] and not chk.get("rows_unmatched") and not diff
        equal = f"yes ({chk['harmonize_rows']:,} rows)" if same else f"NO: {chk}"
    before = r.get("before")
    cpu = [_cpu(r.get(k)) for k in ("same_floor", "harmonize", "before")]
    print(f"CPU seconds (all threads): same-work floor {cpu[0]}, harmonize {cpu[1]}, before {cpu[2]}; "
          f"harmonize / same-work floor {_cpu_ratio(r.get('harmonize'), r.get('same_floor'))}, "
          f"before / same-work floor {_cpu_ratio(before, r.get('same_floor'))}", flush=True)
    print(f"| {r['what']} | {r['n']:.0e} | {_cell(r['same_floor'])} | {_cell(r['harmonize'])} "
          f"| {_ratio(r['harmonize'], r['same_floor'])} | {_ratio(r['harmonize'], r.get('floor'))} "
          f"| {_ratio(r['harmonize'], r.get('pandas'))} | {_cell(before) if before else '-'} "
          f"| {_ratio(before, r['same_floor'])} | {equal} |", flush=True)


def _print_store_row(r: dict[str, Any]) -> None:
    if not getattr(_print_store_row, "header", False):
        print("\n### Store: audit and wide export vs raw DuckDB passes over the same parquet\n")
        print("| rows | parquet MB | build s | audit floor | audit | audit / floor | audit on Dask "
              "| wide floor | wide export | wide / floor |")
        print("|---:|---:|---:|---|---|---:|---|---|---|---:|")
        _print_store_row.header = True  # type: ignore[attr-defined]
    m = r["make"]
    build = "reused" if m.get("reused") else f"{m.get('seconds', float('nan')):.0f}"
    if "error" in m:
        print(f"| {r['n']:.0e} | | failed ({m['error'][:80]}) | | | | | | | |", flush=True)
        return
    dask = _cell(r["audit_dask"]) if "audit_dask" in r else "not run"
    print(f"| {r['n']:.0e} | {m['parquet_mb']:,.0f} | {build} | {_cell(r['audit_floor'])} "
          f"| {_cell(r['audit'])} | {_fmt_ratio(r['audit'], r['audit_floor'])} | {dask} "
          f"| {_cell(r['wide_floor'])} | {_cell(r['wide'])} | {_fmt_ratio(r['wide'], r['wide_floor'])} |",
          flush=True)


def machine() -> dict[str, Any]:
    """What the numbers were measured on."""
    import duckdb
    import pandas
    import pyarrow

    cpu = "unknown"
    try:
        cpu = next(line.split(":", 1)[1].strip() for line in Path("/proc/cpuinfo").read_text().splitlines()
                   if line.startswith("model name"))
    except (OSError, StopIteration):
        pass
    mem_gb = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES") / 2**30
    return {"cpu": cpu, "cores": os.cpu_count(), "memory_gb": round(mem_gb, 1),
            "python": platform.python_version(), "os": platform.platform(),
            "duckdb": duckdb.__version__, "pandas": pandas.__version__, "pyarrow": pyarrow.__version__,
            "date": time.strftime("%Y-%m-%d %H:%M UTC", time.gmtime())}


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", nargs="+", type=float, help="ingest sizes N (default 1e5 1e6 1e7)")
    parser.add_argument("--store-sizes", nargs="+", type=float, help="store sizes (default 1e7 1e8)")
    parser.add_argument("--quick", action="store_true", help="ingest 1e5 and 1e6 only; stores 1e6 and 1e7")
    parser.add_argument("--only", default="ingest,store,gridded", help="comma-separated: ingest, store, gridded, gridded_same")
    parser.add_argument("--inputs", default="pings,trawl", help="ingest inputs to measure: pings, trawl")
    parser.add_argument("--dask", action="store_true",
                        help="also run the Dask engine (local cluster): ping ingest and the audit")
    parser.add_argument("--work", type=Path, default=None, help="scratch folder (default: a temp dir)")
    parser.add_argument("--keep-stores", action="store_true",
                        help="keep the synthetic stores in --work and reuse those already there")
    parser.add_argument("--json", type=Path, default=ROOT / "benchmarks" / "results.json")
    parser.add_argument("--max-memory-gb", type=float, default=12.0,
                        help="address-space cap of each measured process (0 = none)")
    parser.add_argument("--grid-steps", nargs="+", type=int, default=[20, 200],
                        help="time steps of the gridded same-work comparison (--only gridded_same)")
    parser.add_argument("--before", type=Path, default=None,
                        help="another checkout (e.g. `git archive` of an earlier commit) whose harmonize is "
                             "measured in the same run, beside this one")
    parser.add_argument("--repeat", type=int, default=1,
                        help="runs of each measurement; the fastest is reported (a shared machine)")
    parser.add_argument("--child", nargs="+", help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.child:
        print(json.dumps(_task(args.child[0], args.child[1:])))
        return

    global MAX_MEMORY_MB, BEFORE, REPEAT
    BEFORE = args.before.resolve() if args.before else None
    REPEAT = max(1, args.repeat)
    MAX_MEMORY_MB = args.max_memory_gb * 1024 if args.max_memory_gb else None
    sizes = [int(s) for s in (args.sizes or ([1e5, 1e6] if args.quick else [1e5, 1e6, 1e7]))]
    store_sizes = [int(s) for s in (args.store_sizes or ([1e6, 1e7] if args.quick else [1e7, 1e8]))]
    only = {s.strip() for s in args.only.split(",")}
    info = machine()
    info["max_memory_gb_per_task"] = args.max_memory_gb
    print(f"Machine: {info['cpu']}, {info['cores']} cores, {info['memory_gb']} GB RAM; Python {info['python']}, "
          f"DuckDB {info['duckdb']}, pandas {info['pandas']}, pyarrow {info['pyarrow']}; {info['date']}")
    results: dict[str, Any] = {"machine": info}
    base = measure("import")
    results["import_baseline"] = base
    print(f"Fixed cost of a child process importing harmonize: {_cell(base)}")
    if args.keep_stores and args.work is None:
        parser.error("--keep-stores needs --work DIR")
    work = Path(tempfile.mkdtemp(prefix="harmonize-bench-", dir=args.work))
    stores = args.work if args.keep_stores else work
    try:
        if "ingest" in only:
            results["ingest"] = bench_ingest(sizes, work, args.dask, tuple(args.inputs.split(",")))
        if "store" in only:
            results["store"] = bench_store(store_sizes, stores, args.dask, args.keep_stores)
        if "gridded" in only:
            results["gridded"] = bench_gridded(args.quick, work)
        if "gridded_same" in only:
            results["gridded_same"] = bench_gridded_same(args.grid_steps, work)
    finally:
        shutil.rmtree(work, ignore_errors=True)
        args.json.write_text(json.dumps(results, indent=2, default=str) + "\n", encoding="utf-8")
    print(f"\nresults written to {args.json}")


if __name__ == "__main__":
    main()
