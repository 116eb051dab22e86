"""Provider profiles: how one provider's files map onto an adapter's fields."""

from __future__ import annotations

import difflib
import hashlib
import json
import zoneinfo
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from harmonize.config_spec import (
    COORDINATE_FORMATS,
    FRACTION_FORMATS,
    PROVIDER_TYPES,
    SOURCE,
    check_known,
    kinds,
    profile_spec,
    read_toml,
)
from harmonize.errors import ConfigError
from harmonize.study import Study, resolve_inside

__all__ = ["PROVIDER_TYPES", "Profile", "find_profile", "load_profile", "peek_kind"]


@dataclass(frozen=True, eq=False)
class Profile:
    """A validated provider profile."""

    path: Path
    source_id: str
    kind: str
    provider_type: str
    protocol: str | None
    timezone: str = "UTC"
    encoding: str = "utf-8"
    delimiter: str | None = None
    dayfirst: bool = False
    time_format: str | None = None
    #: how a local time that happens twice at a clock change is read: None (quarantined,
    #: ambiguous_local_time), "earlier" or "later" (of the two instants; harmonize.clock)
    ambiguous_times: str | None = None
        #: adapter field -> provider column, or (date column, time column) for a date-time field
    columns: Mapping[str, Mapping[str, str | tuple[str, str]]] = field(default_factory=dict)
    units: Mapping[str, str] = field(default_factory=dict)
    constants: Mapping[str, Any] = field(default_factory=dict)
    #: adapter field -> how the provider writes it (config_spec.COORDINATE_FORMATS, FRACTION_FORMATS)
    formats: Mapping[str, str] = field(default_factory=dict)
    raw: Mapping[str, Any] = field(default_factory=dict)

    @property
    def fingerprint(self) -> str:
        """sha256 of the profile's content (key order does not matter)."""
        return hashlib.sha256(json.dumps(self.raw, sort_keys=True, default=str).encode()).hexdigest()

    def section(self, name: str) -> Mapping[str, Any]:
        """A kind-specific section ([fishing], [aggregate], ...), empty when absent."""
        value = self.raw.get(name, {})
        if not isinstance(value, Mapping):
            raise ConfigError(self.path, f"[{name}]", "expected a table ([...] section)")
        return value

    def column_map(self, table: str) -> Mapping[str, str | tuple[str, str]]:
        """Adapter field -> provider column for one table ("events", "records" or "rows")."""
        return self.columns.get(table, {})


def find_profile(study: Study, name_or_path: str | Path) -> Path:
    """Resolve a profile argument: a path inside the study folder or a name in profiles/."""
    given = Path(name_or_path)
    candidates = [given] if given.is_absolute() else [Path.cwd() / given, study.root / given]
    candidates += [study.profiles_dir / given, study.profiles_dir / f"{given}.toml"]
    for cand in candidates:
        if cand.is_file():
            path = cand.resolve()
            if not path.is_relative_to(study.root):
                raise ConfigError(
                    path, None,
                    f"profile lies outside the study folder {study.root}; copy it into profiles/",
                )
            return path
    known = sorted(p.stem for p in study.profiles_dir.glob("*.toml")) if study.profiles_dir.is_dir() else []
    hint = f"; profiles in the study: {', '.join(known)}" if known else "; profiles/ is empty"
    raise ConfigError(name_or_path, None, f"no such profile{hint}")


def load_profile(path: str | Path, study: Study, table_fields: Mapping[str, set[str]]) -> Profile:
    """Read and validate a profile.

    Parameters
    ----------
    path
        The profile file (inside the study folder).
    study
        The study the profile belongs to.
    table_fields
        Adapter field names per table, used to check [columns], [units] and [constants].
        Pass an empty mapping to skip those checks (the adapter is not known yet).
    """
    path = Path(path).resolve()
    resolve_inside(study.root, str(path), path, "profile")
    raw = read_toml(path)

    src = raw.get("source")
    if not isinstance(src, Mapping):
        raise ConfigError(path, "[source]", "section is missing; it needs id, kind and provider_type")
    check_known(path, src, SOURCE, ("source",))
    source_id = _text(path, src, "id")
    kind = _check_kind(path, _text(path, src, "kind"))
    # every section and key must be known: a misspelt [unit] would silently keep the default units
    check_known(path, raw, profile_spec(kind))
    provider_type = _text(path, src, "provider_type")
    if provider_type not in PROVIDER_TYPES:
        raise ConfigError(
            path, "source.provider_type",
            f"'{provider_type}' is not known; expected one of {', '.join(PROVIDER_TYPES)}",
        )
    protocol = src.get("protocol")
    if protocol is not None and (not isinstance(protocol, str) or not protocol.strip()):
        raise ConfigError(path, "source.protocol", f"expected text, got {protocol!r}")
    timezone = src.get("timezone", "UTC")
    try:
        zoneinfo.ZoneInfo(str(timezone))
    except (zoneinfo.ZoneInfoNotFoundError, ValueError):
        raise ConfigError(
            path, "source.timezone", f"'{timezone}' is not an IANA time zone (e.g. 'UTC', 'Europe/Oslo')"
        ) from None
    encoding = str(src.get("encoding", "utf-8"))
    try:
        "".encode(encoding)
    except LookupError:
        raise ConfigError(path, "source.encoding", f"'{encoding}' is not a text encoding Python knows") from None
    ambiguous_times = src.get("ambiguous_times")
    if ambiguous_times is not None and ambiguous_times not in ("earlier", "later"):
        raise ConfigError(path, "source.ambiguous_times",
                          f"{ambiguous_times!r} is not known; expected \"earlier\" or \"later\" (which of the two "
                          "instants a local time that happens twice when the clocks go back means)")
    dayfirst = src.get("dayfirst", False)
    if not isinstance(dayfirst, bool):
        raise ConfigError(path, "source.dayfirst", f"expected true or false, got {dayfirst!r}")

    columns = _read_columns(path, raw.get("columns", {}), table_fields)
    all_fields = {f for names in table_fields.values() for f in names}
    units = raw.get("units", {})
    if not isinstance(units, Mapping) or not all(isinstance(v, str) for v in units.values()):
        raise ConfigError(path, "[units]", "expected field = \"unit\" pairs")
    constants = raw.get("constants", {})
    if not isinstance(constants, Mapping):
        raise ConfigError(path, "[constants]", "expected field = value pairs")
    formats = raw.get("formats", {})
    if not isinstance(formats, Mapping) or not all(isinstance(v, str) for v in formats.values()):
        raise ConfigError(path, "[formats]", "expected field = \"format\" pairs, e.g. start_lat = \"degrees_minutes\"")
    known_formats = tuple(dict.fromkeys(COORDINATE_FORMATS + FRACTION_FORMATS))
    for key, value in formats.items():
        if value not in known_formats:
            raise ConfigError(path, f"formats.{key}", f"'{value}' is not a format; expected one of {', '.join(known_formats)}")
    joined = sorted(f"columns.{t}.{k}" if t != "rows" else f"columns.{k}"
                    for t, m in columns.items() for k, v in m.items() if isinstance(v, tuple))
    formats_kinds = kinds(reads_formats=True)
    if kind not in formats_kinds and (formats or joined):
        key = f"formats.{next(iter(formats))}" if formats else joined[0]
        raise ConfigError(path, key, f"[formats] and date and time in two columns are read for "
                          f"{', '.join(formats_kinds[:-1])} and {formats_kinds[-1]} files only; "
                          f"convert this {kind} file's column first")
    joined_kinds = kinds(joins_date_time=True)
    if kind not in joined_kinds and joined:
        raise ConfigError(path, joined[0], f"date and time in two columns are joined for {', '.join(joined_kinds)} "
                          f"files only; map one column holding date and time")
    if all_fields:
        for section, mapping in (("units", units), ("constants", constants), ("formats", formats)):
            for key in mapping:
                if key not in all_fields:
                    close = difflib.get_close_matches(key, sorted(all_fields), n=1)
                    hint = f"; did you mean '{close[0]}'?" if close else ";"
                    raise ConfigError(
                        path, f"{section}.{key}",
                        f"'{key}' is not a field of the {kind} adapter{hint} fields: {', '.join(sorted(all_fields))}",
                    )

    return Profile(
        path=path,
        source_id=source_id,
        kind=kind,
        provider_type=provider_type,
        protocol=protocol.strip() if isinstance(protocol, str) else None,
        timezone=str(timezone),
        encoding=encoding,
        delimiter=src.get("delimiter"),
        dayfirst=dayfirst,
        time_format=src.get("time_format"),
        ambiguous_times=ambiguous_times,
        columns=columns,
        units=dict(units),
        constants=dict(constants),
        formats=dict(formats),
        raw=raw,
    )


def peek_kind(path: Path) -> str:
    """The [source] kind of a profile, read before the adapter is known."""
    raw = read_toml(path)
    src = raw.get("source")
    if not isinstance(src, Mapping):
        raise ConfigError(path, "[source]", "section is missing; it needs id, kind and provider_type")
    return _check_kind(path, src.get("kind"))


def _check_kind(path: Path, kind: Any) -> str:
    """``kind`` when an adapter is registered for it (built in or from an installed plug-in)."""
    known = kinds()
    if kind not in known:
        raise ConfigError(path, "source.kind", f"'{kind}' is not a source kind; expected one of {', '.join(known)}")
    return str(kind)


def _text(path: Path, sec: Mapping[str, Any], key: str) -> str:
    value = sec.get(key)
    if not isinstance(value, str) or not value.strip():
        raise ConfigError(path, f"source.{key}", f"expected non-empty text, got {value!r}")
    return value.strip()


def _read_columns(
    path: Path, raw: Any, table_fields: Mapping[str, set[str]]
) -> dict[str, dict[str, str]]:
    if not isinstance(raw, Mapping):
        raise ConfigError(path, "[columns]", "expected field = \"column\" pairs")
    tables = [t for t in table_fields if t != "rows"]
    out: dict[str, dict[str, str]] = {}
    flat = {k: v for k, v in raw.items() if not isinstance(v, Mapping)}
    nested = {k: v for k, v in raw.items() if isinstance(v, Mapping)}
    if flat:
        target = "rows" if "rows" in table_fields or not table_fields else None
        if target is None:
            raise ConfigError(
                path, "[columns]",
                f"this kind reads two tables; map columns under [columns.{tables[0]}] and [columns.{tables[1]}]",
            )
        out["rows"] = {k: _column_name(path, f"columns.{k}", v) for k, v in flat.items()}
    for table, mapping in nested.items():
        if table_fields and table not in table_fields:
            raise ConfigError(
                path, f"[columns.{table}]", f"unknown table; expected one of {', '.join(table_fields)}"
            )
        out[table] = {k: _column_name(path, f"columns.{table}.{k}", v) for k, v in mapping.items()}
    for table, mapping in out.items():
        known = table_fields.get(table)
        if known is None:
            continue
        for fld in mapping:
            if fld not in known:
                raise ConfigError(
                    path, f"columns.{table}.{fld}" if table != "rows" else f"columns.{fld}",
                    f"'{fld}' is not a field of this adapter; fields: {', '.join(sorted(known))}",
                )
    return out


def _column_name(path: Path, key: str, value: Any) -> str | tuple[str, str]:
    if isinstance(value, list):
        # a date-time written in two columns: [date column, time column], joined with a space
        if len(value) != 2 or not all(isinstance(v, str) and v.strip() for v in value):
            raise ConfigError(path, key, f"expected a column name, or [\"date column\", \"time column\"], got {value!r}")
        return (value[0], value[1])
    if not isinstance(value, str) or not value.strip():
        raise ConfigError(path, key, f"expected the provider's column name as text, got {value!r}")
    return value
