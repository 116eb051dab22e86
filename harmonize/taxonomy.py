"""The taxonomic hierarchy of taxa.csv: ranks, parents, vectorised ancestor lookup, roll-up targets.

taxa.csv may give each taxon a ``rank`` (one of :data:`RANKS`), a ``parent`` (another taxon
of taxa.csv), a ``taxon_id`` (an identifier from the user's taxonomic authority, exported as
Darwin Core ``scientificNameID``) and a ``kingdom``. All four are optional: a file without
them is a flat list, as before.

Rules checked when the study is read (one-line :class:`~harmonize.errors.ConfigError` each):
a parent exists in taxa.csv, no taxon is its own ancestor (no cycles), ranks descend (a
taxon's rank is below the rank of its nearest ranked ancestor), a taxon_id names one taxon
only, and a kingdom agrees with the kingdom of the ancestors. A taxon with a sensitive
descendant is marked sensitive too, so that a roll-up never moves a sensitive taxon's
records out of the sensitive-taxon rules.

This module is the one place that knows the hierarchy. Everything that rolls taxa up
(exports, the audit's ``resolution_change`` finding and model-readiness table) asks it for
a ``taxon -> target`` map and applies that map in SQL.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from functools import cached_property
from pathlib import Path

import numpy as np
import pandas as pd

from harmonize.errors import ConfigError

#: Linnaean ranks from the coarsest to the finest (the order ranks must descend in; common practice).
RANKS = ("kingdom", "phylum", "class", "order", "family", "genus", "species", "subspecies")
#: Optional hierarchy columns of taxa.csv.
HIERARCHY_COLUMNS = ("rank", "parent", "taxon_id", "kingdom")
_KEY = "taxa.list"


def _row(i: int) -> int:
    """Data row number (1-based, header not counted) of frame position ``i``."""
    return int(i) + 1


def validate_hierarchy(df: pd.DataFrame, path: str | Path) -> pd.DataFrame:
    """Check and normalise the hierarchy columns of a taxa table read from ``path``.

    Parameters
    ----------
    df
        The taxa table (text columns, stripped), with a unique ``taxon`` column; missing
        hierarchy columns are added empty.
    path
        The file, named in error messages.

    Returns
    -------
    pandas.DataFrame
        ``df`` with ``rank`` in lower case (empty where not given), ``parent``, ``taxon_id``
        and ``kingdom`` (a blank kingdom inherited from the nearest ancestor that has one).

    Raises
    ------
    ConfigError
        Naming the data row, the taxon and what to change.
    """
    df = df.copy()
    for col in HIERARCHY_COLUMNS:
        if col not in df.columns:
            df[col] = ""
        df[col] = df[col].fillna("").astype(str).str.strip()
    df["rank"] = df["rank"].str.casefold()
    if df.empty:
        return df
    bad = ~df["rank"].isin(("", *RANKS))
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise ConfigError(path, _KEY, f"data row {_row(i)} (taxon '{df['taxon'].iloc[i]}') has rank "
                                      f"'{df['rank'].iloc[i]}'; expected one of {', '.join(RANKS)} or blank")
    names = df["taxon"].to_numpy(dtype=object)
    index = pd.Index(names)
    has_parent = (df["parent"] != "").to_numpy()
    parent_pos = index.get_indexer(df["parent"].to_numpy(dtype=object))
    unknown = has_parent & (parent_pos < 0)
    if unknown.any():
        i = int(np.flatnonzero(unknown)[0])
        raise ConfigError(path, _KEY, f"data row {_row(i)} (taxon '{names[i]}') has parent '{df['parent'].iloc[i]}', "
                                      "which is not a taxon of this file; add it as a row or correct the name")
    parent_pos = np.where(has_parent, parent_pos, -1)
    _check_cycles(parent_pos, names, path)
    rank_pos = _rank_positions(df["rank"])
    _check_ranks(parent_pos, rank_pos, names, path)
    ids = df["taxon_id"]
    dup = ids[(ids != "") & ids.duplicated()]
    if len(dup):
        owners = sorted(df.loc[ids == dup.iloc[0], "taxon"])
        raise ConfigError(path, _KEY, f"taxon_id '{dup.iloc[0]}' is given to more than one taxon: {owners}; "
                                      "an identifier names one taxon")
    df["kingdom"] = _inherit_kingdom(parent_pos, df["kingdom"].to_numpy(dtype=object), names, path)
    if "sensitive" in df and df["sensitive"].dtype == bool:
        df["sensitive"] = _sensitive_upwards(parent_pos, df["sensitive"].to_numpy())
    return df


def _sensitive_upwards(parent: np.ndarray, sensitive: np.ndarray) -> np.ndarray:
    """A taxon with a sensitive descendant is sensitive too: its records (its own, or rolled
    up from that descendant) may locate the sensitive taxon."""
    out = sensitive.astype(bool).copy()
    cur = np.where(out, parent, -1)
    while (cur >= 0).any():
        out[cur[cur >= 0]] = True
        cur = np.where(cur >= 0, parent[np.maximum(cur, 0)], -1)
    return out


def _rank_positions(ranks: pd.Series) -> np.ndarray:
    """Position of each rank in :data:`RANKS` (0 = kingdom), -1 where blank."""
    order = {r: i for i, r in enumerate(RANKS)}
    return ranks.map(order).fillna(-1).astype(int).to_numpy()


def _check_cycles(parent: np.ndarray, names: np.ndarray, path: str | Path) -> None:
    """Raise when following parents from some taxon never reaches a taxon without one."""
    n = len(parent)
    cur = parent.copy()
    for _ in range(n):  # after n steps every chain without a cycle has ended (-1)
        alive = cur >= 0
        if not alive.any():
            return
        cur = np.where(alive, parent[np.maximum(cur, 0)], -1)
    start = int(np.flatnonzero(cur >= 0)[0])
    node = int(cur[start])
    cycle = [node]
    nxt = int(parent[node])
    while nxt != node:  # the loop runs once around one cycle only
        cycle.append(nxt)
        nxt = int(parent[nxt])
    text = " -> ".join(f"'{names[i]}'" for i in [*cycle, node])
    raise ConfigError(path, _KEY, f"parents form a cycle ({text}); a taxon cannot be its own ancestor, "
                                  "correct one of these parent cells")


def _check_ranks(parent: np.ndarray, rank: np.ndarray, names: np.ndarray, path: str | Path) -> None:
    """Raise when a ranked taxon's nearest ranked ancestor is not of a coarser rank."""
    n = len(parent)
    anc = parent.copy()
    nearest = np.full(n, -1)
    for _ in range(n):
        pending = (nearest < 0) & (anc >= 0)
        if not pending.any():
            break
        found = pending & (rank[np.maximum(anc, 0)] >= 0)
        nearest[found] = anc[found]
        anc = np.where(pending & ~found, parent[np.maximum(anc, 0)], np.where(found, -1, anc))
    check = (rank >= 0) & (nearest >= 0)
    bad = check & (rank[np.maximum(nearest, 0)] >= rank)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        a = int(nearest[i])
        raise ConfigError(path, _KEY, f"data row {_row(i)}: taxon '{names[i]}' is a {RANKS[rank[i]]} but its "
                                      f"ancestor '{names[a]}' is a {RANKS[rank[a]]}; ranks must descend from parent "
                                      f"to child ({' > '.join(RANKS)})")


def _inherit_kingdom(parent: np.ndarray, kingdom: np.ndarray, names: np.ndarray, path: str | Path) -> np.ndarray:
    """Blank kingdoms filled from the nearest ancestor; a differing kingdom raises."""
    n = len(parent)
    out = kingdom.copy()
    anc = parent.copy()
    for _ in range(n):
        live = anc >= 0
        if not live.any():
            break
        akd = np.where(live, kingdom[np.maximum(anc, 0)], "")
        clash = live & (akd != "") & (kingdom != "") & (akd != kingdom)
        if clash.any():
            i = int(np.flatnonzero(clash)[0])
            raise ConfigError(path, _KEY, f"data row {_row(i)}: taxon '{names[i]}' is in kingdom '{kingdom[i]}' "
                                          f"but its ancestor '{names[anc[i]]}' is in kingdom '{akd[i]}'; "
                                          "give one kingdom, or leave the child's blank to inherit it")
        fill = live & (out == "") & (akd != "")
        out[fill] = akd[fill]
        anc = np.where(live, parent[np.maximum(anc, 0)], -1)
    return out


@dataclass(frozen=True, eq=False)
class Hierarchy:
    """The parent/rank structure of a validated taxa table, with vectorised lookups.

    Build it with :meth:`from_taxa` from ``study.taxa``.
    """

    names: np.ndarray        # taxon names (object array)
    parent: np.ndarray       # position of each taxon's parent, -1 for none
    rank: np.ndarray         # position in RANKS, -1 for no rank

    @classmethod
    def from_taxa(cls, taxa: pd.DataFrame) -> Hierarchy:
        """The hierarchy of a taxa table (``study.taxa``); a table without the columns is flat."""
        names = taxa["taxon"].astype(str).to_numpy(dtype=object)
        parents = taxa["parent"].astype(str).to_numpy(dtype=object) if "parent" in taxa else np.full(len(names), "")
        pos = pd.Index(names).get_indexer(parents)
        ranks = taxa["rank"].astype(str) if "rank" in taxa else pd.Series([""] * len(names))
        return cls(names, np.where(parents != "", pos, -1), _rank_positions(ranks.reset_index(drop=True)))

    @cached_property
    def index(self) -> pd.Index:
        return pd.Index(self.names)

    @cached_property
    def depth(self) -> int:
        """Longest chain of parents (0 for a flat list)."""
        cur, d = self.parent.copy(), 0
        while (cur >= 0).any():
            cur = np.where(cur >= 0, self.parent[np.maximum(cur, 0)], -1)
            d += 1
        return d

    def ancestors(self) -> np.ndarray:
        """Matrix (taxa x depth+1): column k holds the position of each taxon's k-th ancestor (-1 none)."""
        cols = [np.arange(len(self.names))]
        for _ in range(self.depth):
            prev = cols[-1]
            cols.append(np.where(prev >= 0, self.parent[np.maximum(prev, 0)], -1))
        return np.column_stack(cols) if len(self.names) else np.empty((0, self.depth + 1), int)

    def rank_of(self, taxa: Iterable[str]) -> list[str]:
        """Rank names of ``taxa`` ("" where unranked or unknown)."""
        pos = self.index.get_indexer(list(taxa))
        return [RANKS[self.rank[p]] if p >= 0 and self.rank[p] >= 0 else "" for p in pos]

    def at_rank(self, rank: str) -> dict[str, str]:
        """taxon -> its ancestor-or-self of ``rank``, for every taxon that has one.

        Taxa without an ancestor of that rank (coarser taxa, unranked lineages) are left
        out: they stay as they are.
        """
        rank = rank.strip().casefold()
        if rank not in RANKS:
            raise ValueError(f"unknown rank {rank!r}; choose from {', '.join(RANKS)}")
        want = RANKS.index(rank)
        anc = self.ancestors()
        if not len(anc):
            return {}
        ranks = np.where(anc >= 0, self.rank[np.maximum(anc, 0)], -2)
        hit = ranks == want
        has = hit.any(axis=1)
        first = hit.argmax(axis=1)
        target = anc[np.arange(len(anc)), first]
        return dict(zip(self.names[has], self.names[target[has]], strict=True))

    def descendants(self) -> dict[str, list[str]]:
        """taxon -> every strict descendant (for taxa that have any)."""
        anc = self.ancestors()
        out: dict[str, list[str]] = {}
        for k in range(1, anc.shape[1]):
            live = anc[:, k] >= 0
            for child, a in zip(self.names[live], self.names[anc[live, k]], strict=True):
                out.setdefault(a, []).append(child)
        return out

    def leaf_paths(self, targets: Mapping[str, str]) -> pd.DataFrame:
        """For each roll-up target: its leaves and the nodes on each leaf's path up to the target.

        A target X is fully recorded at an event when every leaf below X (X itself when it
        has no children) has a record at the event of some node on its path up to X.
        Columns: ``target``, ``leaf``, ``node``.
        """
        anc = self.ancestors()
        has_child = np.zeros(len(self.names), bool)
        has_child[self.parent[self.parent >= 0]] = True
        tset = set(targets.values())
        rows: list[tuple[str, str, str]] = []
        for li in np.flatnonzero(~has_child):  # a loop over taxa of the list, not over data rows
            chain = [int(a) for a in anc[li] if a >= 0]
            for k, t in enumerate(chain):
                if self.names[t] in tset:
                    rows += [(self.names[t], self.names[li], self.names[n]) for n in chain[:k + 1]]
        return pd.DataFrame(rows, columns=["target", "leaf", "node"])


def resolution_changes(recorded: pd.DataFrame, hierarchy: Hierarchy) -> pd.DataFrame:
    """Taxa recorded at their own level in some years or sources and through descendants in others.

    Parameters
    ----------
    recorded
        One row per (variable, season_year, source_id) that holds records of the taxon
        (zeros included), with ``source_kind``.
    hierarchy
        The study's hierarchy.

    Returns
    -------
    pandas.DataFrame
        One row per taxon X whose own records and its descendants' records fall in
        different (season year, source) groups: ``taxon``, ``rank``, ``own_years``,
        ``own_sources``, ``finer`` (the descendants recorded), ``finer_years``,
        ``finer_sources``, ``only_own`` and ``only_finer`` (groups as "source year"), and
        ``source_kinds``. Nested changes report the coarsest taxon only; rolling everything
        below it into it gives a series recorded the same way in every group.
    """
    cols = ["taxon", "rank", "own_years", "own_sources", "finer", "finer_years", "finer_sources",
            "only_own", "only_finer", "source_kinds"]
    if recorded.empty:
        return pd.DataFrame(columns=cols)
    rec = recorded.dropna(subset=["variable"]).copy()
    rec["group"] = rec["source_id"].astype(str) + " " + rec["season_year"].astype("Int64").astype(str)
    desc = hierarchy.descendants()
    by_taxon = {v: g for v, g in rec.groupby("variable", sort=True)}
    found: dict[str, dict[str, object]] = {}
    for taxon, below in desc.items():
        own = by_taxon.get(taxon)
        finer = [by_taxon[d] for d in below if d in by_taxon]
        if own is None or not finer:
            continue
        fin = pd.concat(finer)
        own_groups, fin_groups = set(own["group"]), set(fin["group"])
        if own_groups == fin_groups:
            continue
        found[taxon] = {
            "taxon": taxon, "rank": hierarchy.rank_of([taxon])[0],
            "own_years": sorted(int(y) for y in own["season_year"].dropna().unique()),
            "own_sources": sorted(own["source_id"].astype(str).unique()),
            "finer": sorted(fin["variable"].astype(str).unique()),
            "finer_years": sorted(int(y) for y in fin["season_year"].dropna().unique()),
            "finer_sources": sorted(fin["source_id"].astype(str).unique()),
            "only_own": sorted(own_groups - fin_groups), "only_finer": sorted(fin_groups - own_groups),
            "source_kinds": sorted(pd.concat([own, fin])["source_kind"].astype(str).unique()),
        }
    # keep the coarsest: drop a taxon whose ancestor is reported too
    anc = hierarchy.ancestors()
    pos = hierarchy.index
    keep = []
    for taxon in found:
        chain = anc[pos.get_loc(taxon), 1:]
        if not any(hierarchy.names[a] in found for a in chain if a >= 0):
            keep.append(found[taxon])
    return pd.DataFrame(keep, columns=cols)


def consistent_targets(recorded: pd.DataFrame, hierarchy: Hierarchy) -> dict[str, str]:
    """taxon -> the taxon to roll it into so that it is recorded the same way in every group.

    Every taxon at or below a taxon reported by :func:`resolution_changes` rolls into that
    taxon; other taxa are left out (they stay as they are).
    """
    changes = resolution_changes(recorded, hierarchy)
    if changes.empty:
        return {}
    desc = hierarchy.descendants()
    out: dict[str, str] = {}
    for taxon in changes["taxon"]:
        out[taxon] = taxon
        for d in desc.get(taxon, []):
            out[d] = taxon
    return out


def coarsest_targets(hierarchy: Hierarchy, *maps: Mapping[str, str]) -> dict[str, str]:
    """taxon -> the coarsest of the targets the ``maps`` give it (each an ancestor-or-self of it)."""
    anc = hierarchy.ancestors()
    out: dict[str, str] = {}
    for taxon in set().union(*maps):  # a loop over taxa of the list
        chain = [hierarchy.names[a] for a in anc[hierarchy.index.get_loc(taxon)] if a >= 0]
        steps = [chain.index(m[taxon]) for m in maps if taxon in m and m[taxon] in chain]
        if steps:
            out[taxon] = chain[max(steps)]
    return out
