"""The harmonize command through typer's test runner: exit codes, one-line errors, no tracebacks."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from cli_runner import run_cli


@dataclass
class Done:
    returncode: int
    stdout: str
    stderr: str


def harmonize(*args: str, env: dict[str, str] | None = None) -> Done:
    result = run_cli(*args, env=env)
    return Done(result.exit_code, result.stdout, result.stderr)


def test_help_lists_every_verb() -> None:
    out = harmonize("--help")
    assert out.returncode == 0
    for verb in ("init", "check", "ingest", "status", "quarantine", "demo"):
        assert verb in out.stdout
    for verb in ("check", "ingest", "status", "quarantine"):
        assert harmonize(verb, "--help").returncode == 0


def test_init_then_status_on_a_new_study(tmp_path: Path) -> None:
    out = harmonize("init", str(tmp_path / "s"))
    assert out.returncode == 0, out.stderr
    assert (tmp_path / "s" / "study.toml").is_file()
    assert (tmp_path / "s" / "profiles" / "example_trawl.toml").is_file()
    status = harmonize("--study", str(tmp_path / "s"), "status")
    assert status.returncode == 0
    assert "nothing ingested yet" in status.stdout


def test_config_error_is_one_line_exit_2(study_dir: Path) -> None:
    (study_dir / "study.toml").write_text((study_dir / "study.toml").read_text().replace("cell_size_km = 25", "cell_size_km = 0"))
    out = harmonize("--study", str(study_dir), "status")
    assert out.returncode == 2
    assert out.stderr.strip().count("\n") == 0
    assert "study.toml: study.cell_size_km: expected a number above 0, got 0" in out.stderr
    assert "Traceback" not in out.stderr


def test_check_and_ingest_the_messy_fixture(study_dir: Path) -> None:
    args = ["--study", str(study_dir)]
    files = ["--events", str(study_dir / "hauls_messy.csv"), "--records", str(study_dir / "catch_messy.csv")]
    check = harmonize(*args, "check", "trawl_agency", *files)
    assert check.returncode == 1  # rows would go to quarantine
    assert "hauls_messy.csv row 4: [end_before_start]" in check.stdout
    assert not (study_dir / "store" / "harmonized.duckdb").exists()  # check writes nothing
    ingest = harmonize(*args, "ingest", "trawl_agency", *files)
    assert ingest.returncode == 0, ingest.stderr
    # 29: haul H011 (2019-12-15) is in season year 2020, outside Calverion rubrum's 2015-2019 window
    assert "observation rows written: 29" in ingest.stdout
    again = harmonize(*args, "ingest", "trawl_agency", *files)
    assert again.returncode == 0 and "nothing to do" in again.stdout
    strict = harmonize(*args, "ingest", "--strict", "trawl_agency", *files)
    assert strict.returncode == 0  # unchanged: nothing new was quarantined
    status = harmonize(*args, "status", "--check")
    assert status.returncode == 0 and "integrity check passed" in status.stdout
    q = harmonize(*args, "quarantine", "--reason", "unknown_taxon")
    assert "catch_messy.csv row 3: [unknown_taxon] taxon 'Syranthus minor' is not in the taxa list; closest known: Syrranthus minor" in q.stdout
    assert "see 'harmonize quarantine'" not in check.stdout  # check lists the rows itself
    csv_out = study_dir / "rejected.csv"
    assert harmonize(*args, "quarantine", "--csv", str(csv_out)).returncode == 0
    assert len(csv_out.read_text().strip().splitlines()) == 1 + 11


def test_missing_file_and_wrong_arguments(study_dir: Path) -> None:
    args = ["--study", str(study_dir)]
    out = harmonize(*args, "ingest", "trawl_agency", "--events", str(study_dir / "nope.csv"), "--records", str(study_dir / "catch_messy.csv"))
    assert out.returncode == 2 and "nope.csv: no such file" in out.stderr
    out = harmonize(*args, "ingest", "trawl_agency", str(study_dir / "hauls_messy.csv"))
    assert out.returncode == 2 and "a trawl source reads two tables; pass --events FILE --records FILE" in out.stderr
    out = harmonize(*args, "check", "no_such_profile", "x.csv")
    assert out.returncode == 2 and "no such profile; profiles in the study:" in out.stderr


def test_ingest_and_status_count_events_without_values(study_dir: Path) -> None:
    # Without a protocol, haul H010 (no catch row) yields no observation row.
    text = (study_dir / "profiles" / "trawl_agency.toml").read_text()
    (study_dir / "profiles" / "trawl_bare.toml").write_text(text.replace('protocol = "keldmar_bottom_trawl"\n', ""))
    args = ["--study", str(study_dir)]
    files = ["--events", str(study_dir / "hauls_messy.csv"), "--records", str(study_dir / "catch_messy.csv")]
    ingest = harmonize(*args, "ingest", "trawl_bare", *files)
    assert ingest.returncode == 0, ingest.stderr
    assert "observation rows written: 15" in ingest.stdout
    assert "accepted events without any observation row: 1 (kept in the store's events_without_values)" in ingest.stdout
    status = harmonize(*args, "status", "--check")
    assert status.returncode == 0 and "integrity check passed" in status.stdout
    assert "accepted events without any observation row: 1 (keldmar_trawl 1)" in status.stdout
    # with the protocol every haul has values (zeros): no such line
    plain = harmonize(*args, "ingest", "--replace", "trawl_agency", *files)
    assert plain.returncode == 0, plain.stderr
    assert "without any observation row" not in plain.stdout
    assert "without any observation row" not in harmonize(*args, "status").stdout
