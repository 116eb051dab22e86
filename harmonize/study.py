"""study.toml -> a validated, immutable Study."""

from __future__ import annotations

import hashlib
import json
import math
import zoneinfo
from collections.abc import Mapping
from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyproj
import shapely
from shapely.geometry import shape

from harmonize.config_spec import STUDY, check_known, read_toml
from harmonize.errors import ConfigError
from harmonize.taxonomy import HIERARCHY_COLUMNS, validate_hierarchy

STUDY_FILE = "study.toml"
RESERVED_LAYERS = ("near_bottom", "integrated")
METEOROLOGICAL_SEASONS: dict[str, tuple[int, ...]] = {
    # WMO practice: DJF, MAM, JJA, SON.
    "winter": (12, 1, 2),
    "spring": (3, 4, 5),
    "summer": (6, 7, 8),
    "autumn": (9, 10, 11),
}


@dataclass(frozen=True)
class DepthLayer:
    """A named depth layer [top_m, bottom_m) in metres below the surface."""

    name: str
    top_m: float
    bottom_m: float


@dataclass(frozen=True)
class AuditSettings:
    """Thresholds of the coverage audit."""

    min_events: int = 5
    coverage_drop: float = 0.5
    min_encounters: int = 10


@dataclass(frozen=True, eq=False)
class Study:
    """A validated study: space, time, depth, taxa and where the store lives."""

    root: Path
    name: str
    crs: str
    cell_size_km: float
    domain: shapely.Geometry
    strata: tuple[tuple[str, shapely.Geometry], ...]
    seasons: Mapping[str, tuple[int, ...]]
    depth_layers: tuple[DepthLayer, ...]
    near_bottom_m: float
    taxa: pd.DataFrame
    targets: pd.DataFrame
    audit: AuditSettings = field(default_factory=AuditSettings)
    min_vessels: int = 3
    generalise_deg: float = 0.1
    raw: Mapping[str, Any] = field(default_factory=dict)
    input_digests: Mapping[str, str] = field(default_factory=dict)
    #: IANA time zone of the study calendar (``[study] timezone``): seasons, season years,
    #: calendar years and targets.csv year windows are those of the local date there.
    timezone: str = "UTC"

    @property
    def file(self) -> Path:
        return self.root / STUDY_FILE

    @property
    def store_dir(self) -> Path:
        return self.root / "store"

    @property
    def profiles_dir(self) -> Path:
        return self.root / "profiles"

    @cached_property
    def month_to_season(self) -> np.ndarray:
        """Array indexed by month (1..12) giving the season name (index 0 unused)."""
        table = np.empty(13, dtype=object)
        for name, months in self.seasons.items():
            for m in months:
                table[m] = name
        return table

    @cached_property
    def fingerprint(self) -> str:
        """sha256 of everything in the study that changes what an ingest writes."""
        payload = {
            "study": self.raw.get("study", {}),
            "seasons": {k: list(v) for k, v in self.seasons.items()},
            "depth_layers": [(d.name, d.top_m, d.bottom_m) for d in self.depth_layers],
            "near_bottom_m": self.near_bottom_m,
            "inputs": dict(self.input_digests),
        }
        return hashlib.sha256(json.dumps(payload, sort_keys=True).encode()).hexdigest()


def load_study(root: str | Path = ".") -> Study:
    """Read and validate ``study.toml`` in ``root``.

    Parameters
    ----------
    root
        The study folder (holding study.toml).

    Raises
    ------
    ConfigError
        Naming the file, the key and what is expected.
    """
    root = Path(root).resolve()
    path = root / STUDY_FILE
    if not path.is_file():
        raise ConfigError(
            path, None, "no study.toml here; run 'harmonize init DIR' or pass --study DIR"
        )
    raw = read_toml(path)

    # every section and key must be known: a misspelt [season] would silently keep the defaults
    check_known(path, raw, STUDY)
    reader = _Reader(path, raw)
    sec = reader.table("study")
    name = reader.string(sec, "study.name")
    crs = reader.string(sec, "study.crs")
    _check_crs(path, crs)
    cell_size_km = reader.number(sec, "study.cell_size_km", positive=True)
    digests: dict[str, str] = {}
    domain_rel = reader.string(sec, "study.domain")
    domain_path = reader.existing_file(root, domain_rel, "study.domain")
    digests["domain"] = _sha256(domain_path)
    domain = shapely.union_all([g for _, g in _read_features(domain_path, "study.domain", None)])
    _check_grid(path, crs, cell_size_km, domain)
    shapely.prepare(domain)
    strata: tuple[tuple[str, shapely.Geometry], ...] = ()
    if "strata" in sec:
        strata_path = reader.existing_file(root, reader.string(sec, "study.strata"), "study.strata")
        digests["strata"] = _sha256(strata_path)
        strata = tuple(_read_features(strata_path, "study.strata", "stratum"))
        for _, geom in strata:
            shapely.prepare(geom)

    timezone = reader.string(sec, "study.timezone") if "timezone" in sec else "UTC"
    try:
        zoneinfo.ZoneInfo(timezone)
    except (zoneinfo.ZoneInfoNotFoundError, ValueError):
        raise ConfigError(path, "study.timezone",
                          f"'{timezone}' is not an IANA time zone (e.g. 'UTC', 'Pacific/Auckland')") from None
    seasons = _read_seasons(reader, raw.get("seasons"))
    layers = _read_layers(reader, raw.get("depth_layers"))
    depth = reader.table("depth", required=False)
    near_bottom_m = reader.number(depth, "depth.near_bottom_m", default=10.0, positive=True)

    taxa_sec = reader.table("taxa")
    taxa_path = reader.existing_file(root, reader.string(taxa_sec, "taxa.list"), "taxa.list")
    digests["taxa"] = _sha256(taxa_path)
    taxa = _read_taxa(taxa_path)
    targets = pd.DataFrame(columns=["protocol", "taxon", "first_year", "last_year", "life_stage"])
    if "targets" in taxa_sec:
        targets_path = reader.existing_file(
            root, reader.string(taxa_sec, "taxa.targets"), "taxa.targets"
        )
        digests["targets"] = _sha256(targets_path)
        targets = _read_targets(targets_path, set(taxa["taxon"]))

    aud = reader.table("audit", required=False)
    audit = AuditSettings(
        min_events=int(reader.number(aud, "audit.min_events", default=5, positive=True)),
        coverage_drop=reader.number(aud, "audit.coverage_drop", default=0.5, positive=True),
        min_encounters=int(reader.number(aud, "audit.min_encounters", default=10, positive=True)),
    )
    conf = reader.table("confidentiality", required=False)
    min_vessels = int(reader.number(conf, "confidentiality.min_vessels", default=3, positive=True))
    generalise_deg = reader.number(conf, "confidentiality.generalise_deg", default=0.1, positive=True)
    if generalise_deg > 1:
        raise ConfigError(path, "confidentiality.generalise_deg",
                          f"expected a rounding of at most 1 degree (Chapman 2020 uses 1, 0.1, 0.01 or 0.001), "
                          f"got {generalise_deg!r}")

    return Study(
        root=root,
        name=name,
        crs=crs,
        cell_size_km=cell_size_km,
        domain=domain,
        strata=strata,
        seasons=seasons,
        depth_layers=layers,
        near_bottom_m=near_bottom_m,
        taxa=taxa,
        targets=targets,
        audit=audit,
        min_vessels=min_vessels,
        generalise_deg=generalise_deg,
        raw=raw,
        input_digests=digests,
        timezone=timezone,
    )


class _Reader:
    """Typed access to a TOML mapping that raises ConfigError naming the key."""

    def __init__(self, path: Path, raw: Mapping[str, Any]) -> None:
        self.path = path
        self.raw = raw

    def table(self, key: str, required: bool = True) -> Mapping[str, Any]:
        value = self.raw.get(key)
        if value is None:
            if required:
                raise ConfigError(self.path, f"[{key}]", "section is missing")
            return {}
        if not isinstance(value, Mapping):
            raise ConfigError(self.path, f"[{key}]", "expected a table ([...] section)")
        return value

    def _get(self, sec: Mapping[str, Any], key: str) -> Any:
        return sec.get(key.rsplit(".", 1)[-1])

    def string(self, sec: Mapping[str, Any], key: str) -> str:
        value = self._get(sec, key)
        if value is None:
            raise ConfigError(self.path, key, "is missing; expected a text value")
        if not isinstance(value, str) or not value.strip():
            raise ConfigError(self.path, key, f"expected non-empty text, got {value!r}")
        return value.strip()

    def number(
        self,
        sec: Mapping[str, Any],
        key: str,
        default: float | None = None,
        positive: bool = False,
    ) -> float:
        value = self._get(sec, key)
        if value is None:
            if default is None:
                raise ConfigError(self.path, key, "is missing; expected a number")
            return float(default)
        if isinstance(value, bool) or not isinstance(value, int | float):
            raise ConfigError(self.path, key, f"expected a number, got {value!r}")
        if not math.isfinite(value):  # TOML has inf and nan literals
            raise ConfigError(self.path, key, f"expected a finite number, got {value!r}")
        if positive and not value > 0:
            raise ConfigError(self.path, key, f"expected a number above 0, got {value!r}")
        return float(value)

    def existing_file(self, root: Path, rel: str, key: str) -> Path:
        path = resolve_inside(root, rel, self.path, key)
        if not path.is_file():
            raise ConfigError(self.path, key, f"file '{rel}' does not exist in {root}")
        return path


def resolve_inside(root: Path, rel: str, config_file: Path, key: str) -> Path:
    """Resolve ``rel`` against ``root`` and refuse a path that escapes the study folder."""
    path = (root / rel).resolve()
    if not path.is_relative_to(root.resolve()):
        raise ConfigError(
            config_file, key, f"path '{rel}' leads outside the study folder {root}; keep inputs inside it"
        )
    return path


def _check_crs(path: Path, crs: str) -> None:
    try:
        parsed = pyproj.CRS.from_user_input(crs)
    except pyproj.exceptions.CRSError:
        raise ConfigError(
            path, "study.crs", f"'{crs}' is not a CRS that pyproj knows; expected e.g. 'EPSG:6933'"
        ) from None
    if not parsed.is_projected:
        raise ConfigError(
            path,
            "study.crs",
            f"'{crs}' is geographic; grid cells need a projected equal-area CRS such as 'EPSG:6933'",
        )
    units = {ax.unit_name for ax in parsed.axis_info}
    if units - {"metre"}:
        raise ConfigError(path, "study.crs", f"'{crs}' has axis units {sorted(units)}; expected metres")


#: Grid cells over the domain's extent at most: 50 m cells over a sea made the audit ask for TiB.
MAX_GRID_CELLS = 10_000_000
#: Largest spread of the area scale factor over the domain accepted as "equal-area" (1 %).
MAX_AREA_DISTORTION = 0.01


def _check_grid(path: Path, crs: str, cell_size_km: float, domain: shapely.Geometry) -> None:
    """Refuse a grid whose cells are not equal in area over the domain, or absurdly many or few."""
    lon, lat = shapely.get_coordinates(domain).T
    if len(lon) > 2_000:  # a sample of the outline is enough for the scale factor
        keep = np.linspace(0, len(lon) - 1, 2_000).astype(int)
        lon, lat = lon[keep], lat[keep]
    centre = domain.representative_point()
    lon, lat = np.append(lon, centre.x), np.append(lat, centre.y)
    scale = np.asarray(pyproj.Proj(crs).get_factors(lon, lat).areal_scale, dtype=float)
    scale = scale[np.isfinite(scale)]
    if len(scale) and (scale.max() / scale.min() - 1 > MAX_AREA_DISTORTION or abs(scale.mean() - 1) > MAX_AREA_DISTORTION):
        raise ConfigError(
            path, "study.crs",
            f"'{crs}' is not equal-area over the domain: the true area of one grid cell varies by a factor "
            f"{scale.min():.3g} to {scale.max():.3g} of its nominal area; choose an equal-area CRS such as "
            "'EPSG:6933'",
        )
    x, y = pyproj.Transformer.from_crs("EPSG:4326", crs, always_xy=True).transform(
        shapely.get_coordinates(domain)[:, 0], shapely.get_coordinates(domain)[:, 1])
    width_km = (np.nanmax(x) - np.nanmin(x)) / 1000
    height_km = (np.nanmax(y) - np.nanmin(y)) / 1000
    extent_km = max(width_km, height_km)
    if cell_size_km > extent_km:
        raise ConfigError(path, "study.cell_size_km",
                          f"{cell_size_km:g} km is larger than the domain ({width_km:,.0f} x {height_km:,.0f} km): "
                          "every record would fall in one cell; choose a smaller cell size")
    n_cells = (width_km / cell_size_km + 1) * (height_km / cell_size_km + 1)
    if n_cells > MAX_GRID_CELLS:
        smallest = math.sqrt(width_km * height_km / MAX_GRID_CELLS)
        raise ConfigError(path, "study.cell_size_km",
                          f"{cell_size_km:g} km makes about {n_cells:,.0f} cells over the domain "
                          f"({width_km:,.0f} x {height_km:,.0f} km); at most {MAX_GRID_CELLS:,}: "
                          f"choose {smallest:.2g} km or more")


def _read_features(
    path: Path, key: str, name_property: str | None
) -> list[tuple[str, shapely.Geometry]]:
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise ConfigError(path, key, f"is not valid GeoJSON ({exc})") from None
    features = doc.get("features") if doc.get("type") == "FeatureCollection" else [doc]
    out: list[tuple[str, shapely.Geometry]] = []
    for i, feat in enumerate(features or []):
        geom_doc = feat.get("geometry") if feat.get("type") == "Feature" else feat
        try:
            geom = shape(geom_doc)
        except Exception as exc:  # noqa: BLE001 - shapely raises several kinds
            raise ConfigError(path, key, f"feature {i + 1} has no valid geometry ({exc})") from None
        if geom.geom_type not in ("Polygon", "MultiPolygon"):
            raise ConfigError(path, key, f"feature {i + 1} is a {geom.geom_type}; expected polygons")
        if not np.isfinite(shapely.get_coordinates(geom)).all():
            raise ConfigError(path, key, f"feature {i + 1} has a coordinate that is not a finite number "
                                         "(NaN or infinity); fix the file")
        if not geom.is_valid:
            raise ConfigError(
                path, key,
                f"feature {i + 1} is not a valid polygon ({shapely.is_valid_reason(geom)}); repair it, e.g. "
                "with shapely.make_valid() or QGIS 'Fix geometries', check the result and save the file again",
            )
        label = ""
        if name_property:
            label = (feat.get("properties") or {}).get(name_property)
            if not label:
                raise ConfigError(
                    path, key, f"feature {i + 1} has no property '{name_property}' naming it"
                )
        out.append((str(label), geom))
    if not out:
        raise ConfigError(path, key, "holds no polygon features")
    return out


def _read_seasons(reader: _Reader, raw: Any) -> dict[str, tuple[int, ...]]:
    if raw is None:
        return dict(METEOROLOGICAL_SEASONS)
    if not isinstance(raw, Mapping) or not raw:
        raise ConfigError(reader.path, "[seasons]", "expected a table of season = [months]")
    seen: dict[int, str] = {}
    seasons: dict[str, tuple[int, ...]] = {}
    for name, months in raw.items():
        key = f"seasons.{name}"
        if not isinstance(months, list) or not months:
            raise ConfigError(reader.path, key, f"expected a list of months 1..12, got {months!r}")
        for m in months:
            if isinstance(m, bool) or not isinstance(m, int) or not 1 <= m <= 12:
                raise ConfigError(reader.path, key, f"month {m!r} is not an integer 1..12")
            if m in seen:
                raise ConfigError(
                    reader.path, key, f"month {m} is already in season '{seen[m]}'; each month once"
                )
            seen[m] = name
        seasons[name] = tuple(months)
    missing = sorted(set(range(1, 13)) - set(seen))
    if missing:
        raise ConfigError(
            reader.path, "[seasons]", f"months {missing} belong to no season; list every month 1..12 once"
        )
    return seasons


def _read_layers(reader: _Reader, raw: Any) -> tuple[DepthLayer, ...]:
    if not isinstance(raw, list) or not raw:
        raise ConfigError(
            reader.path,
            "[[depth_layers]]",
            "expected one or more [[depth_layers]] with name, top_m, bottom_m, contiguous from 0",
        )
    layers: list[DepthLayer] = []
    expected_top = 0.0
    for i, item in enumerate(raw, start=1):
        key = f"depth_layers[{i}]"
        if not isinstance(item, Mapping):
            raise ConfigError(reader.path, key, "expected a table with name, top_m, bottom_m")
        name = reader.string(item, f"{key}.name")
        if name in RESERVED_LAYERS or name in {d.name for d in layers}:
            raise ConfigError(reader.path, f"{key}.name", f"'{name}' is reserved or used twice")
        top = reader.number(item, f"{key}.top_m")
        bottom = reader.number(item, f"{key}.bottom_m")
        if top != expected_top:
            raise ConfigError(
                reader.path, f"{key}.top_m", f"expected {expected_top:g} (layers are contiguous from 0), got {top:g}"
            )
        if not bottom > top:
            raise ConfigError(reader.path, f"{key}.bottom_m", f"must be deeper than top_m ({top:g}), got {bottom:g}")
        layers.append(DepthLayer(name, top, bottom))
        expected_top = bottom
    return tuple(layers)


def normalise_name(values: pd.Series) -> pd.Series:
    """Case- and whitespace-insensitive key for a taxon name."""
    return values.astype("string").str.strip().str.replace(r"\s+", " ", regex=True).str.casefold()


def _read_csv_strings(path: Path, key: str, required: list[str]) -> pd.DataFrame:
    try:
        df = pd.read_csv(path, dtype=str, keep_default_na=False, encoding="utf-8-sig")
    except UnicodeDecodeError:
        raise ConfigError(path, key, "is not UTF-8 text; re-save it as UTF-8") from None
    except pd.errors.EmptyDataError:
        df = pd.DataFrame(columns=required)
    df.columns = [c.strip() for c in df.columns]
    missing = [c for c in required if c not in df.columns]
    if missing:
        raise ConfigError(path, key, f"missing column(s) {missing}; expected columns {required}")
    return df.apply(lambda s: s.str.strip())


def _read_taxa(path: Path) -> pd.DataFrame:
    df = _read_csv_strings(path, "taxa.list", ["taxon"])
    for col in ("group", "aliases", "sensitive"):
        if col not in df.columns:
            df[col] = ""
    if (df["taxon"] == "").any():
        row = int(np.flatnonzero(df["taxon"] == "")[0]) + 1
        raise ConfigError(path, "taxa.list", f"data row {row} has an empty taxon name")
    dup = df["taxon"][df["taxon"].duplicated()]
    if len(dup):
        raise ConfigError(path, "taxa.list", f"taxon '{dup.iloc[0]}' is listed twice")
    sensitive = df["sensitive"].str.casefold()
    bad = ~sensitive.isin(["", "true", "false", "yes", "no", "1", "0"])
    if bad.any():
        raise ConfigError(
            path, "taxa.list", f"sensitive must be true or false, got '{df['sensitive'][bad].iloc[0]}'"
        )
    df["sensitive"] = sensitive.isin(["true", "yes", "1"])
    df = validate_hierarchy(df, path)
    # Every name and alias must point to one taxon only.
    keys = _taxon_keys(df)
    clash = keys[keys["key"].duplicated(keep=False)].drop_duplicates(["key", "taxon"])
    clash = clash[clash["key"].duplicated(keep=False)]
    if len(clash):
        k = clash.iloc[0]["key"]
        owners = sorted(clash[clash["key"] == k]["taxon"])
        raise ConfigError(path, "taxa.list", f"name '{k}' is given to more than one taxon: {owners}")
    return df[["taxon", "group", "aliases", "sensitive", *HIERARCHY_COLUMNS]].reset_index(drop=True)


def _taxon_keys(taxa: pd.DataFrame) -> pd.DataFrame:
    names = taxa[["taxon"]].assign(name=taxa["taxon"])
    aliases = (
        taxa.assign(name=taxa["aliases"].str.split("|"))
        .explode("name")[["taxon", "name"]]
        .dropna()
    )
    aliases = aliases[aliases["name"].str.strip() != ""]
    both = pd.concat([names, aliases], ignore_index=True)
    return pd.DataFrame({"key": normalise_name(both["name"]).to_numpy(), "taxon": both["taxon"].to_numpy()})


def taxon_lookup(taxa: pd.DataFrame) -> dict[str, str]:
    """Map of normalised name or alias -> canonical taxon."""
    keys = _taxon_keys(taxa).drop_duplicates("key")
    return dict(zip(keys["key"], keys["taxon"], strict=True))


def _read_targets(path: Path, known: set[str]) -> pd.DataFrame:
    df = _read_csv_strings(path, "taxa.targets", ["protocol", "taxon"])
    for col in ("first_year", "last_year", "life_stage"):
        if col not in df.columns:
            df[col] = ""
    unknown = sorted(set(df["taxon"]) - known)
    if unknown:
        raise ConfigError(
            path, "taxa.targets", f"target taxa {unknown[:5]} are not in the taxa list; add them there first"
        )
    for col in ("first_year", "last_year"):
        years = pd.to_numeric(df[col].replace("", None), errors="coerce")
        bad = years.isna() & (df[col] != "")
        if bad.any():
            raise ConfigError(path, "taxa.targets", f"{col} '{df[col][bad].iloc[0]}' is not a year")
        df[col] = years.astype("Int64")
    df["life_stage"] = df["life_stage"].str.casefold().replace("", None)
    return df[["protocol", "taxon", "first_year", "last_year", "life_stage"]].reset_index(drop=True)


def _sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()
