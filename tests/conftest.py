"""Shared fixtures: a copy of the small invented Keldmar study for each test."""

from __future__ import annotations

import os
import shutil
from pathlib import Path

import pytest
from hypothesis import settings

from harmonize.study import Study, load_study

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"

# "fast": make test-fast (the development lane); "ci": make test; "dev": thorough. Tests that
# set their own max_examples scale it with tests/examples.py:scaled().
settings.register_profile("fast", max_examples=5, deadline=None)
settings.register_profile("ci", max_examples=40, deadline=None)
settings.register_profile("dev", max_examples=400, deadline=None)
settings.load_profile(os.environ.get("HYPOTHESIS_PROFILE", "ci"))


@pytest.fixture
def study_dir(tmp_path: Path) -> Path:
    """A fresh copy of fixtures/keldmar with the messy trawl files beside it."""
    target = tmp_path / "study"
    shutil.copytree(FIXTURES / "keldmar", target)
    for f in (FIXTURES / "trawl").glob("*.csv"):
        shutil.copy(f, target / f.name)
    return target


@pytest.fixture
def study(study_dir: Path) -> Study:
    return load_study(study_dir)


@pytest.fixture(autouse=True)
def _one_duckdb_thread_per_worker() -> object:
    """Under pytest-xdist (two processes on two cores) each DuckDB connection takes one thread,
    as ``HARMONIZE_THREADS=1`` would: without it every worker's connections start a thread per
    core and the processes oversubscribe the cores (about 11 % slower, measured). A single
    process (``make test``) runs with DuckDB's default."""
    if not os.environ.get("PYTEST_XDIST_WORKER"):
        yield None
        return
    from harmonize import settings as run_settings

    with run_settings.applied(run_settings.Settings(threads="1")):
        yield None
