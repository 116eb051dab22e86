"""Taxon names resolved per category (a catch file read in blocks) give what the same names
resolved as text give, row by row: canonical taxon, unknown mask, message, closest taxon."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
from hypothesis import given
from hypothesis import strategies as st

from harmonize.reading.taxa import resolve_taxa
from harmonize.study import load_study

STUDY = load_study(Path(__file__).resolve().parent.parent / "fixtures" / "keldmar")

# names of the fixture's taxa list, an alias written oddly, misspellings, blanks and nulls
NAMES = ["Ostravix keldensis", "  ostravix   KELDENSIS ", "Ostravix keldensiss", "Ostravx", "keld cod", "", " ",
         "Nothing like it", "Pelagon argentea", "pelagon argentea", None]


def _as_text(series: pd.Series) -> list[object]:
    return [None if pd.isna(v) else str(v) for v in series]


@given(rows=st.lists(st.sampled_from(NAMES), max_size=40), unused=st.lists(st.sampled_from(NAMES[:-1]), max_size=3))
def test_categorical_names_resolve_as_text(rows: list[str | None], unused: list[str]) -> None:
    study = STUDY
    text = pd.Series(rows, dtype="string")
    # categories no row holds (a block reader unites every block's categories) change nothing
    categories = pd.Index(pd.unique(pd.Series([*unused, *rows], dtype=object).dropna()), dtype=object)
    coded = pd.Series(pd.Categorical(rows, categories=categories))
    want = resolve_taxa(text, study)
    got = resolve_taxa(coded, study)
    assert isinstance(got[0].dtype, pd.CategoricalDtype)
    np.testing.assert_array_equal(got[1], want[1])
    for i in (0, 2, 3):
        assert _as_text(got[i]) == _as_text(want[i])
