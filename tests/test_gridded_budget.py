"""A time budget per gridded file ([aggregate] max_seconds_per_file): a file that takes longer is
stopped with one line naming the file and the budget, and nothing of it is written."""

from __future__ import annotations

import itertools
from pathlib import Path

import numpy as np
import pytest
from gridded_files import regular_file, write_profile

from harmonize import Store, load_study, run
from harmonize.adapters import gridded
from harmonize.errors import ConfigError, InputFileError

SST = 'sst = "sea_surface_temperature"'
LAT, LON = np.array([43.0, 43.1]), np.array([-152.0, -151.9])
N_STEPS = 40


def _file(study_dir: Path) -> Path:
    values = np.full((N_STEPS, 2, 2), 12.5, np.float32)
    return regular_file(study_dir / "sst.nc", {"sst": (values, {"units": "degC"})}, LAT, LON,
                        time=np.arange(N_STEPS, dtype=float))


def _stopped(study_dir: Path, extra: str, match: str) -> str:
    path = _file(study_dir)
    write_profile(study_dir, "sst_sat", SST, extra=extra)
    study = load_study(study_dir)
    with pytest.raises(InputFileError, match=match) as info:
        run(study, "sst_sat", {"rows": path})
    text = str(info.value)
    assert "sst.nc" in text and "\n" not in text
    assert "nothing of this file was written" in text
    store = Store(study.store_dir)
    assert not store.exists() or len(store.ingests()) == 0
    staging = study.store_dir / "staging"
    assert not staging.exists() or [p for p in staging.iterdir() if p.is_dir()] == []
    return text


def test_a_file_over_its_time_budget_is_stopped_in_one_line(study_dir: Path) -> None:
    # a budget no reading can meet: stopped before the variable is read
    _stopped(study_dir, "max_seconds_per_file = 1e-9\n",
             r"reading stopped after \d+\.\d s, over the time budget of 1e-09 s per file "
             r"\(\[aggregate\] max_seconds_per_file\), before reading 'sst'")


def test_the_budget_stops_a_file_between_blocks(study_dir: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # a clock that advances one second each time it is read; blocks of one time step and one
    # grid row each (chunk_mb far below one row): 40 steps x 2 rows
    clock = itertools.count()
    monkeypatch.setattr(gridded.time, "monotonic", lambda: float(next(clock)))
    text = _stopped(study_dir, "chunk_mb = 1e-6\nmax_seconds_per_file = 5\n",
                    rf"over the time budget of 5 s per file .*, with \d+ of {N_STEPS * len(LAT)} blocks of 'sst' read")
    done = int(text.split(" with ")[1].split(" of ")[0])
    assert 0 < done < N_STEPS * len(LAT)


def test_a_file_within_its_budget_is_read_whole(study_dir: Path) -> None:
    path = _file(study_dir)
    write_profile(study_dir, "sst_sat", SST, extra="chunk_mb = 1e-6\nmax_seconds_per_file = 600\n")
    result = run(load_study(study_dir), "sst_sat", {"rows": path})
    assert result.status == "complete" and result.rows_read == N_STEPS * 4


def test_the_default_budget_is_ten_minutes(study_dir: Path) -> None:
    write_profile(study_dir, "sst_sat", SST)
    from harmonize.ingest import prepare

    _, profile = prepare(load_study(study_dir), "sst_sat")
    assert gridded.GriddedSettings.from_profile(profile).max_seconds_per_file == 600.0


@pytest.mark.parametrize("value", ["0", "-5", "inf", "nan", "true", '"ten"'])
def test_a_budget_that_is_not_a_positive_finite_number_is_refused(study_dir: Path, value: str) -> None:
    write_profile(study_dir, "sst_sat", SST, extra=f"max_seconds_per_file = {value}\n")
    path = _file(study_dir)
    with pytest.raises(ConfigError, match=r"aggregate\.max_seconds_per_file.*"
                                          r"(expected a finite number of seconds above 0|must be|is not)"):
        run(load_study(study_dir), "sst_sat", {"rows": path})
