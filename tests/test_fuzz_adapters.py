"""Fuzzing the tabular adapters: broken files are refused in one line or fully accounted for.

Each example takes a valid-but-messy fixture file of a source kind, breaks it with one to
four mutations (tests/fuzzing.py: deleted and swapped columns, wrong types, hostile values,
stray delimiters and quotes, BOMs, mixed encodings, blank lines, a truncated last line, a
repeated header, other line endings) and runs the ingest. The property (issue 11): no
unhandled exception; either a one-line error naming the file, or every row accounted for
(rows_read = rows_accepted + rows_quarantined, one quarantine row per rejected row). Runs
`max_examples` of the hypothesis profile per kind ("ci" fast, HYPOTHESIS_PROFILE=dev thorough).
"""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest
from fuzzing import Mutation, check_outcome, mutate_all, mutations, write_inputs
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from harmonize.store import Store
from harmonize.study import Study, load_study

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"

#: kind -> (profile in fixtures/keldmar/profiles, role -> fixture file). One-table kinds use "rows".
TARGETS: dict[str, tuple[str, dict[str, Path]]] = {
    "trawl": ("trawl_agency", {"events": FIXTURES / "trawl" / "hauls_messy.csv",
                               "records": FIXTURES / "trawl" / "catch_messy.csv"}),
}

_FIXTURE_SETTINGS = settings(suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])


@pytest.fixture(scope="module")
def fuzz_study(tmp_path_factory: pytest.TempPathFactory) -> Study:
    root = tmp_path_factory.mktemp("fuzz") / "study"
    shutil.copytree(FIXTURES / "keldmar", root)
    return load_study(root)


def _broken_inputs(study: Study, kind: str, role: str, ms: list[Mutation]) -> dict[str, Path]:
    _, originals = TARGETS[kind]
    broken = mutate_all(originals[role].read_bytes(), ms)
    return write_inputs(study.root / "inputs" / kind, originals, {role: broken})


@pytest.mark.parametrize("kind", sorted(TARGETS))
@_FIXTURE_SETTINGS
@given(data=st.data(), ms=st.lists(mutations(), min_size=1, max_size=4))
def test_broken_file_is_refused_in_one_line_or_every_row_is_accounted_for(
    fuzz_study: Study, kind: str, data: st.DataObject, ms: list[Mutation]
) -> None:
    profile, originals = TARGETS[kind]
    role = data.draw(st.sampled_from(sorted(originals)), label="role")
    inputs = _broken_inputs(fuzz_study, kind, role, ms)
    check_outcome(fuzz_study, profile, inputs, write=False)


@pytest.mark.parametrize("kind", sorted(TARGETS))
@settings(_FIXTURE_SETTINGS, max_examples=max(5, settings().max_examples // 4))
@given(data=st.data(), ms=st.lists(mutations(), min_size=1, max_size=3))
def test_broken_file_committed_leaves_a_sound_store(
    fuzz_study: Study, kind: str, data: st.DataObject, ms: list[Mutation]
) -> None:
    # The same property through the store: what is committed passes the integrity check,
    # which traces every input row to the observations or the quarantine.
    profile, originals = TARGETS[kind]
    role = data.draw(st.sampled_from(sorted(originals)), label="role")
    inputs = _broken_inputs(fuzz_study, kind, role, ms)
    outcome = check_outcome(fuzz_study, profile, inputs, write=True, replace=True)
    store = Store(fuzz_study.store_dir)
    if outcome.result is not None:
        assert outcome.result.status in ("complete", "unchanged")
        assert store.check() == []
