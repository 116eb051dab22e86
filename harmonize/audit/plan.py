"""Where to sample next: grid cells where N added samples would close the audit's coverage gaps most.

The criterion (documented in docs/audit.md, "Where to sample next"):

1. **Which stratum** — proportional allocation: a stratum's share of the samples should equal
   its share of the area (Cochran 1977, *Sampling Techniques*, 3rd ed., ch. 5, stratified
   random sampling with proportional allocation). The study grid is equal-area, so a
   stratum's area share is its share of the domain's cells. Each added sample goes, one at a
   time, to the stratum with the largest deficit ``a_s * T - n_s``: its area share ``a_s``
   times the number of sampled cells there will be with this sample (``T``), minus the cells it
   holds (``n_s``: cells sampled in the reference year plus samples already proposed). Ties go
   to the larger stratum, then to the first name. Started from proportional (or no) samples,
   every stratum ends within one sample of its proportional share.
2. **Which cell in it** — the unsampled domain cell of that stratum farthest from every sampled
   cell and every sample already proposed (a greedy maximin-distance design: Johnson, Moore and
   Ylvisaker 1990, "Minimax and maximin distance designs", J. Stat. Planning and Inference
   26:131-148; in survey practice, spreading stations is common practice). Distances are
   geodesic on the WGS84 ellipsoid between cell centres (pyproj.Geod, Karney 2013). Exact ties
   (typically: nothing sampled anywhere yet) are broken by a random order drawn from ``seed``,
   so a plan is the same for the same store, arguments and seed.

Sampled cells are those the coverage audit counts (:func:`harmonize.audit.metrics.build_event_table`:
samples with effort of the source kind, not probable duplicates, whose cell lies in the
domain) in the chosen season(s), depth layer(s) and season year. Constraints: only cells of
given strata, a range of the cells' observed bottom depths (median ``bottom_depth_m`` of
every record in the cell, any source and year), a minimum distance between added samples,
and cells that must be in the plan (placed first, counted in N).

This module reads only the study and its store; it never prints.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import pyproj

from harmonize.adapters.registry import kinds as registered_kinds
from harmonize.audit.metrics import build_event_table
from harmonize.audit.run import domain_cells
from harmonize.errors import HarmonizeError
from harmonize.store import Store
from harmonize.study import Study
from harmonize.tagging import Grid, assign_strata


def unplanned_kinds() -> tuple[str, ...]:
    """Kinds no one places (fishing fleets and grids): those whose events are not samples."""
    return registered_kinds(is_sample=False)

#: Label of domain cells outside every stratum (or of all cells when the study has none).
NO_STRATUM = "(no stratum)"
#: At most this many distances are computed at once (bounded memory on large grids).
_PAIRS_PER_BLOCK = 2_000_000
_GEOD = pyproj.Geod(ellps="WGS84")

CRITERION = (
    "Each added sample goes to the stratum with the largest deficit against proportional "
    "allocation (area share x sampled cells after it, minus sampled cells; Cochran 1977, "
    "Sampling Techniques, ch. 5), to the unsampled cell there farthest from every sampled and "
    "proposed cell (greedy maximin distance; Johnson, Moore and Ylvisaker 1990)."
)


@dataclass(frozen=True)
class PlanRequest:
    """What to plan: the arguments of :func:`plan_samples`, checked."""

    source_kind: str
    n_samples: int
    seasons: tuple[str, ...]
    depth_layers: tuple[str, ...]
    season_year: int
    strata: tuple[str, ...] | None = None
    depth_range_m: tuple[float | None, float | None] | None = None
    min_distance_km: float = 0.0
    keep: tuple[str, ...] = ()
    seed: int = 0


@dataclass
class Plan:
    """A sampling plan.

    Attributes
    ----------
    stations
        One row per proposed sample, in the order they were chosen: rank, cell_id, stratum,
        lon, lat (cell centre, WGS84), bottom_depth_m (observed median; NaN where unknown),
        nearest_sample_km (to the nearest sampled or earlier proposed cell when chosen),
        reason ("kept" or "largest deficit"), deficit (the stratum's deficit when chosen).
    strata
        Per stratum: domain_cells, area_share, cells_sampled_before, proposed,
        cells_sampled_after, share_sampled_before/after (of the stratum's cells) and
        target_after (its proportional share of all sampled cells after the plan).
    notes
        Sentences on what could not be done (e.g. fewer eligible cells than asked for).
    """

    request: PlanRequest
    stations: pd.DataFrame
    strata: pd.DataFrame
    n_domain_cells: int
    notes: list[str] = field(default_factory=list)
    criterion: str = CRITERION
    #: Every domain cell (cell_id, ix, iy, stratum, sampled), for the map.
    domain: pd.DataFrame | None = None

    def coverage(self) -> tuple[float, float]:
        """Share of the planned strata's domain cells sampled before and after the plan."""
        total = max(int(self.strata["domain_cells"].sum()), 1)
        return (float(self.strata["cells_sampled_before"].sum()) / total,
                float(self.strata["cells_sampled_after"].sum()) / total)

    def to_json_dict(self) -> dict[str, object]:
        """The plan as plain JSON values."""
        r = self.request
        return {
            "source_kind": r.source_kind, "n_samples": r.n_samples, "seasons": list(r.seasons),
            "depth_layers": list(r.depth_layers), "season_year": r.season_year,
            "strata_allowed": None if r.strata is None else list(r.strata),
            "depth_range_m": None if r.depth_range_m is None else list(r.depth_range_m),
            "min_distance_km": r.min_distance_km, "keep": list(r.keep), "seed": r.seed,
            "criterion": self.criterion, "notes": self.notes,
            "stations": _records(self.stations), "strata": _records(self.strata),
        }

    def write_csv(self, path: str | Path) -> Path:
        """Write the proposed stations as CSV (text cells guarded against formula injection)."""
        from harmonize.export.safe_csv import write_safe_csv

        path = Path(path)
        path.parent.mkdir(parents=True, exist_ok=True)
        # no sample anywhere yet: the distance to the nearest one is blank, not "inf"
        write_safe_csv(self.stations.replace([np.inf, -np.inf], np.nan), path)
        return path

    def write_gpkg(self, path: str | Path, study: Study) -> Path:
        """GeoPackage: ``proposed_stations`` (cell-centre points), ``proposed_cells``
        (cell outlines) and ``coverage_by_stratum`` (attribute table), all in WGS84."""
        import geopandas as gpd
        import pyogrio
        import shapely

        path = Path(path)
        path.parent.mkdir(parents=True, exist_ok=True)
        path.unlink(missing_ok=True)
        st = self.stations.replace([np.inf, -np.inf], np.nan)
        points = gpd.GeoDataFrame(st, geometry=shapely.points(st["lon"].to_numpy(float), st["lat"].to_numpy(float)),
                                  crs="EPSG:4326")
        points.to_file(path, layer="proposed_stations", driver="GPKG", engine="pyogrio")
        ix, iy = Grid.parse(st["cell_id"])
        outlines = Grid(study.crs, study.cell_size_km).cell_polygons_lonlat(ix, iy)
        gpd.GeoDataFrame(st[["rank", "cell_id", "stratum"]], geometry=outlines, crs="EPSG:4326").to_file(
            path, layer="proposed_cells", driver="GPKG", engine="pyogrio")
        pyogrio.write_dataframe(self.strata, path, layer="coverage_by_stratum", driver="GPKG")
        return path


def _records(frame: pd.DataFrame) -> list[dict[str, object]]:
    out = []
    for row in frame.to_dict(orient="records"):
        out.append({k: (None if isinstance(v, float) and not np.isfinite(v)
                        else v.item() if isinstance(v, np.generic) else v) for k, v in row.items()})
    return out


# ----------------------------------------------------------------------------- the pure part
def geodesic_km(lon1: np.ndarray, lat1: np.ndarray, lon2: np.ndarray, lat2: np.ndarray) -> np.ndarray:
    """Geodesic distance (km) on the WGS84 ellipsoid (pyproj.Geod, Karney 2013)."""
    _, _, d = _GEOD.inv(np.asarray(lon1, float), np.asarray(lat1, float),
                        np.asarray(lon2, float), np.asarray(lat2, float))
    return np.asarray(d, float) / 1000.0


def nearest_km(lon: np.ndarray, lat: np.ndarray, to_lon: np.ndarray, to_lat: np.ndarray) -> np.ndarray:
    """For each point (lon, lat), the distance (km) to the nearest of (to_lon, to_lat); inf if none."""
    lon, lat = np.asarray(lon, float), np.asarray(lat, float)
    best = np.full(lon.shape[0], np.inf)
    if len(to_lon) == 0 or len(lon) == 0:
        return best
    step = max(1, _PAIRS_PER_BLOCK // max(len(lon), 1))
    for i in range(0, len(to_lon), step):
        tl, tt = np.asarray(to_lon[i:i + step], float), np.asarray(to_lat[i:i + step], float)
        d = geodesic_km(np.repeat(lon, len(tl)), np.repeat(lat, len(tl)), np.tile(tl, len(lon)), np.tile(tt, len(lon)))
        best = np.minimum(best, d.reshape(len(lon), len(tl)).min(axis=1))
    return best


def propose(cells: pd.DataFrame, n_samples: int, min_distance_km: float = 0.0,
            keep: Sequence[str] = (), seed: int = 0) -> tuple[pd.DataFrame, list[str]]:
    """The greedy allocation of the module docstring, on a table of cells.

    Parameters
    ----------
    cells
        One row per domain cell of the planned strata: cell_id, lon, lat, stratum (text),
        sampled (bool: sampled in the reference period), eligible (bool: may be proposed),
        bottom_depth_m.
    n_samples
        How many samples to add (kept cells included).
    min_distance_km
        Added samples are at least this far apart (cell centres, geodesic).
    keep
        Cell ids placed first, in the order given.
    seed
        Seeds the order in which exact ties are broken.

    Returns
    -------
    (stations, notes)
        The proposed stations (see :class:`Plan`) and sentences on shortfalls.
    """
    rng = np.random.default_rng(seed)
    order = rng.permutation(len(cells))
    c = cells.iloc[order].reset_index(drop=True)
    lon, lat = c["lon"].to_numpy(float), c["lat"].to_numpy(float)
    stratum = c["stratum"].astype(str).to_numpy()
    names = sorted(set(stratum))
    area = {s: float(np.mean(stratum == s)) for s in names}
    held = {s: int((c["sampled"].to_numpy(bool) & (stratum == s)).sum()) for s in names}
    sampled = c["sampled"].to_numpy(bool, copy=True)
    nearest = nearest_km(lon, lat, lon[sampled], lat[sampled])
    open_ = c["eligible"].to_numpy(bool, copy=True) & ~sampled
    rows: list[dict[str, object]] = []
    notes: list[str] = []

    def place(i: int, reason: str, deficit: float) -> None:
        nonlocal nearest
        rows.append({"rank": len(rows) + 1, "cell_id": c["cell_id"].iloc[i], "stratum": stratum[i],
                     "lon": lon[i], "lat": lat[i], "bottom_depth_m": float(c["bottom_depth_m"].iloc[i]),
                     "nearest_sample_km": float(nearest[i]), "reason": reason, "deficit": deficit})
        if not sampled[i]:
            held[stratum[i]] += 1
        sampled[i] = True
        open_[i] = False
        d = geodesic_km(lon, lat, np.full(len(lon), lon[i]), np.full(len(lat), lat[i]))
        nearest = np.minimum(nearest, d)
        if min_distance_km > 0:
            open_[d < min_distance_km] = False

    index = {cid: i for i, cid in enumerate(c["cell_id"])}
    for cid in keep:
        place(index[cid], "kept", float("nan"))
    while len(rows) < n_samples:
        total_after = sum(held.values()) + 1
        deficit = {s: area[s] * total_after - held[s] for s in names}
        ranked = sorted(names, key=lambda s: (-deficit[s], -area[s], s))
        for s in ranked:
            cand = np.flatnonzero(open_ & (stratum == s))
            if cand.size:
                # argmax takes the first maximum: the seeded order breaks exact ties
                place(int(cand[np.argmax(nearest[cand])]), "largest deficit", deficit[s])
                break
        else:
            notes.append(f"only {len(rows)} of the {n_samples} samples could be placed: no unsampled cell of "
                         "the allowed strata is left within the depth range and the minimum distance; "
                         "widen the depth range, lower the minimum distance or allow more strata")
            break
    cols = ["rank", "cell_id", "stratum", "lon", "lat", "bottom_depth_m", "nearest_sample_km", "reason", "deficit"]
    return pd.DataFrame(rows, columns=cols), notes


def stratum_table(cells: pd.DataFrame, stations: pd.DataFrame) -> pd.DataFrame:
    """Coverage per stratum before and after the plan (see :class:`Plan`)."""
    after_ids = set(cells.loc[cells["sampled"], "cell_id"]) | set(stations["cell_id"])
    c = cells.assign(after=cells["cell_id"].isin(after_ids), stratum=cells["stratum"].astype(str))
    g = c.groupby("stratum", sort=True).agg(domain_cells=("cell_id", "size"), cells_sampled_before=("sampled", "sum"),
                                            cells_sampled_after=("after", "sum"))
    g["proposed"] = stations.groupby("stratum").size().reindex(g.index, fill_value=0)
    g["area_share"] = g["domain_cells"] / g["domain_cells"].sum()
    g["share_sampled_before"] = g["cells_sampled_before"] / g["domain_cells"]
    g["share_sampled_after"] = g["cells_sampled_after"] / g["domain_cells"]
    g["target_after"] = g["area_share"] * g["cells_sampled_after"].sum()
    cols = ["domain_cells", "area_share", "cells_sampled_before", "proposed", "cells_sampled_after",
            "share_sampled_before", "share_sampled_after", "target_after"]
    return g[cols].astype({"cells_sampled_before": int, "cells_sampled_after": int, "proposed": int}).reset_index()


# ----------------------------------------------------------------------------- reading the store
def _names(given: Sequence[str] | None, valid: Sequence[str], what: str, option: str) -> tuple[str, ...]:
    if not given:
        return tuple(valid)
    unknown = [x for x in given if x not in valid]
    if unknown:
        raise HarmonizeError(f"unknown {what} {', '.join(repr(x) for x in unknown)} for {option}; "
                             f"valid: {', '.join(valid) or 'none'}")
    return tuple(dict.fromkeys(given))


def plan_samples(study: Study, source_kind: str, n_samples: int, *, seasons: Sequence[str] | None = None,
                 depth_layers: Sequence[str] | None = None, season_year: int | None = None,
                 strata: Sequence[str] | None = None, depth_range_m: tuple[float | None, float | None] | None = None,
                 min_distance_km: float = 0.0, keep: Sequence[str] = (), seed: int = 0) -> Plan:
    """Propose the cells where ``n_samples`` added samples would close the coverage gaps most.

    Parameters
    ----------
    study
        The study; its store is opened read-only.
    source_kind
        The kind of the added samples (trawl, plankton, transect, opportunistic).
    n_samples
        How many samples to add (1 or more).
    seasons, depth_layers
        Which samples of the kind count as existing (default: all seasons / all layers).
    season_year
        The reference year whose samples count (default: the latest season year with samples
        of the kind in those seasons and layers).
    strata
        Plan only in these strata (default: all, and cells outside every stratum).
    depth_range_m
        (min, max) of the cells' observed bottom depth in metres; either may be None.
    min_distance_km
        Minimum geodesic distance between added samples.
    keep
        Cell ids that must be in the plan (placed first, counted in ``n_samples``).
    seed
        Breaks exact ties; the same store, arguments and seed give the same plan.

    Raises
    ------
    HarmonizeError
        A one-line cause for every bad argument (unknown kind, season, layer, stratum or
        cell; n below 1; an empty or reversed depth range; a negative distance; no samples
        to take a reference year from).
    """
    if isinstance(n_samples, bool) or not isinstance(n_samples, int | np.integer) or n_samples < 1:
        raise HarmonizeError(f"the number of added samples must be a whole number of 1 or more, got {n_samples!r}")
    if source_kind in unplanned_kinds():
        raise HarmonizeError(f"cannot plan {source_kind} samples: nobody places fishing effort or grid values; "
                             f"plan a surveyed kind ({', '.join(registered_kinds(is_sample=True))})")
    if not min_distance_km >= 0:
        raise HarmonizeError(f"the minimum distance must be 0 km or more, got {min_distance_km!r}")
    lo, hi = depth_range_m if depth_range_m is not None else (None, None)
    if lo is not None and hi is not None and lo > hi:
        raise HarmonizeError(f"the depth range is reversed: minimum {lo:g} m is deeper than maximum {hi:g} m")
    season_names = _names(seasons, list(study.seasons), "season", "--season")
    layer_names = _names(depth_layers, [x.name for x in study.depth_layers] + ["near_bottom", "integrated"],
                         "depth layer", "--layer")
    stratum_names = [name for name, _ in study.strata]
    allowed = None if not strata else _names(strata, stratum_names, "stratum", "--stratum")

    cells = domain_cells(study)
    cells["stratum"] = pd.Series(assign_strata(study.strata, cells["lon"], cells["lat"]), dtype=object).fillna(NO_STRATUM).to_numpy()
    store = Store(study.store_dir)
    with store.connect() as con:
        kinds = [r[0] for r in con.execute("SELECT DISTINCT source_kind FROM observations ORDER BY 1").fetchall()]
        if source_kind not in kinds:
            raise HarmonizeError(f"the store holds no {source_kind!r} records; kinds in the store: "
                                 f"{', '.join(k for k in kinds if k not in unplanned_kinds()) or 'none'}")
        build_event_table(con, cells, study.min_vessels)
        con.register("_plan_seasons", pd.DataFrame({"season": list(season_names)}))
        con.register("_plan_layers", pd.DataFrame({"depth_layer": list(layer_names)}))
        scope = """FROM audit_cells WHERE source_kind = ? AND effort_bearing
                   AND season IN (SELECT season FROM _plan_seasons)
                   AND depth_layer IN (SELECT depth_layer FROM _plan_layers)"""
        years = con.execute(f"SELECT DISTINCT season_year {scope} AND season_year IS NOT NULL ORDER BY 1",
                            [source_kind]).fetchall()
        years = [int(y[0]) for y in years]
        if season_year is None:
            if not years:
                raise HarmonizeError(f"the store holds no {source_kind} samples in {', '.join(season_names)} in "
                                     f"{', '.join(layer_names)}; pass --year to plan for a year without samples")
            season_year = years[-1]
        sampled = {r[0] for r in con.execute(
            f"SELECT DISTINCT cell_id {scope} AND season_year = ? AND in_domain", [source_kind, int(season_year)]).fetchall()}
        depth = con.execute(
            """SELECT cell_id, median(bottom_depth_m) AS bottom_depth_m FROM observations
               WHERE bottom_depth_m IS NOT NULL AND cell_id IS NOT NULL GROUP BY cell_id""").df()
    request = PlanRequest(source_kind, int(n_samples), season_names, layer_names, int(season_year),
                          None if allowed is None else tuple(allowed),
                          None if depth_range_m is None else (None if lo is None else float(lo),
                                                              None if hi is None else float(hi)),
                          float(min_distance_km), tuple(dict.fromkeys(keep)), int(seed))
    cells = cells.merge(depth, on="cell_id", how="left")
    cells["bottom_depth_m"] = cells["bottom_depth_m"].astype(float)
    cells["sampled"] = cells["cell_id"].isin(sampled)
    domain = cells[["cell_id", "ix", "iy", "stratum", "sampled"]].copy()
    if allowed is not None:
        cells = cells[cells["stratum"].isin(allowed)].reset_index(drop=True)
    eligible = np.ones(len(cells), bool)
    notes: list[str] = []
    if lo is not None or hi is not None:
        d = cells["bottom_depth_m"].to_numpy(float)
        eligible &= np.isfinite(d)
        if lo is not None:
            eligible &= d >= lo
        if hi is not None:
            eligible &= d <= hi
        unknown = int((~np.isfinite(d) & ~cells["sampled"].to_numpy(bool)).sum())
        if unknown:
            notes.append(f"{unknown} unsampled cells have no observed bottom depth in the store and were not "
                         "considered under the depth range")
    cells["eligible"] = eligible
    known = set(cells["cell_id"])
    missing = [k for k in request.keep if k not in known]
    if missing:
        where = "the allowed strata" if allowed is not None else "the study's domain"
        raise HarmonizeError(f"cannot keep cell(s) {', '.join(missing)}: not cells of {where} "
                             f"(cell ids look like {cells['cell_id'].iloc[0] if len(cells) else 'x10_y20'})")
    if len(request.keep) > request.n_samples:
        raise HarmonizeError(f"{len(request.keep)} cells to keep but only {request.n_samples} samples to add; "
                             "raise the number of samples or keep fewer cells")
    if cells.empty:
        raise HarmonizeError("no domain cell lies in the allowed strata; check --stratum")
    stations, more = propose(cells, request.n_samples, request.min_distance_km, request.keep, request.seed)
    return Plan(request, stations, stratum_table(cells, stations), n_domain_cells=len(cells), notes=notes + more,
                domain=domain)


# ----------------------------------------------------------------------------- the report section
def render_plan_html(plan: Plan) -> str:
    """"Where N more samples would help most": a map of the plan and coverage per stratum (HTML fragment)."""
    from html import escape

    r = plan.request
    parts = [f'<p class="lead">{len(plan.stations)} added {escape(r.source_kind)} samples in '
             f'{escape(", ".join(r.seasons))} ({escape(", ".join(r.depth_layers))}), against the samples of '
             f'season year {r.season_year}. {escape(plan.criterion)}</p>']
    d = plan.domain
    if d is not None and len(d):
        ix0, ix1, iy0, iy1 = int(d["ix"].min()), int(d["ix"].max()), int(d["iy"].min()), int(d["iy"].max())
        width, height = ix1 - ix0 + 1, iy1 - iy0 + 1
        scale = max(2.0, min(420 / width, 420 / height))

        def path(frame: pd.DataFrame) -> str:
            return "".join(f"M{ix - ix0} {iy1 - iy}h1v1h-1z" for ix, iy in zip(frame["ix"], frame["iy"], strict=True))

        ix, iy = Grid.parse(plan.stations["cell_id"]) if len(plan.stations) else (np.array([], int), np.array([], int))
        marks = "".join(
            f'<circle cx="{x - ix0 + 0.5}" cy="{iy1 - y + 0.5}" r="0.45" fill="#D55E00"><title>{int(k)}: '
            f'{escape(str(s))} {escape(str(c))}</title></circle>'
            for x, y, k, s, c in zip(ix, iy, plan.stations["rank"], plan.stations["stratum"], plan.stations["cell_id"],
                                     strict=True))
        parts.append(
            '<div class="legend"><span><span class="swatch" style="background:#e3e7ec"></span>domain</span>'
            f'<span><span class="swatch" style="background:#4292c6"></span>sampled in {r.season_year}</span>'
            '<span><span class="swatch" style="background:#D55E00;border-radius:6px"></span>proposed</span></div>'
            f'<svg xmlns="http://www.w3.org/2000/svg" width="{width * scale:.0f}" height="{height * scale:.0f}" '
            f'viewBox="0 0 {width} {height}" role="img" aria-label="sampling plan">'
            f'<path d="{path(d)}" fill="#e3e7ec" shape-rendering="crispEdges"/>'
            f'<path d="{path(d[d["sampled"]])}" fill="#4292c6" shape-rendering="crispEdges"/>{marks}</svg>')
    rows = "".join(
        f"<tr><td>{escape(str(s.stratum))}</td><td class=\"num\">{s.domain_cells:,}</td>"
        f"<td class=\"num\">{s.area_share:.0%}</td><td class=\"num\">{s.cells_sampled_before:,}</td>"
        f"<td class=\"num\">{s.proposed:,}</td><td class=\"num\">{s.cells_sampled_after:,}</td>"
        f"<td class=\"num\">{s.share_sampled_before:.1%} → {s.share_sampled_after:.1%}</td></tr>"
        for s in plan.strata.itertuples(index=False))
    parts.append('<table><thead><tr><th>stratum</th><th class="num">domain cells</th><th class="num">area share</th>'
                 '<th class="num">sampled before</th><th class="num">added</th><th class="num">sampled after</th>'
                 f'<th class="num">share of the stratum\'s cells</th></tr></thead><tbody>{rows}</tbody></table>')
    parts += [f'<p class="note">{escape(n)}</p>' for n in plan.notes]
    return "".join(parts)
