"""Start-up of the command: ``harmonize --help`` and ``--version`` against a bare ``python -c pass``.

Run from the repository root::

    .venv/bin/python -m benchmarks.startup            # 9 runs of each, medians
    .venv/bin/python -m benchmarks.startup --runs 21 --json benchmarks/startup.json

Each run is a fresh process, as a user or a shell script starts it (the console script in the
virtual environment's bin/, and ``python -m harmonize``). Reported: the median wall time of
each, the time above the bare interpreter (target: under 0.3 s) and the ratio to it. The
ratio depends less on the machine than the seconds do. Not part of the test suite.
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import time
from pathlib import Path

TARGET_EXTRA_S = 0.3


#: As a user's shell runs it: byte code cached (a development shell may set PYTHONDONTWRITEBYTECODE).
_ENV = {k: v for k, v in os.environ.items() if k != "PYTHONDONTWRITEBYTECODE"}


def _median_seconds(cmd: list[str], runs: int) -> float:
    times = []
    for _ in range(runs):
        start = time.perf_counter()
        subprocess.run(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, check=True, env=_ENV)
        times.append(time.perf_counter() - start)
    return statistics.median(times)


def measure(runs: int = 9) -> dict[str, dict[str, float]]:
    """Median seconds of each command, its time above ``python -c pass`` and the ratio to it."""
    python = sys.executable
    script = str(Path(python).parent / "harmonize")
    commands = {
        "python -c pass": [python, "-c", "pass"],
        "harmonize --version": [script, "--version"],
        "harmonize --help": [script, "--help"],
        "python -m harmonize --help": [python, "-m", "harmonize", "--help"],
        "import harmonize.ingest (for scale)": [python, "-c", "import harmonize.ingest"],
    }
    for cmd in commands.values():  # warm the file cache and write the byte code once
        _median_seconds(cmd, 1)
    bare = _median_seconds(commands["python -c pass"], runs)
    out = {}
    for name, cmd in commands.items():
        t = bare if name == "python -c pass" else _median_seconds(cmd, runs)
        out[name] = {"median_s": round(t, 4), "extra_s": round(t - bare, 4), "ratio": round(t / bare, 2)}
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--runs", type=int, default=9)
    parser.add_argument("--json", type=Path, default=None, help="also write the results to this file")
    ns = parser.parse_args()
    results = measure(ns.runs)
    print("| command | median (s) | above bare python (s) | ratio to bare python |")
    print("|---|---:|---:|---:|")
    for name, r in results.items():
        print(f"| {name} | {r['median_s']:.3f} | {r['extra_s']:+.3f} | {r['ratio']:.2f} |")
    worst = max(results["harmonize --help"]["extra_s"], results["harmonize --version"]["extra_s"])
    verdict = "met" if worst < TARGET_EXTRA_S else "NOT met"
    print(f"\ntarget: --help and --version within {TARGET_EXTRA_S} s of a bare python: {verdict} ({worst:+.3f} s)")
    if ns.json:
        ns.json.write_text(json.dumps({"runs": ns.runs, "results": results, "target_extra_s": TARGET_EXTRA_S},
                                      indent=1) + "\n")


if __name__ == "__main__":
    main()
