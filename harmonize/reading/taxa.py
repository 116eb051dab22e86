"""Taxon names: provider names -> the study's canonical taxa, with the closest names for unknown ones."""

from __future__ import annotations

import difflib
from collections.abc import Iterable, Sequence

import numpy as np
import pandas as pd

from harmonize.errors import short_text
from harmonize.study import Study, normalise_name, taxon_lookup


def resolve_taxa(names: pd.Series, study: Study) -> tuple[pd.Series, np.ndarray, pd.Series, pd.Series]:
    """Canonical taxon for each name via taxa.csv names and aliases (case/space-insensitive).

    Returns (canonical names with nulls where unknown, unknown mask, a message per row
    naming the closest known names, and the closest known taxon of each unknown name).
    The closest taxon is what a misspelt name most likely meant: adapters never infer a
    zero for it in the same event.
    """
    lookup = taxon_lookup(study.taxa)
    if isinstance(names.dtype, pd.CategoricalDtype):
        return _resolve_categories(names, study, lookup)
    # a catch file repeats a few dozen names millions of times: normalise each distinct one
    codes, distinct_names = pd.factorize(names, use_na_sentinel=True)
    per_name = normalise_name(pd.Series(distinct_names, dtype=object)).map(lookup).astype("string")
    # every name null (e.g. all rows malformed): nothing to look up, and codes are all -1
    mapped = per_name.to_numpy()[codes] if len(per_name) else np.full(len(codes), pd.NA, dtype=object)
    canonical = pd.Series(mapped, index=names.index, dtype="string")
    canonical[codes < 0] = pd.NA
    unknown = (canonical.isna() & names.notna()).to_numpy()
    messages = pd.Series(pd.NA, index=names.index, dtype="string")
    best = pd.Series(pd.NA, index=names.index, dtype="string")
    if unknown.any():
        per_name, first = _unknown_names(names[unknown].unique(), study, lookup)
        messages[unknown] = names[unknown].map(per_name)
        best[unknown] = names[unknown].map(first)
    return canonical, unknown, messages, best


def _resolve_categories(names: pd.Series, study: Study,
                        lookup: dict[str, str]) -> tuple[pd.Series, np.ndarray, pd.Series, pd.Series]:
    """:func:`resolve_taxa` of a categorical column: every name is resolved once per category,
    and the canonical names, messages and closest taxa come back as categoricals over the
    same codes (a byte or two per row instead of a text value per row)."""
    categories = pd.Series(names.cat.categories, dtype=object)
    codes = names.cat.codes.to_numpy()
    canonical = normalise_name(categories).map(lookup).astype(object).where(lambda c: c.notna(), None)
    unknown_cat = canonical.isna().to_numpy() & categories.notna().to_numpy()
    # the categories that some row holds: a category no row uses gets no message
    used = np.zeros(len(categories), dtype=bool)
    used[codes[codes >= 0]] = True
    per_name, first = _unknown_names(categories[unknown_cat & used].tolist(), study, lookup)
    message = categories.map(per_name).where(lambda m: m.notna(), None)
    guess = categories.map(first).where(lambda g: g.notna(), None)

    def per_row(per_category: pd.Series) -> pd.Series:
        return pd.Series(_recode(codes, per_category.to_numpy(dtype=object)), index=names.index)

    unknown = np.append(unknown_cat, False)[np.where(codes < 0, len(unknown_cat), codes)]
    return per_row(canonical), unknown, per_row(message), per_row(guess)


def _recode(codes: np.ndarray, per_category: np.ndarray) -> pd.Categorical:
    """A categorical whose row i is ``per_category[codes[i]]`` (null where the code is -1 or
    the value is null); categories are the distinct non-null values."""
    mapped, distinct = pd.factorize(pd.Series(per_category, dtype=object), use_na_sentinel=True)
    mapped = np.append(mapped, -1)
    return pd.Categorical.from_codes(mapped[np.where(codes < 0, len(mapped) - 1, codes)],
                                     categories=pd.Index(distinct, dtype=object))


def _unknown_names(distinct: Iterable[str], study: Study,
                   lookup: dict[str, str]) -> tuple[dict[str, str], dict[str, str | None]]:
    """For each unknown name, its quarantine message and the closest known taxon (or None)."""
    distinct = list(distinct)
    close = closest_names(distinct, list(lookup) + list(study.taxa["taxon"]))
    per_name, first = {}, {}
    for name in distinct:
        options = list(dict.fromkeys(lookup.get(c.casefold(), c) for c in close.get(name, [])))
        hint = f"; closest known: {', '.join(options)}" if options else "; add it (or an alias) to the taxa list"
        per_name[name] = f"taxon '{short_text(name, 80)}' is not in the taxa list{hint}"
        first[name] = options[0] if options else None
    return per_name, first


def closest_names(unknown: Iterable[str], known: Sequence[str], n: int = 3) -> dict[str, list[str]]:
    """For each unknown name, the closest known names (for actionable messages).

    Names are compared without case, diacritics or extra spaces, whole and by their first
    word (a misspelt genus is still found: "Østravix" -> "Ostravix keldensis").
    """
    keyed: dict[str, str] = {}
    for name in known:
        key = _fold(name)
        keyed.setdefault(key, name)
        first = key.split(" ")[0]
        if first and first != key:
            keyed.setdefault(first, name)
    out = {}
    for u in unknown:
        key = _fold(u)
        hits = difflib.get_close_matches(key, list(keyed), n=n * 2, cutoff=0.6)
        hits += difflib.get_close_matches(key.split(" ")[0], list(keyed), n=n, cutoff=0.75)
        out[u] = list(dict.fromkeys(keyed[h] for h in hits))[:n]
    return out


def _fold(text: str) -> str:
    import unicodedata

    table = str.maketrans({"ø": "o", "æ": "ae", "œ": "oe", "ß": "ss", "ł": "l", "đ": "d"})
    plain = unicodedata.normalize("NFKD", str(text).casefold().translate(table))
    return " ".join("".join(c for c in plain if not unicodedata.combining(c)).split())
