"""Vessel position pings (VMS/AIS-like position reports) -> fishing hours per cell.

Pings are sorted per vessel by time; a ping is classified as fishing when its speed over
ground lies in the speed window of its gear (about 2-5 knots for trawling classified 75-90 %
of pings correctly: Skaar et al. 2011, ICES J. Mar. Sci. 68:1615-1620; Mills et al. 2007,
ICES J. Mar. Sci. 64:248-255). Each ping gets half of the interval to the previous ping and
half of the interval to the next one, each half capped at ``max_gap_h / 2`` (common practice:
a long gap is not fishing time). Missing speeds are derived from consecutive positions
(distances on the WGS84 ellipsoid). The rules are those of harmonize.tracks. Fishing hours
are summed per grid cell x season_year x season x gear (x depth layer), with the number of
distinct vessels (harmonize.adapters.fishing). Ping files are the largest inputs: everything
runs in DuckDB SQL (window functions over vessel and time), streaming with bounded memory;
only the domain test and the grid cell of each position run in numpy, bucket of whole
vessels by bucket (see :meth:`PingReader._track_buckets`).

Rows are numbered as every other reader of harmonize numbers them (``harmonize.reading.text.LineReader``):
data rows as a person counts them, the header excluded, blank lines and lines made only of
delimiters not counted. DuckDB's fast CSV reader is used for well-formed files; when it
rejects a line, fails, or meets a row it reads differently (all cells blank, a cell that
starts with a quote it did not take as quoting), the file is read again by the line reader,
streamed block by block into a temporary parquet file that the ping SQL then reads.

Vessel ids are replaced by salted hashes (harmonize.privacy) before anything is stored;
unhashed ids never reach the store, the quarantine or a message.
"""

from __future__ import annotations

import shutil
import tempfile
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from harmonize import connections, units
from harmonize.adapters.base import AdapterOutput, InputFile, ProgressCallback
from harmonize.adapters.domain import swapped_position_notes
from harmonize.adapters.fishing import (
    OUTSIDE,
    FishingSettings,
    decode_cells,
    effort_event_ids,
    effort_output,
    locate,
)
from harmonize.clock import sql_local_problem, sql_offset_text, sql_resolved
from harmonize.contract import fields
from harmonize.engines import current_engine
from harmonize.errors import ConfigError, InputFileError, ReasonCode, one_line
from harmonize.files import file_sha256
from harmonize.geodesy import distance_sql
from harmonize.privacy import pseudonymise, study_salt
from harmonize.profile import Profile
from harmonize.reading.fields import NA_TOKENS, resolve_columns
from harmonize.reading.text import LineReader, RawTable, read_header
from harmonize.sql import sql_ident, sql_text
from harmonize.study import Study
from harmonize.tagging import Grid, season_sql, season_year_offsets
from harmonize.tracks import track_sql

#: Time formats of a profile with ``dayfirst = true`` (day before month).
DAYFIRST_FORMATS = ("%d/%m/%Y %H:%M:%S", "%d/%m/%Y %H:%M", "%d-%m-%Y %H:%M:%S", "%d-%m-%Y %H:%M",
                    "%d.%m.%Y %H:%M:%S", "%d.%m.%Y %H:%M")
#: Distance (m) between two WGS84 points, as a DuckDB macro (harmonize.geodesy: the same
#: formula and constants as the numpy function; tests check it against GeographicLib).
DISTANCE_MACRO = ("CREATE OR REPLACE TEMP MACRO geo_dist_m(lat1, lon1, lat2, lon2) AS "
                  + distance_sql("lat1", "lon1", "lat2", "lon2") + ";")


def _csv_source(path: Path, profile: Profile, delimiter: str | None = None, rejects: bool = True) -> str:
    """A DuckDB table expression reading every column of the file as text.

    The delimiter (the line reader's), quote and escape characters are given, not sniffed,
    so that DuckDB splits lines as the line reader does.
    """
    quoted = sql_text(str(path))
    if path.suffix.lower() == ".parquet":
        return f"read_parquet({quoted})"
    opts = ["all_varchar = true", "header = true", "quote = '\"'", "escape = '\"'"]
    if rejects:
        opts += ["store_rejects = true", "rejects_table = 'ping_rejects'", "rejects_scan = 'ping_reject_scans'"]
    delimiter = delimiter or profile.delimiter
    if delimiter:
        opts.append("delim = " + sql_text(delimiter))
    elif path.suffix.lower() in (".tsv", ".tab"):
        opts.append("delim = '\t'")
    enc = profile.encoding.lower().replace("_", "-")
    if enc in ("latin-1", "latin1", "iso-8859-1"):
        opts.append("encoding = 'latin-1'")
    elif enc in ("utf-16",):
        opts.append("encoding = 'utf-16'")
    return f"read_csv({quoted}, {', '.join(opts)})"


def file_columns(path: Path, profile: Profile) -> list[str]:
    """The header of the file: as the line reader reads it (text) or the parquet schema."""
    if path.stat().st_size == 0:
        raise InputFileError(path, "the file is empty; expected a header row and data rows")
    if path.suffix.lower() != ".parquet":
        return read_header(path, profile)[0]
    con = connections.connect()
    try:
        rel = con.sql(f"SELECT * FROM {_csv_source(path, profile)} LIMIT 0")
        return [c.strip().lstrip("\ufeff") for c in rel.columns]
    except duckdb.Error as exc:
        raise InputFileError(path, f"cannot be read as a table ({str(exc).splitlines()[0]}); "
                             "check the delimiter ([source] delimiter) and the encoding") from None
    finally:
        con.close()


#: A cell quoted in a message: at most 60 characters (line breaks are escaped afterwards).
CELL_MACRO = "CREATE OR REPLACE TEMP MACRO cell_txt(x) AS CASE WHEN length(x) > 60 THEN left(x, 57) || '...' ELSE x END;"
#: Characters of a whitespace-only cell (as Python's str.strip removes them, ASCII part).
_BLANK_CHARS = " \t\n\r\x0b\x0c"
#: Data rows per block written by the line reader's fallback (bounded memory).
FALLBACK_BLOCK_ROWS = 100_000
#: Accepted pings per bucket of whole vessels whose track is made in one pass (bounded memory).
PINGS_PER_BUCKET = 1_000_000
#: The raw row of a row that could not be split: its text may identify a vessel.
_WITHHELD = '{"note": "row text withheld: it may identify a vessel"}'


class PingReader:
    """The ping pipeline of one file, in DuckDB. See the module docstring for the method.

    Tables: ``p`` typed pings with the first row-level problem (the view of a temporary
    parquet file, the only table of the whole file); ``rej`` the pings rejected by a
    row-level check, an unknown gear or the domain; ``track`` the track of one bucket of
    whole vessels' accepted pings (one ordered pass per vessel; only the rows something
    downstream reads: fishing, derived speeds, position jumps, edges), from which each
    bucket appends to ``spikes``, ``track_edges`` and ``cell_parts`` (fishing hours per cell);
    ``dups`` the pings with the same vessel and time as an earlier row, made by a second
    ordered pass only when the track found one. The Dask path reads the view ``accepted``
    (the accepted pings with their vessel's number, gear and grid cell) instead.
    """

    def __init__(self, path: Path, profile: Profile, study: Study, settings: FishingSettings,
                 columns: list[str], progress: ProgressCallback | None) -> None:
        self.path, self.profile, self.study, self.settings = path, profile, study, settings
        self.progress = progress or (lambda stage, done, total: None)
        self.specs = {s.name: s for s in fields("effort_pings")}
        self.columns = columns
        self.found = self._resolve(columns)
        #: file column -> SQL expression naming it in the table being read
        self.colref: dict[str, str] = {c: sql_ident(c) for c in columns}
        self.delimiter: str | None = None
        if path.suffix.lower() != ".parquet":
            self.delimiter = read_header(path, profile)[1]
        self.grid = Grid(study.crs, study.cell_size_km)
        self.notes: list[str] = []
        self.tmp = Path(tempfile.gettempdir())  # the run's own temporary folder, set by run()
        self.unknown_gears: list[str] = []  # raw gear names with no rule (set by _lookups)
        self.n_outside = 0  # pings outside the domain (set by _locate)

    def _resolve(self, columns: list[str]) -> dict[str, str]:
        empty = RawTable(self.path, "rows", pd.DataFrame(columns=columns), "")
        return resolve_columns(empty, list(self.specs.values()), self.profile)

    # -- SQL building blocks
    def _label(self, name: str) -> str:
        col = self.found.get(name)
        if col is None:
            return f"{name} (constant in {self.profile.path.name})"
        return f"column '{col}'" if col == name else f"{name} (column '{col}')"

    def _raw(self, name: str) -> str:
        """The field's text as read (a constant of the profile, or NULL when absent)."""
        if name in self.found:
            return f"CAST({self.colref[self.found[name]]} AS VARCHAR)"
        if name in self.profile.constants:
            return sql_text(str(self.profile.constants[name]))
        return "CAST(NULL AS VARCHAR)"

    @staticmethod
    def _is_na(text: str) -> str:
        """SQL: the text is one of the tokens that mean 'no value' (cheap test first)."""
        tokens = ", ".join(sql_text(t) for t in sorted(NA_TOKENS))
        return f"(length({text}) <= 5 AND lower(trim({text})) IN ({tokens}))"

    def _written_sql(self, text: str) -> str | None:
        """SQL: the wall-clock TIMESTAMP of a time written in the profile's format (``time_format``,
        or the day-first formats), None when the profile names neither."""
        if self.profile.time_format:
            return f"try_strptime({text}, {sql_text(self.profile.time_format)})"
        if self.profile.dayfirst:
            return f"try_strptime({text}, [{', '.join(map(sql_text, DAYFIRST_FORMATS))}])"
        return None

    @staticmethod
    def _plain_sql(text: str) -> str:
        """SQL: the time has no offset or zone letter after its date (an ISO wall-clock time)."""
        return (f"(strpos(substr({text}, 11), '+') = 0 AND strpos(substr({text}, 11), '-') = 0 "
                f"AND right({text}, 1) BETWEEN '0' AND '9')")

    def _local_sql(self, text: str) -> str:
        """SQL: the wall-clock TIMESTAMP of a time read in the profile's zone (NULL for a time
        with an offset, and when the profile's zone is UTC, which has no clock changes)."""
        if self.profile.timezone == "UTC":
            return "CAST(NULL AS TIMESTAMP)"
        written = self._written_sql(text)
        if written is not None:
            return written
        return f"CASE WHEN {self._plain_sql(text)} THEN TRY_CAST({text} AS TIMESTAMP) END"

    def _time_sql(self, text: str) -> str:
        """SQL: the UTC TIMESTAMP of a time cell, with harmonize.clock's rule at clock changes
        (a nonexistent local time is NULL; an ambiguous one is NULL unless the profile's
        ``ambiguous_times`` picks the earlier or later instant)."""
        if self.profile.timezone == "UTC":
            return self._instant_sql(text)
        local = self._local_sql(text)
        problem = sql_local_problem(local, self.profile.timezone)
        choice = self.profile.ambiguous_times
        resolved = (f"timezone('UTC', {sql_resolved(local, self.profile.timezone, choice)})" if choice
                    else "CAST(NULL AS TIMESTAMP)")
        return (f"CASE {problem} WHEN 'nonexistent' THEN CAST(NULL AS TIMESTAMP) WHEN 'ambiguous' THEN {resolved} "
                f"ELSE {self._instant_sql(text)} END")

    def _clock_sql(self, text: str) -> str:
        """SQL: 'nonexistent' or 'ambiguous' for a local time at a clock change, else NULL."""
        if self.profile.timezone == "UTC":
            return "CAST(NULL AS VARCHAR)"
        return sql_local_problem(self._local_sql(text), self.profile.timezone)

    def _clock_message_sql(self, kind: str) -> str:
        """SQL: the sentence of :func:`harmonize.clock.clock_change_message` for ping rows."""
        zone = self.profile.timezone
        local = self._local_sql("time_txt")
        z = sql_text(zone)
        before = sql_offset_text(f"timezone({z}, {local} - INTERVAL 3 HOUR)", zone)
        after = sql_offset_text(f"timezone({z}, {local} + INTERVAL 3 HOUR)", zone)
        label = sql_text(self._label("time"))
        if kind == "ambiguous":
            return (f"printf('%s holds ''%s'', a local time that happens twice in %s: the clocks went back from %s "
                    f"to %s on %s; give the time with its offset, or set [source] ambiguous_times = \"earlier\" "
                    f"or \"later\" in the profile', {label}, cell_txt(time_txt), {z}, {before}, {after}, "
                    f"strftime({local}, '%Y-%m-%d'))")
        return (f"printf('%s holds ''%s'', a local time that does not exist in %s: the clocks went forward from %s "
                f"to %s on %s and skipped it; check the time and the profile''s [source] timezone', {label}, "
                f"cell_txt(time_txt), {z}, {before}, {after}, strftime({local}, '%Y-%m-%d'))")

    def _instant_sql(self, text: str) -> str:
        tz = sql_text(self.profile.timezone)
        written = self._written_sql(text)
        if written is not None:
            return f"timezone('UTC', timezone({tz}, {written}))"
        # "...Z" is UTC; a plain time in a UTC profile too: both take the fast TIMESTAMP cast
        # (which would silently drop any other offset). The rest is read as TIMESTAMPTZ:
        # with its offset, or in the session time zone (the profile's).
        fast = f"right({text}, 1) = 'Z'" + (f" OR {self._plain_sql(text)}" if self.profile.timezone == "UTC" else "")
        return (f"CASE WHEN {fast} THEN TRY_CAST({text} AS TIMESTAMP) "
                f"ELSE timezone('UTC', TRY_CAST({text} AS TIMESTAMPTZ)) END")

    def _speed_factor(self) -> float:
        unit = self.profile.units.get("speed_kn")
        if unit is None:
            return 1.0
        try:
            scale, _ = units.conversion("speed", unit)
        except units.UnitError as exc:
            raise ConfigError(self.profile.path, "[units] speed_kn", str(exc)) from None
        return scale

    def _stage1_sql(self, src: str, rownum: str, extra: str) -> str:
        """Typed pings with the first problem of each row (reason, message, raw).

        ``src`` is the table read, ``rownum`` the SQL of the data row number and ``extra``
        the SQL of two more columns: ``nf`` (the number of fields of a row that could not be
        split into the header's columns, else NULL) and ``odd`` (a row the fast reader read
        differently from the line reader).
        """
        s = self.settings
        now = (pd.Timestamp.now("UTC").tz_localize(None) + pd.Timedelta(days=1)).isoformat()
        checks: list[tuple[str, str, str]] = [  # (condition, reason, message SQL)
            ("nf IS NOT NULL", ReasonCode.BAD_TYPE,
             f"printf('row has a different number of fields than the header (%d instead of %d); "
             f"check delimiters and quotes', nf, {len(self.columns)})")]
        missing = {
            "vessel_id": "vessel_id_txt IS NULL OR " + self._is_na("vessel_id_txt"),
            "time": "time_txt IS NULL OR (t IS NULL AND " + self._is_na("time_txt") + ")",
            "lat": "lat_txt IS NULL OR (lat IS NULL AND " + self._is_na("lat_txt") + ")",
            "lon": "lon_txt IS NULL OR (lon_in IS NULL AND " + self._is_na("lon_txt") + ")",
            "gear": "gear_txt IS NULL OR " + self._is_na("gear_txt"),
        }
        for f, cond in missing.items():
            desc = self.specs[f].description.split(";")[0].rstrip(".")
            checks.append((cond, ReasonCode.MISSING_VALUE,
                           sql_text(f"{self._label(f)} is empty; a {desc[:1].lower()}{desc[1:]} is required")))
        checks.append(("clock = 'nonexistent'", ReasonCode.NONEXISTENT_LOCAL_TIME,
                       self._clock_message_sql("nonexistent") if self.profile.timezone != "UTC" else "NULL"))
        checks.append(("clock = 'ambiguous' AND t IS NULL", ReasonCode.AMBIGUOUS_LOCAL_TIME,
                       self._clock_message_sql("ambiguous") if self.profile.timezone != "UTC" else "NULL"))
        # DuckDB reads 'infinity' and '-inf' as timestamps: not a date-time either
        checks.append(("t IS NULL OR NOT isfinite(t)", ReasonCode.BAD_TIME,
                       f"printf('%s holds ''%s'', which is not a date-time (expected e.g. 2021-06-14T08:30:00Z)', "
                       f"{sql_text(self._label('time'))}, cell_txt(time_txt))"))
        for f, col in (("lat", "lat"), ("lon", "lon_in"), ("speed_kn", "sog")):
            na = "" if f != "speed_kn" else f" AND NOT {self._is_na('speed_kn_txt')}"
            checks.append((f"{f}_txt IS NOT NULL AND {col} IS NULL{na}", ReasonCode.BAD_TYPE,
                           f"printf('%s holds ''%s'', which is not a number', {sql_text(self._label(f))}, cell_txt({f}_txt))"))
            checks.append((f"NOT isfinite({col})", ReasonCode.OUT_OF_RANGE,
                           sql_text(f"{self._label(f)} is not a finite number")))
        checks.append(("lat < -90 OR lat > 90", ReasonCode.OUT_OF_RANGE,
                       f"printf('%s = %s is outside the allowed range (-90 to 90)', "
                       f"{sql_text(self._label('lat'))}, cell_txt(lat_txt))"))
        checks.append(("lon_in < -180 OR lon_in > 360", ReasonCode.OUT_OF_RANGE,
                       f"printf('%s = %s is outside the allowed range (-180 to 360)', {sql_text(self._label('lon'))}, cell_txt(lon_txt))"))
        checks.append(("sog < 0", ReasonCode.OUT_OF_RANGE,
                       f"printf('%s = %s is negative; a speed over ground is >= 0', {sql_text(self._label('speed_kn'))}, cell_txt(speed_kn_txt))"))
        checks.append((f"sog > {s.max_speed_kn!r}", ReasonCode.IMPLAUSIBLE_SPEED,
                       f"printf('%s = %s (%.1f knots) is above %s knots, faster than fishing vessels go; "
                       f"check the value or the unit ([units] speed_kn)', {sql_text(self._label('speed_kn'))}, "
                       f"cell_txt(speed_kn_txt), sog, {sql_text(f'{s.max_speed_kn:g}')})"))
        checks.append((f"t > TIMESTAMP '{now}'", ReasonCode.FUTURE_TIME,
                       f"printf('%s = %s lies in the future; check the clock or the time zone ([source] timezone)', "
                       f"{sql_text(self._label('time'))}, cell_txt(time_txt))"))
        reason = "CASE " + " ".join(f"WHEN {c} THEN '{r}'" for c, r, _ in checks) + " END"
        message = "CASE " + " ".join(f"WHEN reason = '{r}' AND ({c}) THEN {m}" for c, r, m in checks) + " END"
        # the mapped fields of a rejected row, as text (the vessel id is added, hashed, later)
        raw_fields = [(self.found[f], f"{f}_txt") for f in ("time", "lat", "lon", "speed_kn", "gear") if f in self.found]
        raw = "json_object(" + ", ".join(f"{sql_text(c)}, {e}" for c, e in raw_fields) + ")" if raw_fields else "NULL"
        raw = f"CASE WHEN nf IS NOT NULL THEN {sql_text(_WITHHELD)} ELSE {raw} END"
        texts = ", ".join(f"{self._raw(f)} AS {f}_txt" for f in self.specs)
        return f"""
            SELECT row, CASE WHEN reason IS NULL OR reason <> '{ReasonCode.MISSING_VALUE}' THEN vessel_id_txt END AS v_raw,
                   t, lat, lon, sog, gear_txt AS gear_raw, reason, odd,
                   CASE WHEN reason IS NOT NULL THEN {message} END AS message,
                   CASE WHEN reason IS NOT NULL THEN {raw} END AS raw
            FROM (
                SELECT *, {reason} AS reason FROM (
                    SELECT *, lon_in - 360.0 * floor((lon_in + 180.0) / 360.0) AS lon FROM (
                        SELECT row, nf, odd, vessel_id_txt, gear_txt, time_txt, lat_txt, lon_txt, speed_kn_txt,
                               {self._time_sql('time_txt')} AS t, {self._clock_sql('time_txt')} AS clock,
                               TRY_CAST(lat_txt AS DOUBLE) AS lat, TRY_CAST(lon_txt AS DOUBLE) AS lon_in,
                               TRY_CAST(speed_kn_txt AS DOUBLE) * {self._speed_factor()!r} AS sog
                        FROM (SELECT CAST({rownum} AS BIGINT) AS row, {texts}, {extra} FROM {src}))))"""

    # -- the pipeline
    def run(self) -> AdapterOutput:
        tmp = Path(tempfile.mkdtemp(prefix="harmonize-pings-"))
        # an in-memory database whose buffer manager spills to the temporary folder beyond
        # memory_limit: the working tables stay in memory while they fit (writing them to an
        # on-disk scratch database cost 3-4x more at 1e7 pings), and memory stays bounded
        con = connections.connect()
        try:
            con.execute(f"SET temp_directory = {sql_text(str(tmp))}")
            con.execute(f"SET memory_limit = {sql_text(self.settings.memory_limit)}")
            con.execute("SET preserve_insertion_order = true")  # row numbers follow the file
            con.execute(f"SET TimeZone = {sql_text(self.profile.timezone)}")
            con.execute(DISTANCE_MACRO)
            con.execute(CELL_MACRO)
            return self._run(con, tmp)
        except duckdb.Error as exc:
            raise InputFileError(self.path, f"cannot be read ({str(exc).splitlines()[0]}); "
                                 "check the delimiter, quoting and encoding") from None
        finally:
            con.close()
            shutil.rmtree(tmp, ignore_errors=True)

    def _run(self, con: duckdb.DuckDBPyConnection, tmp: Path) -> AdapterOutput:
        self.tmp = tmp
        self.progress("reading pings", 0, 5)
        if not self._read_fast(con):
            self._read_lines(con, tmp / "lines.parquet")
        n_rows = con.execute("SELECT count(*) FROM p").fetchall()[0][0]
        if n_rows == 0:
            raise InputFileError(self.path, "the file has a header but no data rows")

        self.progress("vessels and gears", 1, 5)
        contact = self._lookups(con)
        engine = current_engine()
        if engine.name == "dask":
            self.progress("domain and grid cells", 2, 5)
            con.register("cells", self._locate(con))
            self._checks(con)
            self._accepted_view(con)
            self._swapped_notes(con)
            self.progress("fishing time", 4, 5)
            cells_df, fishing, derived = self._track_on_dask(con, engine.scheduler)
        else:
            self.progress("tracks", 3, 5)
            cells_df, fishing, derived = self._track_buckets(con, n_rows)
            self._checks(con)
            self._swapped_notes(con)
            self.progress("fishing time", 4, 5)
        edges, edge_cells = self._edges(con)
        events, values = effort_output(cells_df, self.study, self.grid, contact)
        edge_events, edge_values = effort_output(edge_cells, self.study, self.grid, contact)
        quarantine, masked = self._quarantine(con)
        n_bad = len(quarantine) + int(masked["n_values"].sum() if len(masked) else 0)
        files = [InputFile("rows", self.path, file_sha256(self.path), n_rows, n_rows - n_bad, n_bad)]
        self.notes.append(f"{fishing:,} of {n_rows - n_bad:,} accepted pings classified as fishing "
                          f"({derived:,} with a speed derived from positions)")
        self.progress("done", 5, 5)
        return AdapterOutput(events=events, values=values, quarantine=quarantine, files=files,
                             notes=self.notes, masked=masked, track_edges=edges, edge_events=edge_events,
                             edge_values=edge_values)

    def _swapped_notes(self, con: duckdb.DuckDBPyConnection) -> None:
        """Once per file, with a count: positions that would lie inside the domain swapped (not port pings)."""
        off = con.execute(f"SELECT lat, lon FROM rej WHERE reason IN ('{ReasonCode.OUTSIDE_DOMAIN}', "
                          f"'{ReasonCode.OUT_OF_RANGE}') AND lat IS NOT NULL AND lon IS NOT NULL "
                          "ORDER BY row").fetchnumpy()
        self.notes += swapped_position_notes(self.study, [(self.path.name, off["lat"], off["lon"])])

    def _lookups(self, con: duckdb.DuckDBPyConnection) -> dict[str, str]:
        """Hash the distinct vessel ids and resolve the distinct gears (tables vmap, gmap)."""
        vessels = con.sql("SELECT DISTINCT v_raw FROM p WHERE v_raw IS NOT NULL").to_arrow_table()["v_raw"].to_pandas()
        hashed = pseudonymise(vessels, study_salt(self.study.root), prefix="vessel")
        vid = pd.factorize(hashed)[0].astype(np.int32)
        con.register("vmap", pa.table({"v_raw": pa.array(vessels.astype(str).tolist(), pa.string()),
                                       "vessel": pa.array(hashed.astype(str).tolist(), pa.string()),
                                       "vid": vid}))
        gears = con.sql("SELECT DISTINCT gear_raw FROM p WHERE gear_raw IS NOT NULL").to_arrow_table()["gear_raw"].to_pylist()
        rules = {g: self.settings.rule(g, self.study) for g in gears}
        self.unknown_gears = [g for g, r in rules.items() if r is None]
        # a known gear's rule by its number (1-based): the track's sort carries the number only
        known = [r for r in rules.values() if r is not None]
        number = {g: i + 1 for i, g in enumerate(g for g, r in rules.items() if r is not None)}

        def lookup(name: str, values: list[str], kind: str) -> None:
            items = [f"CAST({v} AS {kind})" for v in values] or [f"CAST(NULL AS {kind})"]
            con.execute(f"CREATE OR REPLACE TEMP MACRO {name}(i) AS ([{', '.join(items)}])[i]")

        lookup("gear_of", [sql_text(r.gear) for r in known], "VARCHAR")
        lookup("layer_of", [sql_text(r.layer) for r in known], "VARCHAR")
        # the window's ends as the exact doubles of the settings (a text cast is correctly rounded)
        lookup("smin_of", [sql_text(repr(r.speed_min_kn)) for r in known], "DOUBLE")
        lookup("smax_of", [sql_text(repr(r.speed_max_kn)) for r in known], "DOUBLE")
        con.register("gmap", pa.table({
            "gi": pa.array([number.get(g) for g in rules], pa.int16()),
            "gear_raw": pa.array(list(rules), pa.string()),
            "gear": pa.array([r.gear if r else None for r in rules.values()], pa.string()),
            "layer": pa.array([r.layer if r else None for r in rules.values()], pa.string()),
            "smin": pa.array([r.speed_min_kn if r else None for r in rules.values()], pa.float64()),
            "smax": pa.array([r.speed_max_kn if r else None for r in rules.values()], pa.float64()),
        }))
        return {r.gear: r.contact for r in rules.values() if r is not None}

    def _checks(self, con: duckdb.DuckDBPyConnection) -> None:
        """Gear and domain: the rejected pings (table ``rej``, with what the quarantine shows
        of each).

        The rejected pings are found by three selective scans (a row-level problem; else an
        unknown gear; else a position outside the domain, by the rows of the table
        ``outside`` that the domain test found), so that a file with few of them costs little here.
        """
        unknown_gear = ("printf('gear ''%s'' is not a known gear code; add a [fishing.gears.\"%s\"] table "
                        "with contact = \"bottom\" or \"pelagic\" to the profile', cell_txt(p.gear_raw), cell_txt(upper(trim(p.gear_raw))))")
        outside = "printf('position (%.4f, %.4f) lies outside the study domain', p.lat, p.lon)"
        unknown = "(" + ", ".join(sql_text(g) for g in self.unknown_gears) + ")" if self.unknown_gears else None
        parts = ["SELECT p.row, p.v_raw, p.t, p.lat, p.lon, p.sog, g.gear, p.raw, p.reason, p.message "
                 "FROM p LEFT JOIN gmap g ON p.gear_raw = g.gear_raw WHERE p.reason IS NOT NULL"]
        if unknown:
            parts.append(f"SELECT p.row, p.v_raw, p.t, p.lat, p.lon, p.sog, NULL, p.raw, '{ReasonCode.UNKNOWN_GEAR}', "
                         f"{unknown_gear} FROM p WHERE p.reason IS NULL AND p.gear_raw IN {unknown}")
        if self.n_outside:
            known = f" AND p.gear_raw NOT IN {unknown}" if unknown else ""
            parts.append(f"SELECT p.row, p.v_raw, p.t, p.lat, p.lon, p.sog, g.gear, p.raw, "
                         f"'{ReasonCode.OUTSIDE_DOMAIN}', {outside} FROM p SEMI JOIN outside USING (row) "
                         f"LEFT JOIN gmap g ON p.gear_raw = g.gear_raw WHERE p.reason IS NULL{known}")
        union = " UNION ALL ".join(parts)
        con.execute(f"""
            CREATE TABLE rej AS
            SELECT r.*, vm.vessel FROM ({union}) r(row, v_raw, t, lat, lon, sog, gear, raw, reason, message)
            LEFT JOIN vmap vm ON r.v_raw = vm.v_raw
        """)

    def _accepted_view(self, con: duckdb.DuckDBPyConnection) -> None:
        """The view ``accepted`` of the Dask path: the pings no check rejected, with the cell
        codes of :meth:`_locate` (table ``cells``, in the order of ``p``)."""
        # the vessel's number comes from the small table of distinct vessels (each hashed once)
        con.execute(f"""
            CREATE TEMP VIEW accepted AS
            SELECT p.row, vm.vid, p.t, p.lat, p.lon, p.sog, g.gi, gear_of(g.gi) AS gear, layer_of(g.gi) AS layer,
                   smin_of(g.gi) AS smin, smax_of(g.gi) AS smax, c.code
            FROM (p POSITIONAL JOIN cells c)
            JOIN vmap vm ON p.v_raw = vm.v_raw
            JOIN gmap g ON p.gear_raw = g.gear_raw
            WHERE p.reason IS NULL AND g.gi IS NOT NULL AND c.code <> {OUTSIDE}
        """)

    def _duplicates(self, con: duckdb.DuckDBPyConnection, pings: str) -> None:
        """Append to table ``dups`` the pings of ``pings`` (accepted pings of whole vessels, with
        their gear's number ``gi``) with the same vessel and time as an earlier row (one ordered
        pass), with what the quarantine shows of each."""
        con.execute(f"""
            INSERT INTO dups
            SELECT row, r0, same, vid, t, lat, lon, sog, gear_of(gi) AS gear FROM (
                SELECT row, vid, t, lat, lon, sog, gi, lag(t) OVER w AS t0, lag(row) OVER w AS r0,
                       (lag(lat) OVER w IS NOT DISTINCT FROM lat AND lag(lon) OVER w IS NOT DISTINCT FROM lon
                        AND lag(sog) OVER w IS NOT DISTINCT FROM sog) AS same
                FROM {pings}
                WINDOW w AS (PARTITION BY vid ORDER BY t, row))
            WHERE t = t0
        """)

    @staticmethod
    def _empty_dups(con: duckdb.DuckDBPyConnection) -> None:
        con.execute("CREATE OR REPLACE TABLE dups (row BIGINT, r0 BIGINT, same BOOLEAN, vid INTEGER, "
                    "t TIMESTAMP, lat DOUBLE, lon DOUBLE, sog DOUBLE, gear VARCHAR)")

    def _track_buckets(self, con: duckdb.DuckDBPyConnection, n_rows: int) -> tuple[pd.DataFrame, int, int]:
        """The track, bucket of whole vessels by bucket (bounded memory); returns the fishing
        cells (as :meth:`_aggregate`), the fishing pings and the derived speeds.

        Each bucket (about :data:`PINGS_PER_BUCKET` pings: the vessels whose number ``vid``
        has one remainder) is read from ``p`` with its vessel numbers and gears, located in
        the grid and the domain (numpy, :func:`harmonize.adapters.fishing.locate`) and its
        track made (:meth:`_track`); the rows something downstream reads are appended to the
        tables ``spikes``, ``track_edges``, ``dups`` and ``cell_parts`` (fishing hours per cell
        of the bucket's vessels). A vessel lies in one bucket, so the distinct vessels of a
        cell are the sum of the buckets'. The window sorts of one bucket fit in memory: a file
        of 1e7 pings in one sort filled the 1 GB memory limit and spilled. Registers
        ``outside``: the rows located outside the domain.
        """
        buckets = max(1, -(-n_rows // PINGS_PER_BUCKET))
        self._empty_dups(con)
        # every step of the track orders its rows by vessel, time and row: the order in which
        # a bucket's pings arrive does not matter, and need not be kept
        con.execute("SET preserve_insertion_order = false")
        try:
            return self._track_each_bucket(con, buckets)
        finally:
            con.execute("SET preserve_insertion_order = true")

    def _track_each_bucket(self, con: duckdb.DuckDBPyConnection, buckets: int) -> tuple[pd.DataFrame, int, int]:
        season, season_year = season_sql("t", self.study.seasons, self.study.timezone)
        outside: list[np.ndarray] = []
        fishing = derived = 0
        for b in range(buckets):
            mine = f" AND vm.vid % {buckets} = {b}" if buckets > 1 else ""
            pings = con.sql(f"""
                SELECT p.row, vm.vid, p.t, p.lat, p.lon, p.sog, g.gi FROM p
                JOIN vmap vm ON p.v_raw = vm.v_raw JOIN gmap g ON p.gear_raw = g.gear_raw
                WHERE p.reason IS NULL AND g.gi IS NOT NULL{mine}""").to_arrow_table()
            lon = pings["lon"].to_numpy().astype(float)
            lat = pings["lat"].to_numpy().astype(float)
            ok = np.isfinite(lon) & np.isfinite(lat) & (np.abs(lat) <= 90)
            code = np.full(lon.shape[0], OUTSIDE, dtype=np.int64)
            if ok.any():
                code[ok] = locate(self.study, self.grid, lon[ok], lat[ok])
            out = ok & (code == OUTSIDE)
            if out.any():
                outside.append(pings["row"].to_numpy()[out].astype(np.int64))
            inside = ok & (code != OUTSIDE)
            con.register("bucket_pings", pings.filter(pa.array(inside)).append_column("code", pa.array(code[inside])))
            del pings, lon, lat, code
            self._track(con, "bucket_pings")
            con.unregister("bucket_pings")
            first = b == 0
            self._append(con, "spikes", first, "SELECT row, vid, t, lat, lon, sog, gear_of(gi) AS gear, r_p1, sp_in, "
                         "r_n1, sp_out FROM track WHERE spike")
            self._append(con, "track_edges", first,
                         "SELECT row, vid, t, lat, lon, sog, smin_of(gi) AS smin, smax_of(gi) AS smax, code, "
                         "gear_of(gi) AS gear, layer_of(gi) AS layer, owned, "
                         "CASE WHEN fishing AND NOT spike AND hours > 0 THEN hours ELSE 0 END AS file_hours "
                         "FROM track WHERE edge")
            # the vessels and the speed_derived flag of a part are those of its interior pings:
            # the store's view adds those of the owned edge pings, joined across the files of
            # the source (harmonize.parts)
            self._append(con, "cell_parts", first, f"""
                SELECT code, {season_year} AS season_year, {season} AS season, gear_of(gi) AS gear,
                       layer_of(gi) AS depth_layer, sum(hours) AS hours, count(DISTINCT vid) AS n_vessels,
                       count(*) AS n_values,
                       coalesce(bool_or(sog IS NULL) FILTER (WHERE NOT owned), false) AS speed_derived,
                       coalesce(list(DISTINCT vessel) FILTER (WHERE NOT owned), []::VARCHAR[]) AS vessel_ids
                FROM track LEFT JOIN (SELECT DISTINCT vid, vessel FROM vmap) USING (vid)
                WHERE fishing AND NOT spike AND hours > 0
                GROUP BY ALL""")
            f, d = con.execute("SELECT count(*) FILTER (WHERE fishing), count(*) FILTER (WHERE sog IS NULL) "
                               "FROM track WHERE NOT spike").fetchall()[0]
            fishing, derived = fishing + f, derived + d
            con.execute("DROP TABLE track")
        rows = np.concatenate(outside) if outside else np.zeros(0, np.int64)
        self.n_outside = int(rows.size)
        con.register("outside", pa.table({"row": pa.array(rows, pa.int64())}))
        return self._aggregate(con), fishing, derived

    @staticmethod
    def _append(con: duckdb.DuckDBPyConnection, table: str, first: bool, select: str) -> None:
        """Create ``table`` from ``select`` (``first``), else append its rows."""
        con.execute(f"CREATE TABLE {table} AS {select}" if first else f"INSERT INTO {table} {select}")

    def _track(self, con: duckdb.DuckDBPyConnection, pings: str) -> None:
        """Table ``track`` of the accepted pings of whole vessels in ``pings`` (harmonize.tracks:
        neighbours, position jumps, derived speed, fishing class, hours, and whether a ping
        lies at an edge of its vessel's part of this file); their duplicates appended to ``dups``.

        Pings in any order are sorted per vessel by time (the track's windows order by vessel,
        time and row): an ordinary AIS export interleaves vessels and repeats blocks, and a ping
        is not wrong for arriving out of order. A bad clock shows as an impossible jump.
        Duplicates (the same vessel and time as an earlier row) are found by the track's own
        sort: a ping whose previous ping on the track has its time. Most files have none, and
        then the one ordered pass is all; otherwise they are taken out and the track made again.
        """
        con.execute(self._track_sql(pings))
        if con.execute("SELECT count(*) FROM track WHERE dup").fetchall()[0][0]:
            self._duplicates(con, pings)
            con.execute(self._track_sql(f"(SELECT * FROM {pings} ANTI JOIN (SELECT row FROM dups) USING (row))"))

    def _track_sql(self, pings: str) -> str:
        """The statement making table ``track`` from a relation of accepted pings: the rows
        that the fishing cells, the counts, the edges and the quarantine read (fishing pings,
        derived speeds, position jumps, edges) and those that repeat an earlier ping (``dup``)."""
        s = self.settings
        # the sorts carry the gear's number, not its names and window
        track = track_sql(f"(SELECT row, vid, code, gi, sog, t, lat, lon FROM {pings})",
                          "vid", "t, row", repr(s.max_speed_kn), repr(s.max_gap_h), "smin_of(gi)", "smax_of(gi)")
        return f"""
            CREATE OR REPLACE TABLE track AS
            SELECT row, vid, t, lat, lon, code, gi, sog, spike, r_p1, r_n1,
                   s_in AS sp_in, s_out AS sp_out, hours, fishing, owned, edge, dup
            FROM (SELECT *, coalesce(t_p1 = t, false) AS dup FROM ({track}))
            WHERE fishing OR spike OR edge OR sog IS NULL OR dup
        """

    def _track_on_dask(self, con: duckdb.DuckDBPyConnection, scheduler: str | None) -> tuple[pd.DataFrame, int, int]:
        """The track and fishing-cell steps on Dask (harmonize.engines.dask_engine).

        The accepted pings go to parquet in buckets of whole vessels, under
        ``HARMONIZE_DASK_SCRATCH`` (a folder the workers can read) or a temporary folder; the
        position jumps come back as the table ``track`` the quarantine step reads.
        Returns the cells (as :meth:`_aggregate`), the fishing pings and the derived speeds.
        """
        from harmonize.engines import scratch_parent
        from harmonize.engines.dask_engine import CELL_KEYS, fishing_hours

        scratch = Path(tempfile.mkdtemp(prefix="harmonize-pings-", dir=scratch_parent()))
        try:
            n, keys = con.execute("SELECT count(*), count(DISTINCT (vid, t)) FROM accepted").fetchall()[0]
            self._empty_dups(con)
            if n != keys:  # no duplicates: a cheap count (a hash aggregate, no sort) says so
                self._duplicates(con, "accepted")
            buckets = max(2, min(512, n // 1_000_000))  # about a million pings per Dask task
            target = sql_text(str(scratch / "pings"))
            con.execute(f"""
                COPY (SELECT row, vid, t, lat, lon, sog, gear, layer, smin, smax, code, vid % {buckets} AS bucket
                      FROM accepted ANTI JOIN dups USING (row))
                TO {target} (FORMAT parquet, PARTITION_BY (bucket))""")
            folders = sorted(p for p in (scratch / "pings").glob("bucket=*") if p.is_dir())
            files = [sorted(str(f) for f in d.glob("*.parquet")) for d in folders]
            names = [self.study.month_to_season[m] for m in range(1, 13)]
            offsets = season_year_offsets(self.study.seasons)[1:].tolist()
            result = fishing_hours(files, self.settings.max_speed_kn, self.settings.max_gap_h, names, offsets,
                                   scheduler, timezone=self.study.timezone)
        finally:
            shutil.rmtree(scratch, ignore_errors=True)
        con.register("dask_spikes", result.spikes)
        con.execute("CREATE TEMP TABLE spikes AS SELECT s.row, a.vid, a.t, a.lat, a.lon, a.sog, a.gear, s.r_p1, "
                    "s.sp_in, s.r_n1, s.sp_out FROM dask_spikes s JOIN accepted a USING (row)")
        con.unregister("dask_spikes")
        if result.edges is not None and len(result.edges):
            con.register("dask_edges", result.edges)
            con.execute("CREATE TEMP TABLE track_edges AS SELECT * FROM dask_edges")
            con.unregister("dask_edges")
        else:
            con.execute("CREATE TEMP TABLE track_edges AS SELECT row, vid, t, lat, lon, sog, smin, smax, code, gear, "
                        "layer, true AS owned, 0.0 AS file_hours FROM accepted LIMIT 0")
        cells = result.cells
        if result.vessels is not None and len(cells):
            # the vessels behind each cell (pseudonyms), so n_vessels merges across files
            con.register("dask_cells", cells)
            con.register("dask_vessels", result.vessels)
            keys = ", ".join(CELL_KEYS)
            cells = con.sql(f"""
                SELECT c.*, coalesce(v.vessel_ids, []) AS vessel_ids FROM dask_cells c LEFT JOIN (
                    SELECT {keys}, list_sort(list(DISTINCT m.vessel)) AS vessel_ids FROM dask_vessels d
                    JOIN (SELECT DISTINCT vid, vessel FROM vmap) m USING (vid) GROUP BY ALL) v USING ({keys})
                ORDER BY {keys}""").to_arrow_table().to_pandas()
            con.unregister("dask_cells")
            con.unregister("dask_vessels")
        ix, iy = decode_cells(cells["code"].to_numpy(np.int64))
        return cells.assign(ix=ix, iy=iy).drop(columns="code"), result.n_fishing, result.n_derived

    def _read_fast(self, con: duckdb.DuckDBPyConnection) -> bool:
        """Table ``p`` by DuckDB's CSV reader; False (and no table) when the line reader must read the file.

        DuckDB numbers rejected lines physically but good rows by record, and reads lines
        made only of delimiters as rows: any rejected line, any such row, a cell starting
        with a quote that was not taken as quoting, or a read error sends the file to the
        line reader, which numbers rows as every other reader does.
        """
        if self.path.suffix.lower() == ".parquet":
            src = _csv_source(self.path, self.profile)[:-1] + ", file_row_number = true)"
            sql = self._stage1_sql(src, "file_row_number + 1", "CAST(NULL AS INTEGER) AS nf, false AS odd")
            self._keep_typed(con, sql)
            return True
        try:
            probe = con.sql(f"SELECT * FROM {_csv_source(self.path, self.profile, self.delimiter, rejects=False)} LIMIT 0")
            names = list(probe.columns)
        except duckdb.Error:
            return False
        if [c.strip().lstrip("\ufeff") for c in names] != self.columns:
            return False  # DuckDB read another header (renamed or split columns)
        self.colref = {c: sql_ident(d) for c, d in zip(self.columns, names, strict=True)}
        # Cheap tests first (string comparisons): a cell whose first byte is a quote; a first
        # cell that is empty or starts with whitespace (every whitespace byte sorts before '!'),
        # and only then the costly test that every cell is blank.
        blank = " AND ".join(f"coalesce(trim({sql_ident(d)}, {sql_text(_BLANK_CHARS)}), '') = ''" for d in names)
        quoted = " OR ".join(f"({sql_ident(d)} >= '\"' AND {sql_ident(d)} < '#')" for d in names)
        first = sql_ident(names[0])
        odd = f"CASE WHEN {quoted} THEN true WHEN {first} IS NULL OR {first} < '!' THEN {blank} ELSE false END"
        sql = self._stage1_sql(_csv_source(self.path, self.profile, self.delimiter), "row_number() OVER ()",
                               f"CAST(NULL AS INTEGER) AS nf, {odd} AS odd")
        try:
            self._keep_typed(con, sql)
        except duckdb.Error:
            return False
        rejected = con.execute("SELECT count(*) FROM ping_rejects").fetchall()[0][0]
        if rejected or con.execute("SELECT count(*) FROM p WHERE odd").fetchall()[0][0]:
            con.execute("DROP VIEW p")
            return False
        return True

    def _read_lines(self, con: duckdb.DuckDBPyConnection, target: Path) -> None:
        """Table ``p`` from the line reader, streamed block by block through a parquet file.

        Columns are stored by position (``c0``, ``c1`` ...) with the data row number and,
        for a row that cannot be split into the header's columns, its number of fields
        (its cells are left null: the row is quarantined with its text withheld).
        """
        with LineReader(self.path, self.profile) as reader:
            if reader.header != self.columns:
                self.columns = reader.header
                self.found = self._resolve(reader.header)
            names = [f"c{i}" for i in range(reader.width)]
            schema = pa.schema([("row", pa.int64()), ("nf", pa.int32())] + [(n, pa.string()) for n in names])
            with pq.ParquetWriter(str(target), schema, compression="zstd") as writer:
                for block in reader.blocks(FALLBACK_BLOCK_ROWS):
                    n = len(block.rows)
                    bad = np.zeros(n, dtype=bool)
                    nf = np.zeros(n, dtype=np.int32)
                    if block.malformed:
                        at = np.array([m[0] for m in block.malformed], dtype=np.int64) - block.first_row
                        bad[at] = True
                        nf[at] = [m[2] for m in block.malformed]
                    cells = [pa.array(col, pa.string(), mask=bad) for col in zip(*block.rows, strict=True)]
                    rows = pa.array(np.arange(block.first_row, block.first_row + n, dtype=np.int64))
                    writer.write_table(pa.Table.from_arrays([rows, pa.array(nf, mask=~bad), *cells], schema=schema))
        # the first of repeated (empty) names wins, as in the header lookup
        self.colref = {}
        for i, c in enumerate(self.columns):
            self.colref.setdefault(c, names[i])
        sql = self._stage1_sql(f"read_parquet({sql_text(str(target))})", "row", "nf, false AS odd")
        self._keep_typed(con, sql)

    def _keep_typed(self, con: duckdb.DuckDBPyConnection, sql: str) -> None:
        """The typed pings as the view ``p``, over a parquet file written once in the temporary
        folder: compressed and outside DuckDB's memory limit (an in-memory table of 1e7 typed
        pings filled the limit by itself and was spilled and read back uncompressed)."""
        target = sql_text(str(self.tmp / "typed.parquet"))
        # on one thread: the row numbers (a window over the file's order) make this statement
        # run on one thread anyway, and a second one only buffers batches to write them in
        # order (1e7 pings, 2 cores: the same time, 370 MB peak instead of 700 MB)
        threads = con.execute("SELECT current_setting('threads')").fetchall()[0][0]
        con.execute("SET threads = 1")
        try:
            con.execute(f"COPY ({sql}) TO {target} (FORMAT parquet)")
        finally:
            con.execute(f"SET threads = {int(threads)}")
        con.execute(f"CREATE OR REPLACE VIEW p AS SELECT * FROM read_parquet({target})")

    def _locate(self, con: duckdb.DuckDBPyConnection) -> pa.Table:
        """Cell code per row of ``p`` (in table order; the Dask path): OUTSIDE outside the domain,
        null without a position.

        Also registers ``outside``: the rows of the positions outside the domain.
        """
        parts, outside = [], []
        for batch in con.sql("SELECT row, lon, lat FROM p").to_arrow_reader(1_000_000):
            lon = batch.column(1).to_numpy(zero_copy_only=False).astype(float)
            lat = batch.column(2).to_numpy(zero_copy_only=False).astype(float)
            ok = np.isfinite(lon) & np.isfinite(lat) & (np.abs(lat) <= 90)
            code = np.full(lon.shape[0], OUTSIDE, dtype=np.int64)
            if ok.any():
                code[ok] = locate(self.study, self.grid, lon[ok], lat[ok])
            parts.append(pa.array(code, mask=~ok))
            out = ok & (code == OUTSIDE)
            if out.any():
                outside.append(batch.column(0).to_numpy(zero_copy_only=False)[out].astype(np.int64))
        rows = np.concatenate(outside) if outside else np.zeros(0, np.int64)
        self.n_outside = int(rows.size)
        con.register("outside", pa.table({"row": pa.array(rows, pa.int64())}))
        return pa.table({"code": pa.chunked_array(parts, pa.int64())})

    def _aggregate(self, con: duckdb.DuckDBPyConnection) -> pd.DataFrame:
        """Fishing hours per cell of the file's pings, from the buckets' parts (table
        ``cell_parts``: every vessel lies in one bucket, so vessels and counts add up)."""
        df = con.sql("""
            SELECT code, season_year, season, gear, depth_layer, sum(hours) AS hours,
                   CAST(sum(n_vessels) AS BIGINT) AS n_vessels, CAST(sum(n_values) AS BIGINT) AS n_values,
                   bool_or(speed_derived) AS speed_derived, list_sort(flatten(list(vessel_ids))) AS vessel_ids
            FROM cell_parts GROUP BY ALL ORDER BY code, season_year, season, gear, depth_layer
        """).to_arrow_table().to_pandas()
        ix, iy = decode_cells(df["code"].to_numpy(np.int64))
        return df.assign(ix=ix, iy=iy).drop(columns="code")

    def _edges(self, con: duckdb.DuckDBPyConnection) -> tuple[pd.DataFrame, pd.DataFrame]:
        """The pings at the edges of each vessel's part of the file, and the cell-periods the
        owned ones lie in (0 hours: the template of their part in the store).

        Reads the table ``track_edges`` (row, vid, t, lat, lon, sog, smin, smax, code, gear,
        layer, owned, file_hours). Returns (edges, cells): edges has the columns the store
        keeps (harmonize.parts.EDGE_COLUMNS but the ids, ``row`` for source_row).
        """
        season, season_year = season_sql("t", self.study.seasons, self.study.timezone)
        edges = con.sql(f"""
            SELECT m.vessel, e.t, e.lat, e.lon, e.sog, e.smin, e.smax, e.row, e.owned, e.file_hours, e.code,
                   e.gear, e.layer AS depth_layer, {season_year} AS season_year, {season} AS season
            FROM track_edges e JOIN (SELECT DISTINCT vid, vessel FROM vmap) m USING (vid)
            ORDER BY m.vessel, e.t, e.row
        """).to_arrow_table().to_pandas()
        ix, iy = decode_cells(edges["code"].to_numpy(np.int64))
        edges["event_id"] = effort_event_ids(edges["gear"], ix, iy, edges["season_year"], edges["season"],
                                             edges["depth_layer"])
        keys = ["ix", "iy", "season_year", "season", "gear", "depth_layer"]
        owned = edges["owned"].to_numpy(bool)
        cells = (edges[owned].assign(ix=ix[owned], iy=iy[owned])[keys].drop_duplicates()
                 .sort_values(keys, kind="stable").reset_index(drop=True))
        cells = cells.assign(hours=0.0, n_vessels=0, n_values=0, speed_derived=False, edge=True,
                             vessel_ids=[[] for _ in range(len(cells))])
        edges = edges.assign(max_speed_kn=self.settings.max_speed_kn, max_gap_h=self.settings.max_gap_h)
        cols = ["vessel", "t", "lat", "lon", "sog", "smin", "smax", "max_speed_kn", "max_gap_h", "row", "owned",
                "file_hours", "event_id"]
        return edges[cols].reset_index(drop=True), cells

    def _quarantine(self, con: duckdb.DuckDBPyConnection) -> tuple[pd.DataFrame, pd.DataFrame]:
        """Rejected pings one by one (up to the limit), the rest counted per reason."""
        s = self.settings
        limit = s.quarantine_rows
        iso = "'%Y-%m-%dT%H:%M:%SZ'"
        con.execute(f"""
            CREATE TEMP VIEW rejected AS
            -- one reason per ping (a ping can break several rules): the first in this order
            SELECT row, arg_min(reason, prio) AS reason, arg_min(message, prio) AS message FROM (
            SELECT row, reason, message, 1 AS prio FROM rej
            UNION ALL
            SELECT row, '{ReasonCode.DUPLICATE_RECORD}',
                   CASE WHEN same THEN printf('exact duplicate of row %d (same vessel, time and position)', r0)
                        ELSE printf('same vessel and time as row %d but another position or speed; only the '
                                    'first is kept', r0) END, 3 FROM dups
            UNION ALL
            SELECT row, '{ReasonCode.IMPLAUSIBLE_SPEED}',
                   CASE WHEN r_p1 IS NULL THEN
                        printf('position jump: the first ping of the vessel in this file, leaving it for row %d takes '
                               '%.1f knots, above the %s-knot limit, and the track goes on from there at a plausible '
                               'speed; a bad position fix?', r_n1, sp_out, '{s.max_speed_kn:g}')
                        WHEN r_n1 IS NULL THEN
                        printf('position jump: the last ping of the vessel in this file, reaching it from row %d takes '
                               '%.1f knots, above the %s-knot limit, and the track before it goes at a plausible '
                               'speed; a bad position fix?', r_p1, sp_in, '{s.max_speed_kn:g}')
                        ELSE
                        printf('position jump: reaching this ping from row %d takes %.1f knots and leaving it for row %d '
                               '%.1f knots, above the %s-knot limit; a bad position fix?',
                               r_p1, sp_in, r_n1, sp_out, '{s.max_speed_kn:g}') END, 4 FROM spikes
            ) GROUP BY row
        """)
        vcol = sql_text(self.found.get("vessel_id", "vessel_id"))
        typed = [(f, e) for f, e in (("time", f"strftime(d.t, {iso})"), ("lat", "d.lat"), ("lon", "d.lon"),
                                     ("speed_kn", "d.sog"), ("gear", "d.gear")) if f in self.found]
        typed_raw = "json_object(" + ", ".join(f"{sql_text(self.found[f])}, {e}" for f, e in typed) + ")"
        name = self.path.name
        rows = con.sql(f"""
            SELECT {sql_text(name)} AS source_file, r.row AS source_row, r.reason AS reason_code, r.message,
                   CAST(json_merge_patch(json_object({vcol}, d.vessel), coalesce(d.raw, {typed_raw})) AS VARCHAR) AS raw
            FROM (SELECT * FROM rejected ORDER BY row LIMIT {int(limit)}) r JOIN (
                -- what is shown of each rejected ping: its hashed vessel and typed fields
                SELECT row, vessel, t, lat, lon, sog, gear, raw FROM rej
                UNION ALL
                SELECT x.row, m.vessel, x.t, x.lat, x.lon, x.sog, x.gear, NULL FROM (
                    SELECT row, vid, t, lat, lon, sog, gear FROM dups
                    UNION ALL SELECT row, vid, t, lat, lon, sog, gear FROM spikes) x
                LEFT JOIN (SELECT DISTINCT vid, vessel FROM vmap) m USING (vid)) d USING (row)
            ORDER BY r.row
        """).to_arrow_table().to_pandas()
        rows["message"] = rows["message"].map(one_line)  # at most `limit` rows
        keep = rows.iloc[:limit].reset_index(drop=True)
        keep["n_problems"] = 1
        counts = dict(con.execute("SELECT reason, count(*) FROM rejected GROUP BY reason").fetchall())
        listed = keep["reason_code"].value_counts().to_dict()
        masked = [
            {"source_file": name, "reason_code": code, "n_values": int(n - listed.get(code, 0)),
             "message": f"{n - listed.get(code, 0):,} more pings rejected as {code}, beyond the first "
                        f"{limit:,} rejected pings listed one by one; raise [fishing] quarantine_rows to list them"}
            for code, n in sorted(counts.items()) if n - listed.get(code, 0) > 0
        ]
        masked_df = pd.DataFrame(masked, columns=["source_file", "reason_code", "n_values", "message"])
        masked_df["n_values"] = masked_df["n_values"].astype("int64")
        return keep, masked_df


__all__ = ["DAYFIRST_FORMATS", "PingReader", "file_columns"]
