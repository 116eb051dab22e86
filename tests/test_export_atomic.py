"""Exports are all or nothing: a kill at any moment leaves the earlier file or a complete new one;
nothing is ever written inside the store folder."""

from __future__ import annotations

import os
import random
import shutil
import signal
import subprocess
import sys
import time
import zipfile
from pathlib import Path

import pandas as pd
import pyarrow.parquet as pq
import pyogrio
import pytest

from harmonize import Store, load_study
from harmonize.errors import HarmonizeError
from harmonize.export.long import export_long
from harmonize.ingest import run

BIN = Path(sys.executable).parent / "harmonize"
FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
#: kills per format: 2 in CI, 8 with HYPOTHESIS_PROFILE=dev
KILLS = 8 if os.environ.get("HYPOTHESIS_PROFILE") == "dev" else 2
GPKG_LAYERS = {"domain", "strata", "samples", "gridded_cells", "fishing_cells", "cells", "cell_coverage",
               "export_metadata"}


@pytest.fixture(scope="module")
def exported_study(tmp_path_factory: pytest.TempPathFactory) -> Path:
    target = tmp_path_factory.mktemp("built") / "study"
    shutil.copytree(FIXTURES / "keldmar", target)
    for f in (FIXTURES / "trawl").glob("*.csv"):
        shutil.copy(f, target / f.name)
    run(load_study(target), "trawl_agency", {"events": target / "hauls_messy.csv", "records": target / "catch_messy.csv"})
    return target


def _export(study_dir: Path, fmt: str, out: Path, *extra: str) -> subprocess.Popen[str]:
    return subprocess.Popen([str(BIN), "--study", str(study_dir), "export", fmt, str(out), *extra],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def _rows(path: Path) -> int:
    """Rows of a complete export, read by an independent reader (raises on a partial file)."""
    suffix = path.suffix
    if suffix == ".csv":
        return len(pd.read_csv(path))
    if suffix == ".parquet":
        return pq.read_table(path).num_rows
    if suffix == ".gpkg":
        layers = {name for name, _ in pyogrio.list_layers(path)}
        assert layers == GPKG_LAYERS, layers
        return len(pyogrio.read_dataframe(path, layer="samples"))
    with zipfile.ZipFile(path) as zf:
        assert zf.testzip() is None
        names = set(zf.namelist())
        assert {"meta.xml", "eml.xml", "event.txt"} <= names, names
        return len(zf.read("event.txt").decode().splitlines()) - 1


@pytest.mark.subprocess
@pytest.mark.parametrize(("fmt", "name"), [("long", "long.csv"), ("long", "long.parquet"), ("wide", "wide.csv"),
                                          ("grid", "grid.parquet"), ("gpkg", "coverage.gpkg"), ("dwca", "dwca.zip")])
def test_a_killed_export_leaves_the_earlier_file_or_a_complete_new_one(
        exported_study: Path, tmp_path: Path, fmt: str, name: str) -> None:
    # the earlier export holds one taxon only (other bytes, for most formats fewer rows)
    earlier = tmp_path / f"earlier-{name}"
    proc = _export(exported_study, fmt, earlier, "--variables", "Ostravix keldensis")
    assert proc.wait(timeout=300) == 0, proc.communicate()
    full = tmp_path / f"full-{name}"
    start = time.monotonic()
    proc = _export(exported_study, fmt, full)
    assert proc.wait(timeout=300) == 0, proc.communicate()
    duration = time.monotonic() - start
    n_full = _rows(full)
    assert earlier.read_bytes() != full.read_bytes()
    target = tmp_path / name
    rng = random.Random(f"{fmt}-{name}")
    outcomes = []
    for k in range(KILLS):
        shutil.copy(earlier, target)
        before = target.read_bytes()
        proc = _export(exported_study, fmt, target)
        time.sleep(rng.uniform(0.3 * duration, duration))
        proc.send_signal(signal.SIGKILL if k % 2 == 0 else signal.SIGTERM)
        proc.communicate(timeout=120)
        if target.read_bytes() == before:
            outcomes.append("earlier")
        else:
            assert _rows(target) == n_full  # complete, never cut
            outcomes.append("new")
        # a killed export may leave its hidden partial file; never a file under the export's name
        assert sorted(p.name for p in tmp_path.iterdir() if not p.name.startswith(".")
                      and p.name.startswith(name)) in ([name], [name, name + "-metadata.json"])
    assert len(outcomes) == KILLS


def test_an_export_failing_half_way_leaves_the_earlier_file(exported_study: Path, tmp_path: Path,
                                                            monkeypatch: pytest.MonkeyPatch) -> None:
    # the disk fills while the GeoPackage's last layer is written: the earlier file stays whole
    from harmonize.export import gpkg

    study = load_study(exported_study)
    target = tmp_path / "coverage.gpkg"
    gpkg.export_gpkg(study, target)
    before = target.read_bytes()
    real = pyogrio.write_dataframe

    def full_disk(frame: pd.DataFrame, path: object, layer: str = "", **kw: object) -> None:
        if layer == "export_metadata":
            raise OSError(28, "No space left on device")
        real(frame, path, layer=layer, **kw)

    monkeypatch.setattr(gpkg.pyogrio, "write_dataframe", full_disk)
    with pytest.raises(OSError, match="No space left"):
        gpkg.export_gpkg(study, target)
    assert target.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["coverage.gpkg"]  # no partial file left


@pytest.mark.subprocess
def test_an_export_into_the_store_is_refused(exported_study: Path, tmp_path: Path) -> None:
    study_dir = tmp_path / "study"
    shutil.copytree(exported_study, study_dir)
    store = Store(study_dir / "store")
    with store.connect(view=False) as con:
        live = con.execute("SELECT path FROM observation_files").fetchall()[0][0]
    target = store.directory / live
    before = target.read_bytes()
    result = subprocess.run([str(BIN), "--study", str(study_dir), "export", "long", str(target)],
                            capture_output=True, text=True, timeout=300)
    assert result.returncode == 2
    assert "an export cannot be written inside the store folder" in result.stderr
    assert len(result.stderr.strip().splitlines()) == 1
    assert target.read_bytes() == before and store.check() == []
    with pytest.raises(HarmonizeError, match="inside the store folder"):
        export_long(load_study(study_dir), study_dir / "store" / "copy.csv")
    assert not (study_dir / "store" / "copy.csv").exists()


# ------------------------------------------------------------------ the quarantine listing and the audit's files
def _half_then_full(real: object, text_to_keep: int = 40):
    """A writer that writes part of its output, then meets a full disk (errno 28, no file name)."""
    def write(frame: pd.DataFrame, path: object, *args: object, **kw: object) -> None:
        real(frame, path, *args, **kw)  # type: ignore[operator]
        data = Path(path).read_bytes()  # type: ignore[arg-type]
        Path(path).write_bytes(data[:text_to_keep])  # type: ignore[arg-type]
        raise OSError(28, "No space left on device")
    return write


def test_a_quarantine_listing_failing_half_way_leaves_the_earlier_file(
        exported_study: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    from cli_runner import run_cli

    from harmonize.export import safe_csv

    target = tmp_path / "rejected.csv"
    first = run_cli("--study", str(exported_study), "quarantine", "--csv", str(target))
    assert first.exit_code == 0, first.stderr
    before = target.read_bytes()
    assert len(pd.read_csv(target)) == 11  # the fixture's quarantined rows: 6 hauls + 5 catch rows
    monkeypatch.setattr(safe_csv, "write_safe_csv", _half_then_full(safe_csv.write_safe_csv))
    second = run_cli("--study", str(exported_study), "quarantine", "--csv", str(target))
    assert second.exit_code == 3
    assert second.stderr == f"no space left on device at {target}; the store is unchanged\n"
    assert target.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["rejected.csv"]  # no partial file left


def test_the_audit_files_failing_half_way_leave_the_earlier_files(
        exported_study: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    from cli_runner import run_cli

    from harmonize.export import atomic

    json_out, html_out = tmp_path / "audit.json", tmp_path / "audit.html"
    first = run_cli("--study", str(exported_study), "audit", "--json", str(json_out), "--html", str(html_out))
    assert first.exit_code == 0, first.stderr
    before = {p.name: p.read_bytes() for p in (json_out, html_out)}
    real = atomic._replace_durably

    def full_at_rename(written: Path, target: Path) -> None:
        if target.name == "audit.html":  # the JSON went through; the report meets a full disk
            written.write_bytes(written.read_bytes()[:100])
            raise OSError(28, "No space left on device", str(target))
        real(written, target)

    monkeypatch.setattr(atomic, "_replace_durably", full_at_rename)
    second = run_cli("--study", str(exported_study), "audit", "--json", str(json_out), "--html", str(html_out))
    assert second.exit_code == 3
    assert second.stderr == f"no space left on device at {html_out}; the store is unchanged\n"
    assert html_out.read_bytes() == before["audit.html"]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["audit.html", "audit.json"]


@pytest.mark.parametrize("args", [("quarantine", "--csv"), ("audit", "--json"), ("audit", "--html")])
def test_the_quarantine_and_audit_files_are_refused_inside_the_store(exported_study: Path, tmp_path: Path,
                                                                    args: tuple[str, str]) -> None:
    from cli_runner import run_cli

    study_dir = tmp_path / "study"
    shutil.copytree(exported_study, study_dir)
    target = study_dir / "store" / "harmonized.duckdb"
    before = target.read_bytes()
    result = run_cli("--study", str(study_dir), *args, str(target))
    assert result.exit_code == 2
    assert result.stderr.startswith(f"error: {target}: an export cannot be written inside the store folder")
    assert len(result.stderr.strip().splitlines()) == 1
    assert target.read_bytes() == before
