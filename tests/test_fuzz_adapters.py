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
from fuzzing import (
    TARGETS,
    Mutation,
    check_outcome,
    mutate_all,
    mutations,
    store_state,
    write_inputs,
)
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from harmonize.store import Store
from harmonize.study import Study, load_study

pytestmark = pytest.mark.slow

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"

#: The kinds fuzzed here (each with its profile and messy fixture files in fuzzing.TARGETS).
FUZZED = ["trawl", "plankton", "transect", "opportunistic", "darwin_core", "effort"]
#: Mutations left out for a kind, with the reason (none at present: the effort reader numbers
#: rows as the other readers do since it falls back to the line reader on any odd line).
EXCLUDED: dict[str, frozenset[str]] = {}
#: Kinds whose committed ingests are fuzzed through the store's integrity check (an accepted
#: event that yields no observation row is traced through events_without_values).
COMMITTED = FUZZED


def _draw_mutations(data: st.DataObject, kind: str, max_size: int) -> list[Mutation]:
    strategy = mutations(EXCLUDED.get(kind, frozenset()))
    return data.draw(st.lists(strategy, min_size=1, max_size=max_size), label="mutations")


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


@pytest.mark.parametrize("kind", FUZZED)
@_FIXTURE_SETTINGS
@given(data=st.data())
def test_broken_file_is_refused_in_one_line_or_every_row_is_accounted_for(
    fuzz_study: Study, kind: str, data: st.DataObject
) -> None:
    profile, originals = TARGETS[kind]
    role = data.draw(st.sampled_from(sorted(originals)), label="role")
    ms = _draw_mutations(data, kind, 4)
    inputs = _broken_inputs(fuzz_study, kind, role, ms)
    check_outcome(fuzz_study, profile, inputs, write=False)


@pytest.mark.parametrize("kind", COMMITTED)
@settings(_FIXTURE_SETTINGS, max_examples=max(5, settings().max_examples // 4))
@given(data=st.data())
def test_broken_file_committed_leaves_a_sound_store(fuzz_study: Study, kind: str, data: st.DataObject) -> None:
    # The same property through the store: what is committed passes the integrity check,
    # which traces every input row to the observations or the quarantine.
    profile, originals = TARGETS[kind]
    role = data.draw(st.sampled_from(sorted(originals)), label="role")
    inputs = _broken_inputs(fuzz_study, kind, role, _draw_mutations(data, kind, 3))
    store = Store(fuzz_study.store_dir)
    before = store_state(store)
    outcome = check_outcome(fuzz_study, profile, inputs, write=True, replace=True)
    if outcome.result is not None:
        assert outcome.result.status in ("complete", "unchanged")
        assert store.check() == []
    else:  # a refused file changes nothing: no ingest recorded or superseded, no file left behind
        assert store_state(store) == before, outcome.refused
