"""The seed corpus of broken files (fixtures/fuzz/): each case keeps its pinned outcome.

The corpus holds the worst cases found by fuzzing and by hand (an unclosed quote in the
header, mixed encodings, UTF-16, NaN/inf/1e400, decimal commas, NUL bytes, SQL and
spreadsheet-formula text). Each either gets its one-line refusal or its exact accounting;
damage that changes nothing (byte-order mark, CRLF or CR line endings, blank rows) must give
exactly the result of the unbroken files.
"""

from __future__ import annotations

import tomllib
from pathlib import Path

import pytest
from fuzzing import TARGETS, check_outcome, reason_counts, write_inputs

from harmonize.store import Store
from harmonize.study import Study

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
CASES = tomllib.loads((FIXTURES / "fuzz" / "cases.toml").read_text(encoding="utf-8"))


def _accounting(result) -> dict[str, list[int]]:  # type: ignore[no-untyped-def]
    return {f.role: [f.rows_read, f.rows_accepted, f.rows_quarantined] for f in result.files}


def test_every_corpus_file_has_a_case() -> None:
    files = {p.stem for p in (FIXTURES / "fuzz").glob("*/*") if p.is_file()}
    assert files == set(CASES)


@pytest.mark.parametrize("name", sorted(CASES))
def test_corpus_case(study: Study, tmp_path: Path, name: str) -> None:
    case = CASES[name]
    profile, originals = TARGETS[case["kind"]]
    broken = next((FIXTURES / "fuzz" / case["kind"]).glob(f"{name}.*"))
    inputs = write_inputs(tmp_path / "in", originals, {case["role"]: broken.read_bytes()})
    outcome = check_outcome(study, profile, inputs, write=bool(case.get("commit")))
    if case.get("commit"):
        assert outcome.result is not None, outcome.refused
        assert Store(study.store_dir).check() == []
    if "refused" in case:
        assert outcome.refused is not None, f"{name} was accepted"
        assert case["refused"] in outcome.refused
        return
    assert outcome.result is not None, outcome.refused
    if case.get("accounted"):  # the oracle of check_outcome is the whole expectation
        return
    if case.get("same_as_base"):
        base = check_outcome(study, profile, write_inputs(tmp_path / "base", originals, {})).result
        assert base is not None
        assert _accounting(outcome.result) == _accounting(base)
        assert reason_counts(outcome.result) == reason_counts(base)
        assert outcome.result.records_written == base.records_written
        return
    assert _accounting(outcome.result) == case["rows"]
    reasons = reason_counts(outcome.result)
    for code, n in case["reasons"].items():
        assert reasons.get(code, 0) == n, (code, reasons)
    if "written" in case:
        assert outcome.result.records_written == case["written"]
    if "without_values" in case:  # accepted events that yield no observation row, with their flags
        stored = Store(study.store_dir).events_without_values()
        assert {e: sorted(f) for e, f in zip(stored["event_id"], stored["flags"], strict=True)} == case["without_values"]
