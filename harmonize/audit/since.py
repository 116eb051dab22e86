"""Since the last audit: what changed between a previous audit JSON and this audit.

Every audit JSON carries what the next comparison needs (its *basis*, see :func:`store_basis`):

- ``format`` ("harmonize-audit") and ``schema_version`` (:data:`AUDIT_SCHEMA_VERSION`);
- ``ingests``: the complete ingests the audit covered, with their file names and sha256;
- ``ingest_years``: per ingest and season year, the events, observation rows, summed effort
  and a digest of the values (bit-xor of the md5 of each row's record_id and value written
  with 17 significant digits: the order of rows does not matter, and the digest does not
  change with the DuckDB version, as its ``hash()`` may);
- ``layer_coverage``: per source kind x season x depth layer, samples and domain cells sampled
  (all audited years together), by the audit's own event table;
- a ``key`` on each finding: its location (code, source kind, season year, season, depth
  layer, stratum, variable, and the series or source pair it is about), so findings are
  matched by where they are, never by their position in a list.

:func:`compare` reads a previous JSON of the same study and reports ingests added and
superseded with their effect per source and season year (corrected files that changed values
in a season year the previous audit had already seen come first, with the number of rows
whose value changed, counted in the store where the superseded rows are kept), findings
new, resolved or with another severity, and coverage change per kind x season x layer.
"""

from __future__ import annotations

import json
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from html import escape
from pathlib import Path
from typing import TYPE_CHECKING, Any

import duckdb
import pandas as pd

from harmonize.errors import HarmonizeError
from harmonize.sql import sql_text

if TYPE_CHECKING:
    from harmonize.audit.findings import Finding

#: What the ``format`` key of every audit JSON says.
AUDIT_FORMAT = "harmonize-audit"
#: Version of the audit JSON's shape. 1 was the shape without ``schema_version`` (no basis
#: to compare with); 2 added the keys of this module.
AUDIT_SCHEMA_VERSION = 2

#: Finding details that name what a finding is about, beyond its place.
_SUBJECT_KEYS = ("protocol", "source_id", "source_a", "source_b")


def finding_key(finding: Finding | Mapping[str, Any]) -> list[Any]:
    """The location key of a finding (a JSON list): code, place, and the series it concerns.

    Two findings with the same key are the same finding in two audits.
    """
    f = finding.to_dict() if hasattr(finding, "to_dict") else finding
    details = f.get("details") or {}
    subject = "/".join(str(details[k]) for k in _SUBJECT_KEYS if details.get(k) is not None) or None
    return [f.get("code"), f.get("source_kind"), f.get("season_year"), f.get("season"), f.get("depth_layer"),
            f.get("stratum"), f.get("variable"), subject]


# ----------------------------------------------------------------------------- the basis
def store_basis(con: duckdb.DuckDBPyConnection, n_domain_cells: int, max_year: int | None = None) -> dict[str, Any]:
    """What the next audit needs to compare with this one (see the module docstring).

    ``con`` must hold the audit's temporary ``audit_cells`` table
    (:func:`harmonize.audit.metrics.build_event_table`); the observation rows are read once more.
    """
    ingests = con.execute(
        """SELECT ingest_id, source_id, source_kind, file_name, file_sha256, inputs_sha256,
                  strftime(finished_at, '%Y-%m-%dT%H:%M:%S') AS finished_at
           FROM ingests WHERE status = 'complete' ORDER BY started_at, ingest_id""").df()
    files = con.execute(
        """SELECT f.ingest_id, f.role, f.file_name, f.file_sha256 FROM ingest_files f
           JOIN ingests i USING (ingest_id) WHERE i.status = 'complete' ORDER BY f.ingest_id, f.role""").df()
    year_filter = "" if max_year is None else f"WHERE season_year <= {int(max_year)}"
    years = con.execute(
        f"""WITH ev AS (
                SELECT ingest_id, any_value(source_id) AS source_id, any_value(source_kind) AS source_kind,
                       season_year, count(*) AS n_rows, max(effort) AS effort,
                       any_value(effort_unit) AS effort_unit,
                       bit_xor(md5_number(record_id || '|' || coalesce(printf('%.17g', value), 'null'))) AS digest
                FROM observations {year_filter}
                GROUP BY ingest_id, source_id, event_id, season_year)
            SELECT ingest_id, any_value(source_id) AS source_id, any_value(source_kind) AS source_kind,
                   season_year, count(*)::BIGINT AS events, sum(n_rows)::BIGINT AS "rows",
                   coalesce(sum(effort), 0)::DOUBLE AS effort, any_value(effort_unit) AS effort_unit,
                   CAST(bit_xor(digest) AS VARCHAR) AS value_digest
            FROM ev GROUP BY ingest_id, season_year ORDER BY ingest_id, season_year""").df()
    denom = max(int(n_domain_cells), 1)
    layers = con.execute(
        f"""SELECT source_kind, season, depth_layer,
                   coalesce(sum(n) FILTER (WHERE effort_bearing), 0)::BIGINT AS events,
                   count(DISTINCT cell_public) FILTER (WHERE effort_bearing AND in_domain) AS cells_sampled,
                   count(DISTINCT cell_public) FILTER (WHERE effort_bearing AND in_domain) / {denom}::DOUBLE
                       AS coverage_fraction
            FROM audit_cells GROUP BY ALL ORDER BY ALL""").df()
    by_ingest = {k: g[["role", "file_name", "file_sha256"]].to_dict(orient="records")
                 for k, g in files.groupby("ingest_id", sort=False)}
    out_ingests = [{**row, "files": by_ingest.get(row["ingest_id"], [])} for row in _plain(ingests)]
    return {"ingests": out_ingests, "ingest_years": _plain(years), "layer_coverage": _plain(layers),
            "audited_year": max_year}


def _plain(frame: pd.DataFrame) -> list[dict[str, Any]]:
    out = []
    for row in frame.astype(object).where(frame.notna(), None).to_dict(orient="records"):
        out.append({k: (v.item() if hasattr(v, "item") else v) for k, v in row.items()})
    return out


# ----------------------------------------------------------------------------- reading a previous audit
def load_previous(path: str | Path, study_name: str | None = None) -> dict[str, Any]:
    """Read a previous audit JSON, refusing a foreign, older, newer or other study's file in one line.

    Raises
    ------
    HarmonizeError
        Naming the file and what to do.
    """
    path = Path(path)
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise HarmonizeError(f"{path}: no such file; pass the audit.json an earlier 'harmonize audit --json' wrote") from None
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise HarmonizeError(f"{path}: cannot be read as JSON ({str(exc).splitlines()[0]}); pass the audit.json "
                             "an earlier 'harmonize audit --json' wrote") from None
    return check_previous(data, str(path), study_name)


def check_previous(data: Any, name: str, study_name: str | None = None) -> dict[str, Any]:
    """Validate a previous audit's JSON object (see :func:`load_previous`)."""
    if not isinstance(data, dict) or data.get("format") != AUDIT_FORMAT:
        looks_old = isinstance(data, dict) and {"study", "coverage", "findings"} <= set(data)
        if looks_old and "schema_version" not in data:
            raise HarmonizeError(
                f"{name} was written by an older harmonize (an audit JSON without schema_version) and lacks the "
                "ingest list and digests a comparison needs; keep the JSON of this audit to compare with next time")
        raise HarmonizeError(f"{name} is not a harmonize audit JSON (no \"format\": \"{AUDIT_FORMAT}\"); "
                             "pass the audit.json an earlier 'harmonize audit --json' wrote")
    version = data.get("schema_version")
    if version != AUDIT_SCHEMA_VERSION:
        newer = isinstance(version, int) and version > AUDIT_SCHEMA_VERSION
        raise HarmonizeError(
            f"{name} has audit schema version {version!r}, this harmonize reads version {AUDIT_SCHEMA_VERSION}; "
            + ("update harmonize to compare with it" if newer else
               "keep the JSON of this audit to compare with next time"))
    for key in ("ingests", "ingest_years", "layer_coverage", "findings"):
        if not isinstance(data.get(key), list):
            raise HarmonizeError(f"{name}: the key {key!r} is missing or not a list; the file is damaged or was "
                                 "edited by hand, so pass an unedited audit.json")
    if study_name is not None and data.get("study") != study_name:
        raise HarmonizeError(f"{name} is the audit of study {data.get('study')!r}, not of {study_name!r}; "
                             "compare audits of the same study")
    return data


# ----------------------------------------------------------------------------- the comparison
@dataclass
class Since:
    """What changed since a previous audit (see :func:`compare`).

    Attributes
    ----------
    effects
        One row per changed ingest and season year: change ("corrected" or "added"), source_id,
        source_kind, file_name, ingest_id, replaces (the superseded ingest), season_year,
        earlier_year (the previous audit already held that source's season year), the
        change in events, rows and summed effort (effort_unit), values_changed (rows whose value
        differs, matched by record_id; null when the superseded rows are no longer in the
        store) and values_differ (the value digests differ). Corrections that changed values
        in an earlier year come first.
    findings
        One row per finding that is new, resolved or changed severity: status, code,
        severity_before, severity_after, place columns, key, message.
    coverage
        Per source kind x season x depth layer whose samples or cells changed: events and
        cells sampled before and after, and the share of the domain's cells.
    """

    previous_generated_at: str | None
    previous_tool_version: str | None
    ingests_added: list[str]
    ingests_superseded: list[dict[str, Any]]
    ingests_gone: list[str]
    effects: pd.DataFrame
    findings: pd.DataFrame
    coverage: pd.DataFrame
    notes: list[str] = field(default_factory=list)

    def new_codes(self) -> set[str]:
        """Codes of the findings that did not exist in the previous audit."""
        return set(self.findings.loc[self.findings["status"] == "new", "code"]) if len(self.findings) else set()

    def counts(self) -> dict[str, int]:
        f = self.findings
        return {s: int((f["status"] == s).sum()) if len(f) else 0 for s in ("new", "resolved", "severity changed")}

    def to_json_dict(self) -> dict[str, Any]:
        return {
            "previous_generated_at": self.previous_generated_at,
            "previous_tool_version": self.previous_tool_version,
            "ingests_added": self.ingests_added, "ingests_superseded": self.ingests_superseded,
            "ingests_gone": self.ingests_gone, "effects": _plain(self.effects),
            "findings": _plain(self.findings), "coverage": _plain(self.coverage), "notes": self.notes,
        }


_EFFECT_COLS = ["change", "source_id", "source_kind", "file_name", "ingest_id", "replaces", "season_year",
                "earlier_year", "events_change", "rows_change", "effort_change", "effort_unit",
                "values_changed", "values_differ", "revises_earlier_year"]


def _years_frame(rows: Sequence[Mapping[str, Any]]) -> pd.DataFrame:
    cols = ["ingest_id", "source_id", "source_kind", "season_year", "events", "rows", "effort", "effort_unit",
            "value_digest"]
    return pd.DataFrame(list(rows), columns=cols)


def _file_names(info: Mapping[str, Any]) -> str | None:
    """The ingest's input files ("hauls.csv + catch.csv"), else its main file name."""
    names = [str(f["file_name"]) for f in info.get("files") or [] if f.get("file_name")]
    return " + ".join(dict.fromkeys(names)) if names else info.get("file_name")


def _live_successor(ingest_id: str, table: pd.DataFrame) -> str | None:
    """Follow superseded_by from ``ingest_id`` to the complete ingest that replaces it now."""
    status = dict(zip(table["ingest_id"], table["status"], strict=True))
    after = dict(zip(table["ingest_id"], table["superseded_by"], strict=True))
    seen = set()
    current = ingest_id
    while status.get(current) == "superseded" and current not in seen:
        seen.add(current)
        current = after.get(current)
    return current if status.get(current) == "complete" else None


def _changed_values(con: duckdb.DuckDBPyConnection, store_dir: Path, old: str, new: str) -> pd.DataFrame | None:
    """Rows matched by record_id between two ingests, and how many changed value, per season year."""
    paths = {}
    for ingest in (old, new):
        rel = [r[0] for r in con.execute("SELECT path FROM observation_files WHERE ingest_id = ?", [ingest]).fetchall()]
        full = [store_dir / p for p in rel]
        if not full or not all(p.is_file() for p in full):
            return None
        paths[ingest] = ", ".join(sql_text(str(p)) for p in full)

    def src(ingest: str) -> str:
        return (f"read_parquet([{paths[ingest]}], hive_partitioning = true, union_by_name = true, "
                "hive_types = {'source_kind': VARCHAR, 'season_year': INTEGER})")

    return con.execute(
        f"""SELECT CAST(n.season_year AS INTEGER) AS season_year,
                   count(*) FILTER (WHERE o.value IS DISTINCT FROM n.value)::BIGINT AS values_changed
            FROM {src(old)} o JOIN {src(new)} n USING (record_id) GROUP BY ALL""").df()


def compare(previous: Mapping[str, Any], basis: Mapping[str, Any], findings: Sequence[Finding],
            con: duckdb.DuckDBPyConnection, store_dir: Path) -> Since:
    """Compare this audit (its ``basis`` and ``findings``) with a previous audit's JSON.

    Parameters
    ----------
    previous
        A previous audit JSON, checked by :func:`check_previous`.
    basis
        This audit's :func:`store_basis`.
    findings
        This audit's findings.
    con
        A connection to the store (the superseded ingests' rows are read from it).
    store_dir
        The store folder (parquet paths in the manifest are relative to it).
    """
    notes: list[str] = []
    if previous.get("audited_year") != basis.get("audited_year"):
        def scope(y: Any) -> str:
            return "every season year" if y is None else f"season year {y}"
        notes.append(f"the previous audit covered {scope(previous.get('audited_year'))}, this one "
                     f"{scope(basis.get('audited_year'))}: findings tied to a year differ for that reason too")
    prev_ids = [str(i["ingest_id"]) for i in previous["ingests"]]
    prev_info = {str(i["ingest_id"]): i for i in previous["ingests"]}
    now_ids = [str(i["ingest_id"]) for i in basis["ingests"]]
    now_info = {str(i["ingest_id"]): i for i in basis["ingests"]}
    table = con.execute("SELECT ingest_id, status, superseded_by, file_name FROM ingests").df()
    added = [i for i in now_ids if i not in set(prev_ids)]
    superseded, gone = [], []
    replaced_by: dict[str, str] = {}
    for old in prev_ids:
        if old in now_info:
            continue
        new = _live_successor(old, table)
        if new is None:
            gone.append(old)
            continue
        replaced_by[new] = old
        superseded.append({"ingest_id": old, "file_name": prev_info[old].get("file_name"),
                           "replaced_by": new, "replaced_by_file": now_info.get(new, {}).get("file_name")})
    if gone:
        notes.append(f"{len(gone)} ingest(s) of the previous audit are no longer in the store and were not "
                     "replaced by a correction (the store was rebuilt or repaired); their rows are counted as removed")
    prev_years = _years_frame(previous["ingest_years"])
    now_years = _years_frame(basis["ingest_years"])
    seen_before = set(zip(prev_years["source_id"], prev_years["season_year"], strict=True))
    rows: list[dict[str, Any]] = []
    for new in added:
        old = replaced_by.get(new)
        info = now_info[new]
        a = now_years[now_years["ingest_id"] == new].set_index("season_year")
        b = prev_years[prev_years["ingest_id"] == old].set_index("season_year") if old else a.iloc[0:0]
        changed = _changed_values(con, store_dir, old, new) if old else None
        if old and changed is None:
            notes.append(f"the rows of superseded ingest {old} are no longer in the store: the number of rows "
                         "whose value changed is unknown, the value digests still say whether any did")
        changed = changed.set_index("season_year")["values_changed"] if changed is not None else None
        for y in sorted(set(a.index) | set(b.index)):
            def get(frame: pd.DataFrame, col: str, y: Any = y) -> float:
                v = frame.at[y, col] if y in frame.index else None
                return 0.0 if v is None or pd.isna(v) else float(v)
            digest_a = a.at[y, "value_digest"] if y in a.index else None
            digest_b = b.at[y, "value_digest"] if y in b.index else None
            rows.append({
                "change": "corrected" if old else "added", "source_id": info["source_id"],
                "source_kind": info["source_kind"], "file_name": _file_names(info), "ingest_id": new,
                "replaces": old, "season_year": int(y),
                "earlier_year": (info["source_id"], y) in seen_before,
                "events_change": int(get(a, "events") - get(b, "events")),
                "rows_change": int(get(a, "rows") - get(b, "rows")),
                # rounded: sums of the same efforts in another order differ in the last bits
                "effort_change": round(get(a, "effort") - get(b, "effort"), 9),
                "effort_unit": (a.at[y, "effort_unit"] if y in a.index else b.at[y, "effort_unit"]),
                "values_changed": (int(changed.get(y, 0)) if changed is not None else None) if old else None,
                "values_differ": bool(old) and digest_a != digest_b,
            })
    for old in gone:
        b = prev_years[prev_years["ingest_id"] == old]
        for r in b.itertuples(index=False):
            rows.append({"change": "removed", "source_id": r.source_id, "source_kind": r.source_kind,
                         "file_name": prev_info[old].get("file_name"), "ingest_id": old, "replaces": None,
                         "season_year": int(r.season_year), "earlier_year": True, "events_change": -int(r.events),
                         "rows_change": -int(r.rows), "effort_change": -float(r.effort or 0.0),
                         "effort_unit": r.effort_unit, "values_changed": None, "values_differ": True})
    for r in rows:
        # a correction that changed values the previous audit had already seen (the count of
        # changed rows when the superseded rows are still in the store, else the digests)
        changed = r["values_changed"] > 0 if r["values_changed"] is not None else r["values_differ"]
        r["revises_earlier_year"] = bool(r["change"] == "corrected" and r["earlier_year"] and changed)
    effects = pd.DataFrame(rows, columns=_EFFECT_COLS)
    if len(effects):
        first = effects["revises_earlier_year"].astype(bool)
        rank = effects["change"].map({"corrected": 1, "removed": 2, "added": 3}) - first.astype(int)
        effects = (effects.assign(_rank=rank).sort_values(["_rank", "source_id", "season_year"], kind="stable")
                   .drop(columns="_rank").reset_index(drop=True))
    return Since(
        previous_generated_at=previous.get("generated_at"), previous_tool_version=previous.get("tool_version"),
        ingests_added=[i for i in added if i not in replaced_by], ingests_superseded=superseded, ingests_gone=gone,
        effects=effects, findings=_finding_changes(previous["findings"], findings),
        coverage=_coverage_changes(previous["layer_coverage"], basis["layer_coverage"]), notes=notes,
    )


_PLACE = ["source_kind", "season_year", "season", "depth_layer", "stratum", "variable"]


def _finding_changes(previous: Sequence[Mapping[str, Any]], findings: Sequence[Finding]) -> pd.DataFrame:
    before = {tuple(f.get("key") or finding_key(f)): f for f in previous}
    now = {tuple(finding_key(f)): f.to_dict() for f in findings}
    rows = []
    for key, f in now.items():
        old = before.get(key)
        if old is None:
            rows.append({"status": "new", "severity_before": None, "severity_after": f["severity"], **_where(f),
                         "message": f["message"], "key": list(key)})
        elif old.get("severity") != f["severity"]:
            rows.append({"status": "severity changed", "severity_before": old.get("severity"),
                         "severity_after": f["severity"], **_where(f), "message": f["message"], "key": list(key)})
    for key, f in before.items():
        if key not in now:
            rows.append({"status": "resolved", "severity_before": f.get("severity"), "severity_after": None,
                         **_where(f), "message": f.get("message"), "key": list(key)})
    cols = ["status", "code", "severity_before", "severity_after", *_PLACE, "message", "key"]
    out = pd.DataFrame(rows, columns=cols)
    order = {"new": 0, "severity changed": 1, "resolved": 2}
    return out.assign(_o=out["status"].map(order)).sort_values(["_o", "code"], kind="stable").drop(columns="_o").reset_index(drop=True)


def _where(f: Mapping[str, Any]) -> dict[str, Any]:
    return {"code": f.get("code"), **{k: f.get(k) for k in _PLACE}}


def _coverage_changes(previous: Sequence[Mapping[str, Any]], current: Sequence[Mapping[str, Any]]) -> pd.DataFrame:
    keys = ["source_kind", "season", "depth_layer"]
    cols = [*keys, "events", "cells_sampled", "coverage_fraction"]
    a = pd.DataFrame(list(previous), columns=cols)
    b = pd.DataFrame(list(current), columns=cols)
    for frame in (a, b):
        for k in keys:
            frame[k] = frame[k].astype(object).where(frame[k].notna(), "")
    m = a.merge(b, on=keys, how="outer", suffixes=("_before", "_after"))
    for col in ("events", "cells_sampled", "coverage_fraction"):
        for side in ("_before", "_after"):
            m[col + side] = pd.to_numeric(m[col + side], errors="coerce").fillna(0)
    changed = (m["events_before"] != m["events_after"]) | (m["cells_sampled_before"] != m["cells_sampled_after"])
    m = m[changed].sort_values(keys).reset_index(drop=True)
    for k in keys:
        m[k] = m[k].where(m[k] != "", None)
    out = m[[*keys, "events_before", "events_after", "cells_sampled_before", "cells_sampled_after",
             "coverage_fraction_before", "coverage_fraction_after"]]
    return out.astype({"events_before": int, "events_after": int, "cells_sampled_before": int,
                       "cells_sampled_after": int})


# ----------------------------------------------------------------------------- the report section
def _e(value: object) -> str:
    return escape("" if value is None or (isinstance(value, float) and pd.isna(value)) else str(value))


def _signed(x: float, digits: int = 0) -> str:
    x = round(float(x), digits) + 0.0  # no "-0" or "+0.00" from the last bits of a sum
    return f"{x:+,.{digits}f}" if x else "0"


def render_since_html(since: Since) -> str:
    """The "Since the last audit" section of the report (an HTML fragment)."""
    when = _e(since.previous_generated_at)
    c = since.counts()
    parts = [f'<p class="lead">Compared with the audit of {when}: {len(since.ingests_added)} ingest(s) added, '
             f'{len(since.ingests_superseded)} superseded by corrected files; findings: {c["new"]} new, '
             f'{c["resolved"]} resolved, {c["severity changed"]} with another severity.</p>']
    for note in since.notes:
        parts.append(f'<p class="note">{_e(note)}</p>')
    if len(since.effects):
        rows = []
        for r in since.effects.itertuples(index=False):
            vc = ("unknown" if r.values_changed is None or pd.isna(r.values_changed) else f"{int(r.values_changed):,}") \
                if r.change == "corrected" else ""
            flag = ' style="color:#b42318"' if r.revises_earlier_year else ""
            rows.append(f"<tr{flag}><td>{_e(r.change)}</td><td>{_e(r.source_id)} ({_e(r.source_kind)})</td>"
                        f"<td>{_e(r.file_name)}</td><td class=\"num\">{int(r.season_year)}</td>"
                        f"<td class=\"num\">{_signed(r.events_change)}</td><td class=\"num\">{_signed(r.rows_change)}</td>"
                        f"<td class=\"num\">{_signed(r.effort_change, 2)} {_e(r.effort_unit)}</td>"
                        f"<td class=\"num\">{vc}</td></tr>")
        parts.append('<h3>Ingests and their effect per source and season year</h3><p class="note">Corrected files '
                     'that changed values in a season year the previous audit had already seen come first (red): '
                     'results based on that year may need to be redone.</p>'
                     '<table><thead><tr><th>change</th><th>source</th><th>file</th><th class="num">season year</th>'
                     '<th class="num">events</th><th class="num">rows</th><th class="num">summed effort</th>'
                     f'<th class="num">rows with a changed value</th></tr></thead><tbody>{"".join(rows)}</tbody></table>')
    else:
        parts.append("<p>No ingest was added or superseded.</p>")
    if len(since.findings):
        rows = []
        for r in since.findings.itertuples(index=False):
            where = " · ".join(_e(x) for x in (r.source_kind, r.season_year, r.season, r.depth_layer,
                                               f"stratum {r.stratum}" if r.stratum else None, r.variable)
                               if x is not None and not (isinstance(x, float) and pd.isna(x)))
            sev = (f"{_e(r.severity_before)} → {_e(r.severity_after)}" if r.status == "severity changed"
                   else _e(r.severity_after or r.severity_before))
            rows.append(f"<tr><td>{_e(r.status)}</td><td>{sev}</td><td><code>{_e(r.code)}</code></td>"
                        f"<td>{where}</td><td>{_e(r.message)}</td></tr>")
        parts.append('<h3>Findings new, resolved or with another severity</h3><p class="note">Matched by place '
                     '(code, source kind, season year, season, layer, stratum, variable, series), not by position.</p>'
                     '<table><thead><tr><th>status</th><th>severity</th><th>code</th><th>where</th><th>message</th>'
                     f'</tr></thead><tbody>{"".join(rows)}</tbody></table>')
    else:
        parts.append("<p>The findings are the same as last time.</p>")
    if len(since.coverage):
        rows = []
        for r in since.coverage.itertuples(index=False):
            rows.append(f"<tr><td>{_e(r.source_kind)}</td><td>{_e(r.season)}</td><td>{_e(r.depth_layer)}</td>"
                        f"<td class=\"num\">{r.events_before:,} → {r.events_after:,}</td>"
                        f"<td class=\"num\">{r.cells_sampled_before:,} → {r.cells_sampled_after:,}</td>"
                        f"<td class=\"num\">{r.coverage_fraction_before:.1%} → {r.coverage_fraction_after:.1%}</td></tr>")
        parts.append('<h3>Coverage change per source kind, season and depth layer (all years together)</h3>'
                     '<table><thead><tr><th>source kind</th><th>season</th><th>layer</th><th class="num">samples</th>'
                     '<th class="num">cells sampled</th><th class="num">share of domain</th></tr></thead>'
                     f'<tbody>{"".join(rows)}</tbody></table>')
    else:
        parts.append("<p>Coverage is unchanged in every source kind, season and depth layer.</p>")
    return "".join(parts)
