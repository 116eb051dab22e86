"""Units as data in every export, read back by independent readers: csvw (CSVW sidecars),
frictionless (the shipped Table Schemas and the long CSV), pyarrow (parquet field metadata),
sqlite3 (GeoPackage gpkg_data_columns); the long table's row_flags column; docs/store.md."""

from __future__ import annotations

import csv
import json
import re
import sqlite3
import warnings
from pathlib import Path
from urllib.parse import unquote

import csvw
import duckdb
import frictionless
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from export_store import ExportStore, export_study
from hypothesis import given
from hypothesis import strategies as st

from harmonize.contract import long_table_schema
from harmonize.export.gpkg import export_gpkg
from harmonize.export.grid import export_grid
from harmonize.export.long import export_long, read_long
from harmonize.export.metadata import csvw_name, read_export_metadata, sidecar_path
from harmonize.export.wide import export_wide
from harmonize.study import Study

ROOT = Path(__file__).resolve().parent.parent
SCHEMAS = sorted((ROOT / "schemas").glob("*.schema.json"))
# RFC 6570 varname (the form CSVW gives a column name, W3C Metadata Vocabulary for Tabular Data
# 2015, 5.6): letters, digits, "_" and percent-encoded octets; not starting with "_" (reserved)
VARNAME = re.compile(r"^(?!_)(?:[A-Za-z0-9_]|%[0-9A-F]{2})+$")
EXPORTERS = {"long": export_long, "wide": export_wide, "grid": export_grid}


@pytest.fixture(scope="module")
def shared(tmp_path_factory: pytest.TempPathFactory) -> tuple[Study, ExportStore]:
    return export_study(tmp_path_factory.mktemp("units") / "study")


@pytest.fixture
def study(shared: tuple[Study, ExportStore]) -> Study:
    return shared[0]


def _header(path: Path) -> list[str]:
    with path.open(encoding="utf-8", newline="") as fh:
        return next(csv.reader(fh))


def _numeric_sql(t: str) -> bool:
    return t in ("double", "integer")


# ------------------------------------------------------------------------------------ CSVW
@pytest.mark.parametrize("fmt", ["long", "wide", "grid"])
def test_csvw_sidecar_is_valid_and_names_every_unit(study: Study, tmp_path: Path, fmt: str) -> None:
    result = EXPORTERS[fmt](study, tmp_path / f"{fmt}.csv")
    side = sidecar_path(result.path)
    doc = json.loads(side.read_text(encoding="utf-8"))
    columns = doc["tableSchema"]["columns"]
    header = _header(result.path)
    # titles are the header as written, in order; names are valid and give the titles back
    assert [c["titles"] for c in columns] == header
    for c in columns:
        assert VARNAME.match(c["name"]), c["name"]
        assert unquote(c["name"]) == c["titles"].lstrip("'") or c["titles"].startswith("'")
    # csvw (an independent CSVW implementation) reads the table with the sidecar, warning about nothing
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        table = csvw.Table.from_file(side)
        rows = list(table.iterdicts())
    assert len(rows) == result.rows
    # every numeric column names its unit: fixed, or the column holding each row's unit
    for c in columns:
        if _numeric_sql(c["datatype"]):
            described = c.get("dc:description", "")
            assert "schema:unitText" in c or "unit named on each row by column" in described, (fmt, c)
            if "unit named on each row by column" in described:
                assert described.rsplit(" ", 1)[1] in header
    by_title = {c["titles"]: c for c in columns}
    if fmt == "long":
        assert by_title["lat"]["schema:unitText"] == "degrees_north"
        assert by_title["row_flags"]["separator"] == "|"
        flagged = [r for r in rows if "probable_duplicate" in (r["row_flags"] or [])]
        assert flagged, "the volunteer twin's flag reads back as a list item"
    if fmt == "wide":
        # a taxon column's unit from its label, written out here by hand: "(per km2)" of a count
        # is individuals per km2 ("1/km2"); "(count, no effort)" is a plain count ("1")
        taxa = [t for t in header if t.endswith(")")]
        assert taxa
        for t in taxa:
            label = t[t.rindex("(") + 1:-1]
            expected = "1" if label == "count, no effort" else "1/" + label.split("per ")[1]
            assert by_title[t]["schema:unitText"] == expected, t
        assert by_title["sea_water_temperature_at_sea_floor"]["schema:unitText"] == "degC"


def test_csvw_sidecar_of_the_old_form_is_refused_by_csvw(tmp_path: Path) -> None:
    # the check above can fail: a column named by its title (spaces) is what csvw rejects
    (tmp_path / "t.csv").write_text("Ostravix keldensis (per km2)\n1.5\n", encoding="utf-8")
    (tmp_path / "t.csv-metadata.json").write_text(json.dumps({
        "@context": "http://www.w3.org/ns/csvw", "url": "t.csv",
        "tableSchema": {"columns": [{"name": "Ostravix keldensis (per km2)", "datatype": "double"}]}}))
    with warnings.catch_warnings(), pytest.raises(UserWarning, match="Invalid column name"):
        warnings.simplefilter("error")
        list(csvw.Table.from_file(tmp_path / "t.csv-metadata.json").iterdicts())


@given(st.text(min_size=1, max_size=40))
def test_csvw_names_are_valid_and_reversible(title: str) -> None:
    name = csvw_name(title)
    assert VARNAME.match(name)
    assert unquote(name) == title


# ------------------------------------------------------------------------------ provenance
@pytest.mark.parametrize("fmt", ["long", "wide", "grid"])
def test_provenance_and_parquet_fields_carry_every_unit(study: Study, tmp_path: Path, fmt: str) -> None:
    result = EXPORTERS[fmt](study, tmp_path / f"{fmt}.parquet")
    schema = pq.read_schema(result.path)
    meta = read_export_metadata(result.path)
    listed = {c["name"]: c for c in meta["columns"]}
    assert list(listed) == schema.names
    for f in schema:
        numeric = pa.types.is_integer(f.type) or pa.types.is_floating(f.type)
        field_meta = {k.decode(): v.decode() for k, v in (f.metadata or {}).items()}
        entry = listed[f.name]
        if numeric:
            assert "unit" in entry or entry.get("unit_column") in schema.names, (fmt, entry)
            assert field_meta.get("unit") == entry.get("unit") and \
                field_meta.get("unit_column") == entry.get("unit_column"), (fmt, f.name)
    if fmt == "wide":
        # the wide table carries units as data: every taxon column's unit in the parquet field
        taxa = [n for n in schema.names if n.endswith(")")]
        assert taxa and all(listed[t]["unit"] for t in taxa)
        assert listed["log_effort"]["unit"] == "1" and listed["effort"]["unit_column"] == "effort_unit"
    # DuckDB reads the same file (the field metadata changes nothing of the values)
    n = duckdb.connect().execute("SELECT count(*) FROM read_parquet(?)", [str(result.path)]).fetchall()[0][0]
    assert n == pq.read_metadata(result.path).num_rows


def test_csv_provenance_lists_units_too(study: Study, tmp_path: Path) -> None:
    result = export_long(study, tmp_path / "long.csv")
    listed = {c["name"]: c for c in read_export_metadata(result.path)["columns"]}
    assert set(listed) == set(_header(result.path))
    assert listed["density"]["unit_column"] == "density_unit" and listed["depth_min_m"]["unit"] == "m"


# ------------------------------------------------------------------------------ GeoPackage
def test_geopackage_describes_the_unit_of_every_numeric_column(study: Study, tmp_path: Path) -> None:
    result = export_gpkg(study, tmp_path / "out.gpkg")
    con = sqlite3.connect(result.path)
    described = {(t, c): d for t, c, d in con.execute(
        "SELECT table_name, column_name, description FROM gpkg_data_columns")}
    ext = {r[0] for r in con.execute("SELECT table_name FROM gpkg_extensions WHERE extension_name = 'gpkg_schema'")}
    assert ext == {"gpkg_data_columns", "gpkg_data_column_constraints"}
    layers = [r[0] for r in con.execute("SELECT table_name FROM gpkg_contents WHERE table_name <> 'export_metadata'")]
    assert layers
    for layer in layers:
        for _, column, sql_type, *_ in con.execute(f'PRAGMA table_info("{layer}")').fetchall():
            t = str(sql_type).upper()
            # SQLite/GeoPackage numeric column types (OGC 12-128r18, Table 1); geometry columns are not
            if column != "fid" and t in ("INTEGER", "INT", "MEDIUMINT", "SMALLINT", "TINYINT", "REAL", "FLOAT",
                                         "DOUBLE"):
                assert (layer, column) in described, (layer, column, t)
                assert described[(layer, column)].startswith(("unit: ", "in the unit named on each row"))
    con.close()
    if ("cells", "area_km2") in described:
        assert described[("cells", "area_km2")] == "unit: km2"
    import pyogrio  # GDAL still reads every layer of the file

    for layer in layers:
        pyogrio.read_dataframe(result.path, layer=layer)


# ------------------------------------------------------------------------ Table Schema
@pytest.mark.parametrize("path", SCHEMAS, ids=[p.name for p in SCHEMAS])
def test_shipped_table_schemas_load_in_frictionless(path: Path) -> None:
    schema = frictionless.Schema.from_descriptor(str(path))
    assert [f.name for f in schema.fields] == [f["name"] for f in json.loads(path.read_text())["fields"]]


def test_v1_exclusive_bound_is_what_frictionless_refuses(tmp_path: Path) -> None:
    # why the schemas declare v2: the same field without "$schema" v2 is refused
    doc = json.loads((ROOT / "schemas" / "observations.schema.json").read_text())
    doc.pop("$schema")
    (tmp_path / "v1.json").write_text(json.dumps(doc))
    with pytest.raises(frictionless.FrictionlessException, match="exclusiveMaximum"):
        frictionless.Schema.from_descriptor(str(tmp_path / "v1.json"))


def test_long_csv_validates_against_the_table_schema(study: Study, tmp_path: Path) -> None:
    result = export_long(study, tmp_path / "long.csv")
    schema = tmp_path / "long.schema.json"
    schema.write_text(json.dumps(long_table_schema()))
    report = frictionless.Resource(path=result.path.name, basepath=str(tmp_path), schema=schema.name).validate()
    assert report.valid, report.flatten(["rowNumber", "fieldName", "type", "note"])[:5]
    assert report.tasks[0].stats["rows"] == result.rows
    # and it can fail: a latitude of 152 on one row is named by row and field
    lines = result.path.read_text(encoding="utf-8").splitlines()
    lat = _header(result.path).index("lat")
    cells = next(csv.reader([lines[1]]))
    cells[lat] = "152.0"
    bad = tmp_path / "bad.csv"
    with bad.open("w", encoding="utf-8", newline="") as fh:
        fh.write(lines[0] + "\n")
        csv.writer(fh, lineterminator="\n").writerow(cells)
        fh.write("\n".join(lines[2:]) + "\n")
    report = frictionless.Resource(path=bad.name, basepath=str(tmp_path), schema=schema.name).validate()
    assert not report.valid
    assert report.flatten(["rowNumber", "fieldName", "type"]) == [[2, "lat", "constraint-error"]]


# ------------------------------------------------------------------------------ row_flags
def test_long_table_names_flags_row_flags(study: Study, tmp_path: Path) -> None:
    frame = read_long(study)
    assert "row_flags" in frame.columns and "flags" not in frame.columns
    assert frame["row_flags"].map(lambda f: "probable_duplicate" in list(f)).sum() == 1
    assert "row_flags" in pq.read_schema(export_long(study, tmp_path / "l.parquet").path).names
    assert "row_flags" in _header(export_long(study, tmp_path / "l.csv").path)
    # the old name still selects the column, under its new name, with a DeprecationWarning
    with pytest.warns(DeprecationWarning, match="'flags' is named 'row_flags'"):
        old = read_long(study, columns=["record_id", "flags"])
    assert list(old.columns) == ["record_id", "row_flags"]
    assert read_long(study, columns=["row_flags"])["row_flags"].map(len).sum() == frame["row_flags"].map(len).sum()


# ------------------------------------------------------------------------------ docs/store.md
def test_store_doc_names_every_table_view_and_column(study: Study) -> None:
    doc = (ROOT / "docs" / "store.md").read_text(encoding="utf-8")
    named = set(re.findall(r"`([A-Za-z_][A-Za-z0-9_]*)`", doc))
    con = duckdb.connect(str(study.store_dir / "harmonized.duckdb"), read_only=True)
    con.execute(f"SET file_search_path = '{study.store_dir}'")
    relations = [r[0] for r in con.execute(
        "SELECT table_name FROM information_schema.tables WHERE table_schema = 'main'").fetchall()]
    columns = {r[0] for r in con.execute("DESCRIBE observations").fetchall()}
    con.close()
    assert relations
    # each table and view has its own entry ("- `name`" at the start of a line)
    entries = set(re.findall(r"^- `([a-z_]+)`", doc, flags=re.MULTILINE))
    assert set(relations) <= entries, sorted(set(relations) - entries)
    assert columns <= named, sorted(columns - named)


def test_store_doc_stands_alone() -> None:
    # every file the page points to is in the repository
    doc = (ROOT / "docs" / "store.md").read_text(encoding="utf-8")
    for ref in set(re.findall(r"[\w./-]+\.(?:md|json|py|toml)\b", doc)):
        if ref.startswith(("study.toml", "profiles/")) or ref == "moving.json":
            continue  # files of a user's study folder, and the staging journal a store holds
        candidates = [ROOT / ref, ROOT / "docs" / ref, ROOT / ref.removeprefix("harmonize/")]
        assert any(p.exists() for p in candidates), ref


def test_store_doc_snippets_run_without_harmonize(study: Study, tmp_path: Path) -> None:
    # the page's Python snippets, run as written against a store ("study/" is the study folder)
    doc = (ROOT / "docs" / "store.md").read_text(encoding="utf-8")
    blocks = re.findall(r"```python\n(.*?)```", doc, flags=re.DOTALL)
    assert len(blocks) >= 2
    study_parent = study.root.parent
    link = study_parent / "study"
    assert link.exists()
    import os

    here = os.getcwd()
    os.chdir(study_parent)
    try:
        for block in blocks:
            code = "\n".join(line.strip() if line.startswith("  ") else line for line in block.splitlines())
            namespace: dict[str, object] = {}
            exec(compile(code, "docs/store.md", "exec"), namespace)  # noqa: S102 (the doc's own code)
            if "frame" in namespace:
                frame = namespace["frame"]
                # season_year reads as an integer: ordered comparisons work
                assert str(frame["season_year"].dtype) == "int32"  # type: ignore[index]
                assert (frame["season_year"] >= 2019).all()  # type: ignore[index,operator]
    finally:
        os.chdir(here)


def test_season_year_is_an_integer_in_arrow_and_duckdb_readers(study: Study) -> None:
    # pyarrow.dataset with the partitioning docs/store.md gives, and DuckDB's hive partitioning:
    # season_year is an integer both ways (polars is not installed here)
    import pyarrow.dataset as ds

    root = study.store_dir / "observations"
    part = ds.partitioning(pa.schema([("source_kind", pa.string()), ("season_year", pa.int32())]), flavor="hive")
    table = ds.dataset(root, format="parquet", partitioning=part).to_table()
    assert table.schema.field("season_year").type == pa.int32()
    assert table.num_rows
    types = duckdb.connect().execute(
        "SELECT DISTINCT typeof(season_year) FROM read_parquet(?, hive_partitioning = true)",
        [str(root / "**" / "*.parquet")]).fetchall()
    assert types == [("BIGINT",)]
