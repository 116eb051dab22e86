"""The command line for scripts: --json, '-' for stdout, one-line errors, exit codes, logging, help."""

from __future__ import annotations

import io
import json
import logging
import os
import shutil
import subprocess
import sys
import time
from pathlib import Path

import pandas as pd
import pytest
from cli_runner import run_cli
from harmonize.cli.console import JSON_FORMAT_VERSION

#: Observation rows of the messy trawl fixture: haul H011 (2019-12-15) is in season year 2020,
#: outside its protocol's 2015-2019 target window, so it gets no inferred zeros (targets.csv).
MESSY_TRAWL_ROWS = 29

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
VERBS = ("init", "check", "ingest", "status", "quarantine", "audit", "export", "demo", "colocate", "twins")


@pytest.fixture(scope="module")
def ingested_once(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The messy trawl fixture ingested through the command line, once per module."""
    study_dir = tmp_path_factory.mktemp("cli_scripts") / "study"
    shutil.copytree(FIXTURES / "keldmar", study_dir)
    for f in (FIXTURES / "trawl").glob("*.csv"):
        shutil.copy(f, study_dir / f.name)
    files = ["--events", str(study_dir / "hauls_messy.csv"), "--records", str(study_dir / "catch_messy.csv")]
    result = run_cli("--study", str(study_dir), "ingest", "trawl_agency", *files)
    assert result.exit_code == 0, result.stderr
    return study_dir


@pytest.fixture
def ingested(ingested_once: Path, tmp_path: Path) -> Path:
    """A copy of the ingested study for one test (tests may write into it)."""
    target = tmp_path / "study"
    shutil.copytree(ingested_once, target)
    return target


def _one_document(stdout: str, command: str) -> dict:
    assert stdout.endswith("\n") and stdout.count("\n") == 1, "one JSON document on one line, nothing else"
    doc = json.loads(stdout)
    assert doc["format"] == "harmonize-cli" and doc["format_version"] == JSON_FORMAT_VERSION
    assert doc["command"] == command
    return doc


# --------------------------------------------------------------------------- --json
def test_check_and_ingest_json(study_dir: Path) -> None:
    files = ["--events", str(study_dir / "hauls_messy.csv"), "--records", str(study_dir / "catch_messy.csv")]
    check = run_cli("--study", str(study_dir), "check", "trawl_agency", *files, "--json")
    assert check.exit_code == 1
    doc = _one_document(check.stdout, "check")
    assert doc["exit_code"] == 1
    res = doc["results"][0]
    assert res["status"] == "checked" and res["source_id"] == "keldmar_trawl"
    assert res["rows_read"] == res["rows_accepted"] + res["rows_quarantined"]
    assert len(res["quarantine"]) == res["rows_quarantined"]  # every rejected row, not the first N
    assert sum(res["quarantined_by_reason"].values()) == res["rows_quarantined"]
    assert {"source_file", "source_row", "reason_code", "message"} <= set(res["quarantine"][0])
    ingest = run_cli("--study", str(study_dir), "ingest", "trawl_agency", *files, "--json")
    assert ingest.exit_code == 0
    res = _one_document(ingest.stdout, "ingest")["results"][0]
    assert res["status"] == "complete" and res["ingest_id"] and res["records_written"] == MESSY_TRAWL_ROWS
    again = run_cli("--study", str(study_dir), "ingest", "trawl_agency", *files, "--json")
    assert _one_document(again.stdout, "ingest")["results"][0]["status"] == "unchanged"


def test_status_quarantine_twins_json(ingested: Path) -> None:
    status = _one_document(run_cli("--study", str(ingested), "status", "--check", "--json").stdout, "status")
    assert status["empty"] is False and status["integrity_problems"] == []
    assert status["ingests"][0]["source_id"] == "keldmar_trawl"
    assert sum(r["rows"] for r in status["summary"]) == MESSY_TRAWL_ROWS
    q = _one_document(run_cli("--study", str(ingested), "quarantine", "--json").stdout, "quarantine")
    assert q["rows"] == len(q["quarantine"]) == sum(q["by_reason"].values()) == 11
    twins = _one_document(run_cli("--study", str(ingested), "twins", "--json").stdout, "twins")
    assert twins["twins"] == []


def test_status_json_of_an_empty_store(study_dir: Path) -> None:
    doc = _one_document(run_cli("--study", str(study_dir), "status", "--json").stdout, "status")
    assert doc["empty"] is True and doc["ingests"] == []


def test_audit_json_on_stdout_and_in_a_file(ingested: Path, tmp_path: Path) -> None:
    alone = run_cli("--study", str(ingested), "audit", "--json")
    doc = json.loads(alone.stdout)  # the contract's audit document, nothing else on stdout
    assert {"study", "generated_at", "extent", "coverage", "findings", "tool_version"} <= set(doc)
    dash = run_cli("--study", str(ingested), "audit", "--json", "-", "--fail-on", "no_samples")
    assert json.loads(dash.stdout)["study"] == doc["study"]
    assert dash.exit_code == (1 if any(f["code"] == "no_samples" for f in doc["findings"]) else 0)
    assert not Path("-").exists() and not (ingested / "-").exists()
    out = tmp_path / "audit.json"
    to_file = run_cli("--study", str(ingested), "audit", "--json", str(out))
    assert json.loads(out.read_text())["findings"] == doc["findings"]
    assert "audit JSON written to" in to_file.stdout
    html = run_cli("--study", str(ingested), "audit", "--html", "-")
    assert html.stdout.lstrip().lower().startswith("<!doctype html")


def test_export_json_and_stdout(ingested: Path, tmp_path: Path) -> None:
    out = tmp_path / "obs.csv"
    doc = _one_document(run_cli("--study", str(ingested), "export", "long", str(out), "--json").stdout, "export")
    assert doc["export_format"] == "long" and doc["path"] == str(out) and doc["rows"] == MESSY_TRAWL_ROWS
    piped = run_cli("--study", str(ingested), "export", "long", "-")
    assert piped.exit_code == 0
    frame = pd.read_csv(io.StringIO(piped.stdout))
    assert len(frame) == MESSY_TRAWL_ROWS and "record_id" in frame.columns
    assert f"wrote {MESSY_TRAWL_ROWS} observation rows to stdout" in piped.stderr
    both = run_cli("--study", str(ingested), "export", "long", "-", "--json")
    assert both.exit_code == 2 and both.stdout == ""


def test_dash_means_stdout_for_csv_outputs(ingested: Path) -> None:
    q = run_cli("--study", str(ingested), "quarantine", "--csv", "-")
    frame = pd.read_csv(io.StringIO(q.stdout))
    assert len(frame) == 11 and "reason_code" in frame.columns
    twins = run_cli("--study", str(ingested), "twins", "--csv", "-")
    assert twins.exit_code == 0 and twins.stdout.count("\n") == 1  # the header alone: no twins here
    assert "twin_source_id" in twins.stdout.splitlines()[0]
    assert not (ingested / "-").exists() and not Path("-").exists()


# --------------------------------------------------------------------------- errors and exit codes
def test_unknown_export_format_is_one_line_on_stderr(ingested: Path) -> None:
    result = run_cli("--study", str(ingested), "export", "xlsx", "out.xlsx")
    assert result.exit_code == 2 and result.stdout == ""
    line = result.stderr.strip()
    assert "\n" not in line and line.startswith("error: ")
    assert "'xlsx' is not one of 'long', 'wide', 'grid', 'gpkg', 'dwca'" in line
    assert "harmonize export --help" in line


def test_unknown_option_is_one_line_exit_2() -> None:
    result = run_cli("status", "--colour")
    assert result.exit_code == 2 and result.stdout == ""
    assert result.stderr.strip().count("\n") == 0 and "No such option: --colour" in result.stderr


def test_interrupt_is_exit_130(study_dir: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    import harmonize.ingest

    def interrupted(*_a: object, **_k: object) -> None:
        raise KeyboardInterrupt

    monkeypatch.setattr(harmonize.ingest, "run", interrupted)
    result = run_cli("--study", str(study_dir), "check", "trawl_agency", "--events", str(study_dir / "hauls_messy.csv"),
                     "--records", str(study_dir / "catch_messy.csv"))
    assert result.exit_code == 130
    assert result.stderr.strip() == "interrupted; the store is unchanged"


def test_internal_error_is_one_line_exit_3(study_dir: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    import harmonize.ingest

    def broken(*_a: object, **_k: object) -> None:
        raise ZeroDivisionError("boom")

    monkeypatch.setattr(harmonize.ingest, "run", broken)
    monkeypatch.delenv("HARMONIZE_DEBUG", raising=False)
    result = run_cli("--study", str(study_dir), "check", "trawl_agency", "--events", "a.csv", "--records", "b.csv")
    assert result.exit_code == 3
    assert result.stderr.strip().startswith("internal error: ZeroDivisionError: boom.")
    assert result.stderr.strip().count("\n") == 0


# --------------------------------------------------------------------------- output for pipes
def test_no_wrapping_truncation_or_colour_in_a_pipe(study_dir: Path) -> None:
    long_name = "H" + "X" * 150
    hauls = study_dir / "hauls_messy.csv"
    hauls.write_text(hauls.read_text().replace("H004,", f"{long_name},", 1))
    result = run_cli("--study", str(study_dir), "check", "trawl_agency", "--events", str(hauls),
                     "--records", str(study_dir / "catch_messy.csv"), "--all", env={"NO_COLOR": "1", "COLUMNS": "40"})
    assert "\x1b[" not in result.stdout and "\x1b[" not in result.stderr
    lines = result.stdout.splitlines()
    # the table and the messages keep whole lines, however narrow the terminal setting
    assert any("hauls_messy.csv row 4: [end_before_start]" in ln and len(ln) > 80 for ln in lines)
    assert not any(ln.rstrip().endswith("…") for ln in lines)


def test_check_lists_rejected_rows_per_reason_and_all(study_dir: Path) -> None:
    files = ["--events", str(study_dir / "hauls_messy.csv"), "--records", str(study_dir / "catch_messy.csv")]
    full = run_cli("--study", str(study_dir), "check", "trawl_agency", *files, "--all")
    rows = [ln for ln in full.stdout.splitlines() if ln.startswith("  ") and " row " in ln]
    doc = json.loads(run_cli("--study", str(study_dir), "check", "trawl_agency", *files, "--json").stdout)
    by_reason = doc["results"][0]["quarantined_by_reason"]
    assert len(rows) == sum(by_reason.values())
    one = run_cli("--study", str(study_dir), "check", "trawl_agency", *files, "--show", "1")
    listed = [ln for ln in one.stdout.splitlines() if ln.startswith("  ") and " row " in ln]
    assert len(listed) == len(by_reason)  # the first row of each reason
    assert sorted(ln.split("[")[1].split("]")[0] for ln in listed) == sorted(by_reason)
    assert "'--all' lists every one" in one.stdout and "harmonize quarantine" not in one.stdout


# --------------------------------------------------------------------------- study, logging, help
def test_study_after_the_verb_and_from_the_environment(ingested: Path, tmp_path: Path) -> None:
    after = run_cli("status", "--study", str(ingested), "--json")
    assert _one_document(after.stdout, "status")["empty"] is False
    env = run_cli("status", "--json", env={"HARMONIZE_STUDY": str(ingested)})
    assert _one_document(env.stdout, "status")["empty"] is False
    # the verb's --study wins over the one before it, which wins over the environment
    both = run_cli("--study", str(tmp_path), "status", "--study", str(ingested), "--json",
                   env={"HARMONIZE_STUDY": str(tmp_path)})
    assert _one_document(both.stdout, "status")["empty"] is False
    nowhere = run_cli("status", env={"HARMONIZE_STUDY": str(tmp_path)})
    assert nowhere.exit_code == 2 and "no study.toml here" in nowhere.stderr


def test_verbose_and_quiet_use_logging(study_dir: Path) -> None:
    files = ["--events", str(study_dir / "hauls_messy.csv"), "--records", str(study_dir / "catch_messy.csv")]
    loud = run_cli("--study", str(study_dir), "-v", "check", "trawl_agency", *files)
    assert "INFO: reading hauls_messy.csv, catch_messy.csv with profile trawl_agency.toml (trawl adapter)" in loud.stderr
    assert "INFO:" not in loud.stdout
    debug = run_cli("--study", str(study_dir), "-vv", "check", "trawl_agency", *files)
    assert "DEBUG harmonize.ingest: input sha256" in debug.stderr
    quiet = run_cli("--study", str(study_dir), "--quiet", "check", "trawl_agency", *files)
    assert quiet.stderr == ""
    assert logging.getLogger("harmonize.ingest").name == "harmonize.ingest"


def test_every_verb_has_examples_and_no_python_type_names() -> None:
    for verb in VERBS:
        text = run_cli(verb, "--help").stdout
        assert "Examples:" in text, verb
        for name in ("<str>", "<int>", "<float>", "<path>", "list[", "<bool>", "{"):
            assert name not in text, (verb, name)
    assert "<long|wide|grid|gpkg|dwca>" in run_cli("export", "--help").stdout
    assert "<duckdb|dask>" in run_cli("audit", "--help").stdout
    assert "<duckdb|dask>" in run_cli("ingest", "--help").stdout
    top = run_cli("--help").stdout
    assert "--install-completion" in top and "HARMONIZE_STUDY" in top
    for verb in VERBS:  # whole one-line summaries, not cut with "..."
        line = next(ln for ln in top.splitlines() if ln.strip().startswith(verb + " "))
        assert not line.rstrip().endswith("..."), line


@pytest.mark.subprocess
def test_python_dash_m_and_completion_script() -> None:
    env = {**os.environ, "NO_COLOR": "1"}
    version = subprocess.run([sys.executable, "-m", "harmonize", "--version"], capture_output=True, text=True,
                             timeout=60, env=env)
    assert version.returncode == 0 and version.stdout.startswith("harmonize ")
    script = subprocess.run([sys.executable, "-m", "harmonize", "--show-completion", "bash"], capture_output=True,
                            text=True, timeout=60, env={**env, "SHELL": "/bin/bash"})
    assert script.returncode == 0 and "complete" in script.stdout


@pytest.mark.subprocess
def test_the_command_module_does_not_import_heavy_libraries() -> None:
    code = ("import sys, harmonize.cli.app; heavy = [m for m in ('pandas', 'pandera', 'geopandas', 'duckdb', "
            "'xarray', 'pyarrow', 'shapely') if m in sys.modules]; print(','.join(heavy))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60)
    assert out.returncode == 0 and out.stdout.strip() == "", out.stdout
    light = subprocess.run([sys.executable, "-c", "import sys, harmonize.errors, harmonize; "
                            "print('pandas' in sys.modules)"], capture_output=True, text=True, timeout=60)
    assert light.stdout.strip() == "False"
    started = time.perf_counter()
    subprocess.run([sys.executable, "-m", "harmonize", "--version"], capture_output=True, timeout=60)
    assert time.perf_counter() - started < 30  # a smoke bound only; benchmarks/startup.py measures the ratio


def test_light_copies_agree_with_the_library() -> None:
    # the command lists these without importing the heavy modules that define them
    from harmonize.cli.demo_cmd import DEFAULT_SEED

    from harmonize.demo.build import DEFAULT_SEED as BUILD_SEED
    from harmonize.export import FORMATS
    from harmonize.export.run import EXPORTERS

    assert DEFAULT_SEED == BUILD_SEED
    assert tuple(EXPORTERS) == FORMATS
