"""The disclosure gate holds in every file every output writes (harmonize.disclosure).

A study is built for it: the export test store (tests/export_store.py) plus

- ``secret_fleet`` (effort): S1 rests on 2 vessels (withheld) with numbers found nowhere else
  (123.456789 h, 98765 pings) in a cell and month (March 2020) that nothing else uses; S2 rests
  on 4 vessels (public);
- ``rare_survey`` (trawl): R1 caught a sensitive taxon at a position with distinctive digits.

Every output is written (long, wide and grid as CSV and parquet, GeoPackage, Darwin Core
Archive, colocate/twins/quarantine CSV, audit JSON and HTML) and every file is read back,
decoded (parquet values and footer, every GeoPackage table and geometry, every archive
member). The rules checked are written here independently of the code: rule of three
(common practice of fisheries data agencies) and rounding to 0.1 degree with the cell
withheld (Chapman 2020, Current Best Practices for Generalizing Sensitive Species
Occurrence Data, GBIF).
"""

from __future__ import annotations

import io
import json
import re
import sqlite3
import subprocess
import sys
import zipfile
from fractions import Fraction
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pyogrio
import pytest
import shapely
from examples import scaled
from export_store import ExportStore, export_study
from factories import store_frames
from hypothesis import given, settings
from hypothesis import strategies as st

from harmonize.disclosure import AGGREGATED_FLAG, Disclosure, generalise_frame, public_quarantine
from harmonize.errors import ConfigError
from harmonize.export.dwca import read_archive_table
from harmonize.export.long import read_long
from harmonize.export.run import export
from harmonize.export.selection import ExportFilters
from harmonize.store import Store
from harmonize.study import Study, load_study
from harmonize.tagging import Grid

S1_HOURS, S1_PINGS = 123.456789, 98765
R1_POS = (42.91234567, -150.28765432)          # lat, lon
S1_POINT = (-149.5, 42.5)                       # lon, lat of a point in S1's cell
S2_POINT = (-148.0, 44.5)


def _cell(study: Study, lon: float, lat: float) -> tuple[str, float, float]:
    grid = Grid(study.crs, study.cell_size_km)
    ix, iy = grid.indices(np.array([lon]), np.array([lat]))
    clon, clat = grid.cell_centres_lonlat(ix, iy)
    return f"x{ix[0]}_y{iy[0]}", float(np.asarray(clon)[0]), float(np.asarray(clat)[0])


def _add_sources(study: Study) -> dict[str, object]:
    s1_cell, s1_lon, s1_lat = _cell(study, *S1_POINT)
    s2_cell, s2_lon, s2_lat = _cell(study, *S2_POINT)
    s1_id, s2_id = f"otter/{s1_cell}/2020-spring/surface", f"otter/{s2_cell}/2020-summer/surface"
    ev = pd.DataFrame({
        "event_id": [s1_id, s2_id], "event_start": ["2020-03-01", "2020-08-01"],
        "event_end": ["2020-03-31 23:59", "2020-08-31 23:59"], "lat": [s1_lat, s2_lat], "lon": [s1_lon, s2_lon],
        "cell_id": [s1_cell, s2_cell], "depth_layer": "surface", "effort": np.nan, "effort_unit": None})
    va = pd.DataFrame({"event_id": [s1_id, s2_id], "variable": "fishing_hours", "variable_kind": "effort",
                       "quantity": "measurement", "unit": "h", "no_effort": True,
                       "value": [S1_HOURS, 50.0], "n_vessels": [2, 4], "n_values": [S1_PINGS, 60]})
    store_frames(study, ev, va, source_id="secret_fleet", kind="effort", provider_type="industry")
    r1_cell, _, _ = _cell(study, R1_POS[1], R1_POS[0])
    ev = pd.DataFrame({"event_id": ["R1"], "event_start": ["2020-06-20 10:00"], "event_end": ["2020-06-20 10:30"],
                       "lat": [R1_POS[0]], "lon": [R1_POS[1]], "effort": [0.0713], "effort_unit": "km2",
                       "depth_layer": "near_bottom", "depth_min_m": [80.0], "depth_max_m": [82.0]})
    va = pd.DataFrame({"event_id": ["R1", "R1"], "variable": ["Calverion rubrum", "Ostravix keldensis"],
                       "value": [1.0, 7.0]})
    store_frames(study, ev, va, source_id="rare_survey", kind="trawl", protocol="keldmar_bottom_trawl")
    return {"s1_id": s1_id, "s1_cell": s1_cell, "s1_lon": s1_lon, "s1_lat": s1_lat, "s2_id": s2_id,
            "r1_cell": r1_cell}


@pytest.fixture(scope="module")
def built(tmp_path_factory: pytest.TempPathFactory) -> tuple[Study, ExportStore, dict[str, object]]:
    study, store = export_study(tmp_path_factory.mktemp("disclosure") / "study")
    facts = _add_sources(study)
    return study, store, facts


def _cli(study_dir: Path, *args: str) -> subprocess.CompletedProcess[str]:
    code = "from harmonize.cli.app import main; main()"
    return subprocess.run([sys.executable, "-c", code, "--study", str(study_dir), *args],
                          capture_output=True, text=True, timeout=300)


def write_every_output(study: Study, out: Path, **rules: object) -> list[Path]:
    """Every output of the tool, into ``out``; returns every file written."""
    out.mkdir(parents=True, exist_ok=True)
    for fmt, names in (("long", ("long.csv", "long.parquet")), ("wide", ("wide.csv", "wide.parquet")),
                       ("grid", ("grid.csv", "grid.parquet")), ("gpkg", ("layers.gpkg",)),
                       ("dwca", ("archive.zip",))):
        for name in names:
            export(study, fmt, out / name, **rules)
    flags = ["--precise"] if rules.get("precise") else []
    for args in (("colocate", "sea_surface_temperature", "--csv", str(out / "colocate.csv"), *flags),
                 ("twins", "--csv", str(out / "twins.csv"), *flags),
                 ("quarantine", "--csv", str(out / "quarantine.csv"), *flags),
                 ("audit", "--json", str(out / "audit.json"), "--html", str(out / "audit.html"))):
        done = _cli(study.root, *args)
        assert done.returncode in (0, 1), done.stderr
    return sorted(p for p in out.rglob("*") if p.is_file())


def decoded_text(path: Path) -> str:
    """Everything a reader can get out of a file, as text: raw bytes and decoded contents."""
    data = path.read_bytes()
    parts = [data.decode("utf-8", errors="replace")]
    suffix = path.suffix.lower()
    if suffix == ".parquet":
        with duckdb.connect() as con:
            frame = con.execute(f"SELECT * FROM read_parquet('{path}')").df()
        parts.append(frame.astype(str).to_csv(index=False))
        parts.append(json.dumps({k.decode(): v.decode(errors="replace")
                                 for k, v in (__import__("pyarrow.parquet").parquet.read_metadata(path).metadata
                                              or {}).items()}))
    elif suffix == ".gpkg":
        with sqlite3.connect(path) as con:
            tables = [r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type = 'table'")]
            for table in tables:
                parts.append(repr(con.execute(f'SELECT * FROM "{table}"').fetchall()))
        for layer, geometry_type in pyogrio.list_layers(path):
            frame = pyogrio.read_dataframe(path, layer=layer)
            if geometry_type is not None:
                parts.append("\n".join(shapely.to_wkt(frame.geometry.to_numpy(), rounding_precision=-1)))
            parts.append(frame.drop(columns="geometry", errors="ignore").astype(str).to_csv(index=False))
    elif suffix == ".zip":
        with zipfile.ZipFile(path) as zf:
            for name in zf.namelist():
                parts.append(zf.read(name).decode("utf-8", errors="replace"))
    return "\n".join(parts)


def _truncated(x: float, decimals: int = 4) -> str:
    """The leading digits any printing of ``x`` with more decimals starts with."""
    text = f"{x:.10f}"
    return text[: text.index(".") + decimals + 1]


def _needles(facts: dict[str, object]) -> dict[str, re.Pattern[str]]:
    """What must appear in no public file: S1's id, cell, centre, month and numbers; R1's exact
    position and cell."""
    def word(text: str) -> re.Pattern[str]:
        return re.compile(r"(?<![\w.-])" + re.escape(text) + r"(?![\w])")

    return {
        "S1 event id": word(str(facts["s1_id"])),
        "S1 cell id": word(str(facts["s1_cell"])),
        "S1 hours": re.compile(re.escape("123.4567")),
        "S1 pings": word(str(S1_PINGS)),
        "S1 latitude": re.compile(re.escape(_truncated(float(facts["s1_lat"])))),   # type: ignore[arg-type]
        "S1 longitude": re.compile(re.escape(_truncated(float(facts["s1_lon"])))),  # type: ignore[arg-type]
        "S1 month": re.compile(r"2020-03|202003"),
        "R1 exact latitude": re.compile(re.escape(_truncated(R1_POS[0]))),
        "R1 exact longitude": re.compile(re.escape(_truncated(R1_POS[1]))),
        "R1 cell id": word(str(facts["r1_cell"])),
    }


def _leaks(files: list[Path], facts: dict[str, object]) -> dict[str, list[str]]:
    found: dict[str, list[str]] = {}
    needles = _needles(facts)
    for path in files:
        text = decoded_text(path)
        for label, pattern in needles.items():
            if pattern.search(text):
                found.setdefault(label, []).append(path.name)
    return found


@pytest.fixture(scope="module")
def public_files(built: tuple[Study, ExportStore, dict[str, object]],
                 tmp_path_factory: pytest.TempPathFactory) -> list[Path]:
    return write_every_output(built[0], tmp_path_factory.mktemp("public"))


@pytest.mark.subprocess
def test_every_file_of_every_output_withholds_what_it_must(
        built: tuple[Study, ExportStore, dict[str, object]], public_files: list[Path]) -> None:
    names = {p.name for p in public_files}
    assert {"long.csv", "long.csv-metadata.json", "long.parquet", "wide.csv", "wide.parquet", "grid.csv",
            "grid.parquet", "layers.gpkg", "archive.zip", "colocate.csv", "twins.csv", "quarantine.csv",
            "audit.json", "audit.html"} <= names
    assert _leaks(public_files, built[2]) == {}
    # ... while what is public is there: S2 (4 vessels) and R1 at its rounded position
    long = pd.read_parquet(next(p for p in public_files if p.name == "long.parquet"))
    assert built[2]["s2_id"] in set(long["event_id"])
    r1 = long[long["event_id"] == "R1"]
    assert (r1["lat"] == 42.9).all() and (r1["lon"] == -150.3).all() and r1["cell_id"].isna().all()
    assert r1["data_generalizations"].str.contains("0.1 degree").all()


@pytest.mark.subprocess
def test_the_scan_finds_what_precise_output_holds(
        built: tuple[Study, ExportStore, dict[str, object]], tmp_path: Path) -> None:
    # the scan can fail: precise (internal) outputs hold every needle
    files = write_every_output(built[0], tmp_path / "precise", precise=True)
    leaks = _leaks(files, built[2])
    assert set(leaks) == set(_needles(built[2]))
    meta = json.loads(next(p for p in files if p.name == "long.csv-metadata.json").read_text())
    assert meta["dc:provenance"]["confidentiality"]["precise"] is True
    assert any("internal use only" in n for n in meta["dc:provenance"]["notes"])


def _event_positions(public_files: list[Path]) -> dict[str, pd.DataFrame]:
    """(source_id, event_id, lat, lon, cell_id) of each output that places events."""
    by = {p.name: p for p in public_files}
    out: dict[str, pd.DataFrame] = {}
    for name in ("long.parquet", "wide.parquet"):
        out[name] = pd.read_parquet(by[name])[["source_id", "event_id", "lat", "lon", "cell_id"]]
    for name in ("long.csv", "wide.csv"):
        frame = pd.read_csv(by[name], dtype={"event_id": str, "cell_id": str})
        out[name] = frame[["source_id", "event_id", "lat", "lon", "cell_id"]]
    points = pyogrio.read_dataframe(by["layers.gpkg"], layer="samples")
    out["gpkg events"] = pd.DataFrame({"source_id": points["source_id"], "event_id": points["event_id"],
                                       "lat": points.geometry.y, "lon": points.geometry.x,
                                       "cell_id": points["cell_id"]})
    core = read_archive_table(by["archive.zip"], "event.txt")
    key = core["eventID"].str.split(":", n=1, expand=True)
    out["dwca event"] = pd.DataFrame({"source_id": key[0], "event_id": key[1],
                                      "lat": pd.to_numeric(core["decimalLatitude"]),
                                      "lon": pd.to_numeric(core["decimalLongitude"]),
                                      "cell_id": core["locationID"].replace("", None)})
    colo = pd.read_csv(by["colocate.csv"], dtype=str)
    out["colocate"] = colo.assign(lat=np.nan, lon=np.nan, cell_id=None)[["source_id", "event_id", "lat", "lon",
                                                                         "cell_id"]]
    return out


@pytest.mark.subprocess
def test_joining_any_two_outputs_recovers_nothing_withheld(
        built: tuple[Study, ExportStore, dict[str, object]], public_files: list[Path]) -> None:
    outputs = _event_positions(public_files)
    names = sorted(outputs)
    for i, a in enumerate(names):
        for b in names[i:]:
            joined = outputs[a].merge(outputs[b], on=["source_id", "event_id"], suffixes=("_a", "_b"))
            # the withheld cell-period is in no output, so no join can find it
            assert built[2]["s1_id"] not in set(joined["event_id"]), (a, b)
            # a sensitive event is generalised the same way in both: the join yields only the
            # rounded position and no cell
            r1 = joined[joined["event_id"] == "R1"]
            for side in ("a", "b"):
                lat, lon = r1[f"lat_{side}"].dropna(), r1[f"lon_{side}"].dropna()
                assert (lat == round(R1_POS[0], 1)).all() and (lon == round(R1_POS[1], 1)).all(), (a, b)
                assert r1[f"cell_id_{side}"].isna().all(), (a, b)


def test_a_filter_cannot_ungeneralise_an_event(built: tuple[Study, ExportStore, dict[str, object]]) -> None:
    # without the sensitive taxon's rows in the selection, R1 is still generalised
    rows = read_long(built[0], ExportFilters.build(variables="Ostravix keldensis", sources="rare_survey"))
    assert len(rows) == 1 and rows["lat"].iloc[0] == 42.9 and rows["cell_id"].isna().all()


@pytest.mark.subprocess
def test_counts_of_what_was_withheld_are_stated(built: tuple[Study, ExportStore, dict[str, object]],
                                                public_files: list[Path]) -> None:
    meta = json.loads(next(p for p in public_files if p.name == "long.csv-metadata.json").read_text())
    conf = meta["dc:provenance"]["confidentiality"]
    # E2 (2 vessels) and S1 (2 vessels); T1, V1, @V2 and R1 hold a sensitive taxon
    assert conf["effort_rows_withheld"] == 2 and conf["events_generalised"] == 4
    assert conf["precise"] is False
    assert any(n.startswith("2 fishing-effort rows") for n in meta["dc:provenance"]["notes"])


def test_fishing_aggregate_recovers_effort_without_disclosing(
        built: tuple[Study, ExportStore, dict[str, object]]) -> None:
    study = built[0]
    rules = Disclosure.for_study(study, fishing_aggregate=True)
    rows = read_long(study, ExportFilters.build(sources="fleet_effort"), disclosure=rules)
    # E1 (5 vessels, June) and E2 (2 vessels, July) share a cell: over the season year
    # 2020 they sum to 12 + 3 = 15 h resting on at least 5 vessels; E3 (3 vessels) alone
    assert sorted(rows["value"]) == [7.5, 15.0]
    assert (rows["n_vessels"] >= 3).all() and rows["cell_id"].isna().all()
    assert rows["row_flags"].map(lambda f: AGGREGATED_FLAG in list(f)).all()
    # every aggregated row, whatever the level, rests on at least three vessels
    every = read_long(study, ExportFilters.build(kinds="effort"), disclosure=rules)
    assert (every["n_vessels"] >= 3).all() and not every["event_id"].isin(["E1", "E2", "E3"]).any()


@pytest.mark.subprocess
def test_cli_precise_warns_and_records(built: tuple[Study, ExportStore, dict[str, object]], tmp_path: Path) -> None:
    out = tmp_path / "long.parquet"
    done = _cli(built[0].root, "export", "long", str(out), "--precise")
    assert done.returncode == 0, done.stderr
    assert "WARNING: precise output" in done.stderr
    from harmonize.export.metadata import read_export_metadata

    assert read_export_metadata(out)["confidentiality"]["precise"] is True
    plain = _cli(built[0].root, "export", "long", str(tmp_path / "plain.parquet"))
    assert "WARNING" not in plain.stderr
    assert read_export_metadata(tmp_path / "plain.parquet")["confidentiality"]["precise"] is False


@pytest.mark.subprocess
def test_twins_csv_generalises_both_records(tmp_path: Path) -> None:
    study, _ = export_study(tmp_path / "s")
    # V1's Aukelle minima (sensitive) record is the probable twin of T2's Lumbrena record
    with Store(study.store_dir).connect(read_only=False) as con:
        con.execute("""CREATE TABLE IF NOT EXISTS twins (record_id VARCHAR, ingest_id VARCHAR, twin_record_id VARCHAR,
                       twin_ingest_id VARCHAR, source_id VARCHAR, twin_source_id VARCHAR, variable VARCHAR,
                       distance_km DOUBLE, minutes DOUBLE)""")
        con.execute("""INSERT INTO twins SELECT a.record_id, a.ingest_id, b.record_id, b.ingest_id, a.source_id,
                              b.source_id, a.variable, 1.5, 20
                       FROM observations a, observations b
                       WHERE a.event_id = 'V1' AND a.variable = 'Aukelle minima'
                         AND b.event_id = 'T2' AND b.variable = 'Lumbrena pallida'""")
    done = _cli(study.root, "twins", "--csv", str(tmp_path / "twins.csv"))
    assert done.returncode == 0, done.stderr
    text = (tmp_path / "twins.csv").read_text()
    twins = pd.read_csv(tmp_path / "twins.csv")
    assert len(twins) == 1 and "43.1234" not in text and "-152.9876" not in text     # V1 exactly
    assert (twins["lat"].iloc[0], twins["lon"].iloc[0]) == (43.1, -153.0)
    assert twins["data_generalizations"].iloc[0].startswith("coordinates rounded")
    assert twins["twin_lat"].iloc[0] == 43.5 and twins["twin_data_generalizations"].isna().all()   # T2: public
    precise = _cli(study.root, "twins", "--csv", str(tmp_path / "precise.csv"), "--precise")
    assert "43.1234" in (tmp_path / "precise.csv").read_text() and "WARNING" in precise.stderr


# ------------------------------------------------------------------------- quarantine and config
def test_quarantine_rows_of_vessels_and_sensitive_taxa_are_withheld(
        built: tuple[Study, ExportStore, dict[str, object]]) -> None:
    rows = pd.DataFrame({
        "ingest_id": ["a", "b", "b"], "source_id": ["fleet", "survey", "survey"],
        "source_file": ["pings.csv", "catch.csv", "catch.csv"], "source_row": [4, 7, 8],
        "reason_code": ["implausible_speed", "bad_type", "bad_type"],
        "message": ["speed 31 knots at 61.2345, 3.4567", "count 'x' is not a number", "weight 'y' is not a number"],
        "raw": ['{"vessel": "vessel-ab", "lat": "61.2345"}', '{"taxon": "Red Calverion", "lat": "42.9123"}',
                '{"taxon": "Ostravix keldensis", "lat": "43.0"}']})
    rows = pd.concat([rows, rows.iloc[[2]].assign(source_row=9, raw='{"taxon": "Larivox pallens", "lat": "42.912340"}')],
                     ignore_index=True)
    kinds = pd.Series(["effort", "trawl", "trawl", "opportunistic"])
    # 42.91234: the latitude of an event where a sensitive taxon was recorded (another row of it)
    out = public_quarantine(rows, kinds, built[0], Disclosure.for_study(built[0]), [42.91234, -150.2])
    assert out["raw"].isna().tolist() == [True, True, False, True]       # the alias "red calverion" counts
    assert "61.2345" not in out.to_csv() and "42.9123" not in out.to_csv()
    assert out["source_row"].tolist() == [4, 7, 8, 9] and out["withheld"].notna().tolist() == [True, True, False, True]
    kept = public_quarantine(rows, kinds, built[0], Disclosure.for_study(built[0], precise=True), [42.91234])
    assert kept["raw"].tolist() == rows["raw"].tolist()


def _study_with(tmp_path: Path, section: str) -> Path:
    folder = tmp_path / "s"
    study, _ = export_study(folder)
    text = (folder / "study.toml").read_text()
    text = re.sub(r"\[confidentiality\][^\[]*", "", text) + "\n" + section
    (folder / "study.toml").write_text(text)
    return folder


@pytest.mark.subprocess
def test_an_unknown_confidentiality_key_is_an_error(tmp_path: Path) -> None:
    folder = _study_with(tmp_path, "[confidentiality]\nmin_vessel = 10\n")
    with pytest.raises(ConfigError, match=r"confidentiality\.min_vessel: unknown key; did you mean 'min_vessels'\? "
                                          r"Valid names in \[confidentiality\]: min_vessels, generalise_deg"):
        load_study(folder)
    done = _cli(folder, "status")
    assert done.returncode == 2 and "did you mean 'min_vessels'" in done.stderr + done.stdout


def test_the_study_sets_the_rounding(tmp_path: Path) -> None:
    folder = _study_with(tmp_path, "[confidentiality]\nmin_vessels = 3\ngeneralise_deg = 0.01\n")
    study = load_study(folder)
    assert study.generalise_deg == 0.01
    rows = read_long(study, ExportFilters.build(sources="volunteer_birds"))
    v2 = rows[rows["event_id"] == "@V2"]
    assert (v2["lat"] == 43.25).all() and (v2["lon"] == -152.86).all()     # 43.2468, -152.8642 to 0.01
    bad = _study_with(tmp_path / "b", "[confidentiality]\ngeneralise_deg = 5\n")
    with pytest.raises(ConfigError, match="at most 1 degree"):
        load_study(bad)


@pytest.mark.slow
@pytest.mark.subprocess
def test_demo_outputs_pass_the_scan_for_precise_positions(tmp_path_factory: pytest.TempPathFactory) -> None:
    """The demo's outputs hold no exact position of a sensitive event and no withheld fishing cell-period."""
    from harmonize.demo.build import build_demo

    run = build_demo(tmp_path_factory.mktemp("demo") / "demo")
    study = load_study(run.folder)
    out = run.folder / "outputs-scan"
    out.mkdir()
    # the demo's own outputs (audit JSON and HTML, the five exports) and the CSV verbs
    files = [p for p in run.outputs.values() if Path(p).is_file()]
    for args in (("colocate", "sea_surface_temperature", "--csv", str(out / "colocate.csv")),
                 ("twins", "--csv", str(out / "twins.csv")), ("quarantine", "--csv", str(out / "quarantine.csv"))):
        done = _cli(study.root, *args)
        assert done.returncode in (0, 1), done.stderr
    files += sorted(out.iterdir())
    files += [Path(str(p) + "-metadata.json") for p in files if Path(str(p) + "-metadata.json").is_file()]
    assert len(files) >= 10
    with Store(study.store_dir).connect() as con:
        rules = Disclosure.for_study(study)
        # cell-periods all of whose rows are withheld (a cell-period reported by several files or
        # sources, e.g. pings and logbooks, has one row each: a row of three vessels is public)
        withheld = con.execute(f"""SELECT event_id FROM observations WHERE source_kind = 'effort'
                                   GROUP BY event_id HAVING bool_and({rules.confidential_sql()})""").df()
        numbers = con.execute(f"""SELECT DISTINCT value FROM observations WHERE {rules.confidential_sql()}
                                  AND value NOT IN (SELECT value FROM observations
                                                    WHERE NOT {rules.confidential_sql()} AND value IS NOT NULL)""").df()
        sensitive = con.execute(f"""SELECT DISTINCT lat, lon FROM observations SEMI JOIN
                                    (SELECT source_id, event_id FROM observations
                                     WHERE {rules.sensitive_present_sql()}) USING (source_id, event_id)""").df()
        # a latitude or longitude that some other, public event also has (as its position or as
        # an end of its track: a haul may start where a sensitive one was) is no sign of a leak
        others = con.execute(f"""SELECT DISTINCT unnest([lat, track_start_lat, track_end_lat]) AS lat,
                                        unnest([lon, track_start_lon, track_end_lon]) AS lon
                                 FROM observations ANTI JOIN
                                 (SELECT source_id, event_id FROM observations
                                  WHERE {rules.sensitive_present_sql()}) USING (source_id, event_id)""").df()
    assert len(withheld) > 0 and len(sensitive) > 0
    # positions that rounding changes (a position already on the 0.1 degree grid is its own rounding)
    exact = sensitive[(sensitive["lat"].round(1) != sensitive["lat"]) | (sensitive["lon"].round(1) != sensitive["lon"])]
    ids = {str(e) for e in withheld["event_id"]}
    coords = ({repr(float(v)) for v in pd.concat([exact["lat"], exact["lon"]]).dropna().unique()}
              - {repr(float(v)) for v in pd.concat([others["lat"], others["lon"]]).dropna().unique()})
    # one pass per file: every token shaped like a fishing cell-period id, every decimal number
    # as printed (shortest repr, as DuckDB, pandas and the CSV writers print doubles)
    id_shape = re.compile(r"[^\s,\"'\t|:()\[\]]+/x-?\d+_y-?\d+/[^\s,\"'\t|()\[\]]+")
    number = re.compile(r"(?<![\d.])-?\d+\.\d+(?![\d.])")
    for path in files:
        text = decoded_text(path)
        found = ids & set(id_shape.findall(text))
        assert not found, (path.name, sorted(found)[:3])
        printed = set(number.findall(text))
        hit = coords & printed
        assert not hit, (path.name, sorted(hit)[:3])
        # fishing hours of withheld rows that no simple ratio (p/q, q <= 1000: a density, a mean)
        # gives by chance
        hours = {repr(float(v)) for v in numbers["value"]
                 if abs(float(Fraction(float(v)).limit_denominator(1000)) - float(v)) > 1e-9} & printed
        assert not hours, (path.name, sorted(hours)[:3])
    # twins and quarantine CSVs went through the gate
    twins = pd.read_csv(out / "twins.csv", dtype=str)
    if len(twins):
        assert "data_generalizations" in twins.columns
    assert io.StringIO((out / "quarantine.csv").read_text()).read().splitlines()[0].endswith("withheld")


@given(st.lists(st.floats(min_value=-180, max_value=180, allow_nan=False), min_size=1, max_size=20),
       st.sampled_from([1.0, 0.1, 0.01, 0.001]))
@settings(max_examples=scaled(50), deadline=None)
def test_sql_and_frame_rounding_agree(values: list[float], deg: float) -> None:
    """An event sits at the same rounded position in the exports (SQL) and the twins CSV (numpy)."""
    rules = Disclosure(generalise_deg=deg, sensitive_taxa=("x",))
    with duckdb.connect() as con:
        sql = con.execute("SELECT " + ", ".join(rules.rounded_sql(f"CAST({v!r} AS DOUBLE)") for v in values)
                          ).fetchall()[0]
    frame = pd.DataFrame({"source_id": "s", "event_id": "e", "lat": values, "lon": values})
    out = generalise_frame(frame, pd.DataFrame({"source_id": ["s"], "event_id": ["e"]}), rules)
    assert list(sql) == out["lat"].tolist()
    # and the rounding is a nearest multiple of deg (Chapman 2020), within float noise: a multiple
    # of deg no further than deg / 2 from the value (a tie such as 0.5 to 1 degree may go either way)
    rounded = out["lat"].to_numpy(float)
    assert np.all(np.abs(rounded - np.asarray(values)) <= deg / 2 + 1e-9)
    np.testing.assert_allclose(rounded / deg, np.round(rounded / deg), atol=1e-6)
