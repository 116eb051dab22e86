"""Every export of the demo, opened by at least two independent general-purpose readers.

The demo is built once for the module; the test then opens what it wrote (and a long CSV and a
wide parquet file written from the same store) with readers that know nothing of harmonize:
pyarrow and DuckDB for parquet and CSV, geopandas and pyogrio (GDAL) for GeoParquet and the
GeoPackage, python-dwca-reader and the zip/csv modules for the Darwin Core Archive, plain DuckDB
and pyarrow.dataset for the store. For each it checks

- times: UTC instants (parquet ``timestamp[us, tz=UTC]``, DuckDB ``TIMESTAMPTZ``, text in
  ISO 8601 ending in ``Z``);
- units: present as data (a unit column beside each value, parquet field metadata, CSVW
  sidecar, unit words or vocabulary ids in the archive);
- geometry metadata: the GeoParquet ``geo`` entry (GeoParquet 1.0.0: version, primary_column,
  WKB encoding, geometry types, bbox), the GeoPackage layers' CRS;
- identifiers: unique, without spaces.
"""

from __future__ import annotations

import csv
import io
import json
import zipfile
from pathlib import Path
from typing import Any
from urllib.parse import unquote

import duckdb
import geopandas as gpd
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.dataset as ds
import pyarrow.parquet as pq
import pyogrio
import pyproj
import pytest

from harmonize.demo.build import DemoRun, build_demo
from harmonize.export.run import export
from harmonize.store import Store
from harmonize.study import load_study

pytestmark = pytest.mark.slow

#: ISO 8601 UTC instant as harmonize writes it (seconds, an optional fraction, "Z")
ISO_Z = r"^\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d(\.\d+)?Z$"
# Darwin Core terms: TDWG "Darwin Core List of Terms" (vocabulary/term_versions.csv, recommended;
# CC BY 4.0), kept in fixtures/reference; and the two OBIS eMoF terms (OBIS Manual, Extended
# MeasurementOrFact extension).
DWC_TERMS = Path(__file__).resolve().parent.parent / "fixtures" / "reference" / "darwin_core_terms.csv"
OBIS_TERMS = {"http://rs.iobis.org/obis/terms/measurementTypeID", "http://rs.iobis.org/obis/terms/measurementUnitID"}
UTC = pa.timestamp("us", tz="UTC")


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> tuple[DemoRun, dict[str, Path]]:
    run = build_demo(tmp_path_factory.mktemp("readers") / "demo")
    files = {fmt: Path(run.outputs[f"export {fmt}"]) for fmt in ("long", "wide", "grid", "gpkg", "dwca")}
    study = load_study(run.folder)
    extra = run.folder / "outputs-readers"
    extra.mkdir()
    files["long csv"] = export(study, "long", extra / "long.csv").path
    files["wide parquet"] = export(study, "wide", extra / "wide.parquet").path
    files["grid csv"] = export(study, "grid", extra / "grid.csv").path
    return run, files


def _no_spaces_unique(values: pd.Series, what: str) -> None:
    text = values.astype(str)
    assert not text.str.contains(r"\s", regex=True).any(), (what, text[text.str.contains(r"\s")].head(3).tolist())
    assert text.is_unique, (what, text[text.duplicated()].head(3).tolist())


def _geo(path: Path) -> dict[str, Any]:
    """The GeoParquet metadata as pyarrow reads it from the file footer."""
    raw = (pq.read_metadata(path).metadata or {}).get(b"geo")
    assert raw is not None, f"{path.name}: no geo metadata"
    return dict(json.loads(raw))


def _check_geoparquet(path: Path, lon: str, lat: str) -> None:
    # GeoParquet 1.0.0 / 1.1.0 (OGC, geoparquet.org): required keys; no crs = OGC:CRS84
    geo = _geo(path)
    assert geo["version"].startswith("1.") and geo["primary_column"] == "geometry"
    column = geo["columns"]["geometry"]
    assert column["encoding"] == "WKB" and column["geometry_types"] == ["Point"]
    assert "crs" not in column or pyproj.CRS(column["crs"]) == pyproj.CRS("OGC:CRS84")
    # reader 1: geopandas decodes the WKB; the points are exactly the lon/lat columns
    frame = gpd.read_parquet(path)
    assert frame.crs == pyproj.CRS("OGC:CRS84")
    placed = frame[frame[lon].notna() & frame[lat].notna()]
    assert len(placed) > 0 and frame.geometry.isna().sum() == len(frame) - len(placed)
    np.testing.assert_array_equal(placed.geometry.x.to_numpy(), placed[lon].to_numpy(float))
    np.testing.assert_array_equal(placed.geometry.y.to_numpy(), placed[lat].to_numpy(float))
    west, south, east, north = column["bbox"]
    assert (west, south, east, north) == (placed[lon].min(), placed[lat].min(), placed[lon].max(), placed[lat].max())
    # reader 2: DuckDB reads the column as a geometry in OGC:CRS84, one per placed row
    with duckdb.connect() as con:
        kind, n, text = con.execute(
            """SELECT any_value(typeof(geometry)), count(geometry), count(ST_AsText(geometry))
                FROM read_parquet(?)""", [str(path)]).fetchall()[0]
    assert kind.startswith("GEOMETRY") and "CRS84" in kind and n == text == len(placed)
    # reader 3: the WKB bytes as pyarrow reads them, decoded here by the Simple Features layout
    # (OGC 06-103r4, 8.2: byte order 1 = little endian, uint32 type 1 = Point, two doubles x, y)
    column = pq.read_table(path, columns=["geometry", lon, lat]).to_pandas()
    column = column[column["geometry"].notna()]
    raw = np.frombuffer(b"".join(column["geometry"]), dtype=np.dtype([("order", "u1"), ("type", "<u4"),
                                                                       ("x", "<f8"), ("y", "<f8")]))
    assert (raw["order"] == 1).all() and (raw["type"] == 1).all()
    np.testing.assert_array_equal(raw["x"], column[lon].to_numpy(float))
    np.testing.assert_array_equal(raw["y"], column[lat].to_numpy(float))


def _check_units_in_field_metadata(path: Path, columns: dict[str, str]) -> None:
    schema = pq.read_schema(path)
    for name, expected in columns.items():
        meta = schema.field(name).metadata or {}
        assert meta.get(b"unit", meta.get(b"unit_column", b"")).decode() == expected, (path.name, name, meta)


# --------------------------------------------------------------------------- long

def test_long_parquet_in_pyarrow_duckdb_and_geopandas(demo: tuple[DemoRun, dict[str, Path]]) -> None:
    path = demo[1]["long"]
    table = pq.read_table(path)
    assert table.schema.field("event_start").type == UTC and table.schema.field("event_end").type == UTC
    _check_units_in_field_metadata(path, {"value": "unit", "effort": "effort_unit", "density": "density_unit",
                                          "lat": "degrees_north", "lon": "degrees_east", "depth_min_m": "m"})
    frame = table.drop_columns(["geometry"]).to_pandas()
    # every value has its unit, every density its density unit
    assert frame.loc[frame["value"].notna(), "unit"].notna().all()
    assert frame.loc[frame["density"].notna(), "density_unit"].notna().all()
    _no_spaces_unique(frame["record_id"], "long record_id")
    with duckdb.connect() as con:
        con.execute("SET TimeZone = 'America/Halifax'")     # a reader in another zone reads the same instants
        kind, n, first = con.execute("SELECT any_value(typeof(event_start)), count(*), epoch_us(min(event_start)) "
                                     "FROM read_parquet(?)", [str(path)]).fetchall()[0]
    assert kind == "TIMESTAMP WITH TIME ZONE" and n == len(frame)
    assert first == frame["event_start"].min().value // 1000
    _check_geoparquet(path, "lon", "lat")


def test_long_csv_in_pyarrow_and_duckdb(demo: tuple[DemoRun, dict[str, Path]]) -> None:
    path = demo[1]["long csv"]
    text = pd.read_csv(path, dtype=str, keep_default_na=False)
    assert text["event_start"].str.match(ISO_Z).all()
    assert text.loc[text["event_end"] != "", "event_end"].str.match(ISO_Z).all()
    # reader 1: pyarrow's CSV reader infers zone-aware UTC timestamps from the text
    table = pacsv.read_csv(path)
    assert table.schema.field("event_start").type.tz in ("UTC", "+00:00")
    # reader 2: DuckDB infers TIMESTAMPTZ, whatever its session zone
    with duckdb.connect() as con:
        con.execute("SET TimeZone = 'Asia/Tokyo'")
        kind, n = con.execute("SELECT any_value(typeof(event_start)), count(*) FROM read_csv(?)",
                              [str(path)]).fetchall()[0]
    assert kind == "TIMESTAMP WITH TIME ZONE" and n == table.num_rows == len(text)
    parquet = pq.read_table(demo[1]["long"], columns=["record_id", "event_start"]).to_pandas()
    assert sorted(pd.to_datetime(text["event_start"], format="ISO8601", utc=True)) == sorted(parquet["event_start"])
    # units: a unit column beside each number, and the CSVW sidecar
    assert (text.loc[text["value"] != "", "unit"] != "").all()
    sidecar = json.loads(Path(str(path) + "-metadata.json").read_text())
    assert {c["name"] for c in sidecar["tableSchema"]["columns"]} >= {"value", "unit", "effort_unit", "density_unit"}
    _no_spaces_unique(text["record_id"], "long csv record_id")


# --------------------------------------------------------------------------- wide

def test_wide_in_pyarrow_duckdb_and_pandas(demo: tuple[DemoRun, dict[str, Path]]) -> None:
    csv_path, parquet_path = demo[1]["wide"], demo[1]["wide parquet"]
    table = pq.read_table(parquet_path)
    assert table.schema.field("event_start").type == UTC
    # every taxon column carries its unit: in its name and in the parquet field metadata
    taxon_columns = [f for f in table.schema if f.name.endswith(")") and "(" in f.name]
    assert taxon_columns and all((f.metadata or {}).get(b"unit") for f in taxon_columns)
    text = pd.read_csv(csv_path, dtype=str, keep_default_na=False)
    assert text["event_start"].str.match(ISO_Z).all()
    sidecar = json.loads(Path(str(csv_path) + "-metadata.json").read_text())
    described = {c.get("titles", c["name"]): c for c in sidecar["tableSchema"]["columns"]}
    assert all(f.name in described and described[f.name].get("schema:unitText") for f in taxon_columns)
    with duckdb.connect() as con:
        kind, n = con.execute("SELECT any_value(typeof(event_start)), count(*) FROM read_csv(?)",
                              [str(csv_path)]).fetchall()[0]
    assert kind == "TIMESTAMP WITH TIME ZONE" and n == len(text) == table.num_rows
    keys = text["source_id"] + ":" + text["event_id"]
    assert keys.is_unique and not text["source_id"].str.contains(r"\s").any()


# --------------------------------------------------------------------------- grid

def test_grid_in_pyarrow_duckdb_and_geopandas(demo: tuple[DemoRun, dict[str, Path]]) -> None:
    path = demo[1]["grid"]
    table = pq.read_table(path)
    _check_units_in_field_metadata(path, {"cell_lon": "degrees_east", "cell_lat": "degrees_north", "cell_x_m": "m",
                                          "cell_y_m": "m", "mean_density": "density_unit", "total_value": "unit"})
    frame = table.drop_columns(["geometry"]).to_pandas()
    group = ["source_kind", "cell_id", "season_year", "season", "depth_layer", "variable", "quantity", "unit",
             "effort_unit"]
    assert not frame.duplicated(group).any()
    cells = frame.dropna(subset=["cell_id"]).drop_duplicates("cell_id")
    assert not cells["cell_id"].str.contains(r"\s").any()
    # the centre of cell x{i}_y{j} of the study grid, computed here with pyproj (the grid:
    # squares of cell_size_km in the study CRS)
    study = load_study(demo[0].folder)
    ix = cells["cell_id"].str.extract(r"^x(-?\d+)_y(-?\d+)$").astype(int)
    size = study.cell_size_km * 1000
    x, y = (ix[0].to_numpy() + 0.5) * size, (ix[1].to_numpy() + 0.5) * size
    lon, lat = pyproj.Transformer.from_crs(study.crs, "EPSG:4326", always_xy=True).transform(x, y)
    np.testing.assert_allclose(cells["cell_x_m"], x)
    np.testing.assert_allclose(cells["cell_y_m"], y)
    np.testing.assert_allclose(cells["cell_lon"], lon, atol=1e-9)
    np.testing.assert_allclose(cells["cell_lat"], lat, atol=1e-9)
    assert frame.loc[frame["cell_id"].isna(), ["cell_lon", "cell_lat", "cell_x_m", "cell_y_m"]].isna().all().all()
    with duckdb.connect() as con:
        n = con.execute("SELECT count(*) FROM read_csv(?)", [str(demo[1]["grid csv"])]).fetchall()[0][0]
        csv_cells = con.execute("SELECT DISTINCT cell_id, cell_lon FROM read_csv(?) WHERE cell_id IS NOT NULL",
                                [str(demo[1]["grid csv"])]).df().set_index("cell_id")["cell_lon"]
    assert n == len(frame)
    np.testing.assert_array_equal(csv_cells.loc[cells["cell_id"]].to_numpy(), cells["cell_lon"].to_numpy())
    _check_geoparquet(path, "cell_lon", "cell_lat")


# --------------------------------------------------------------------------- GeoPackage

def test_geopackage_in_pyogrio_and_geopandas(demo: tuple[DemoRun, dict[str, Path]]) -> None:
    path = demo[1]["gpkg"]
    layers = dict(pyogrio.list_layers(path))
    assert {"samples": "Point", "gridded_cells": "Polygon", "fishing_cells": "Polygon", "cells": "Polygon",
            "domain": "Polygon", "strata": "Polygon"}.items() <= layers.items()
    wgs84 = pyproj.CRS("EPSG:4326")
    for name, kind in layers.items():
        if kind is None:
            continue
        # reader 1: pyogrio (GDAL) reports the layer's CRS; reader 2: geopandas reads it
        assert pyproj.CRS(pyogrio.read_info(path, layer=name)["crs"]) == wgs84, name
        frame = gpd.read_file(path, layer=name)
        assert frame.crs == wgs84 and frame.geometry.notna().all(), name
    samples = gpd.read_file(path, layer="samples")
    fishing = gpd.read_file(path, layer="fishing_cells")
    gridded = gpd.read_file(path, layer="gridded_cells")
    assert len(samples) and len(fishing) and len(gridded)
    # identifiers: unique per layer, no spaces in the keys
    _no_spaces_unique(samples["source_id"] + ":" + samples["event_id"], "gpkg samples")
    _no_spaces_unique(fishing["source_id"] + ":" + fishing["event_id"], "gpkg fishing_cells")
    _no_spaces_unique(gridded["source_id"] + ":" + gridded["cell_id"], "gpkg gridded_cells")
    # times: GDAL's own text of the DATETIME columns ends in Z
    for name in ("samples", "fishing_cells"):
        raw = pyogrio.read_dataframe(path, layer=name, datetime_as_string=True, read_geometry=False)
        assert raw["event_start"].str.match(ISO_Z).all(), name
    # units: effort beside its unit; hours and areas named by their unit
    assert samples.loc[samples["effort"].notna(), "effort_unit"].notna().all()
    assert {"fishing_hours", "n_vessels", "area_km2"} <= set(fishing.columns)
    # the rule of three holds in the layer a reader sees
    study = load_study(demo[0].folder)
    assert (fishing["n_vessels"] >= study.min_vessels).all()


# --------------------------------------------------------------------------- Darwin Core Archive

def test_darwin_core_archive_in_dwca_reader_and_csv(demo: tuple[DemoRun, dict[str, Path]]) -> None:
    from dwca.read import DwCAReader

    path = demo[1]["dwca"]
    with DwCAReader(str(path)) as archive:
        core = archive.descriptor.core
        assert core.type == "http://rs.tdwg.org/dwc/terms/Event"
        terms = {*core.terms, *(t for ext in archive.descriptor.extensions for t in ext.terms)}
        core_ids = [row.id for row in archive]
        linked = {ext.type: 0 for ext in archive.descriptor.extensions}
        for row in archive:
            for ext in row.extensions:
                assert ext.core_id == row.id
                linked[ext.rowtype] += 1
    with DWC_TERMS.open(encoding="utf-8") as fh:
        recommended = {r["iri"] for r in csv.DictReader(fh)}
    assert terms <= recommended | OBIS_TERMS, terms - recommended - OBIS_TERMS
    # reader 2: the zip and csv modules of the standard library
    with zipfile.ZipFile(path) as zf:
        tables = {name: list(csv.DictReader(io.StringIO(zf.read(name).decode("utf-8")), delimiter="\t",
                                            quoting=csv.QUOTE_NONE))
                  for name in ("event.txt", "occurrence.txt", "extendedmeasurementorfact.txt")}
    events, occurrences, facts = (tables[n] for n in ("event.txt", "occurrence.txt", "extendedmeasurementorfact.txt"))
    assert [e["eventID"] for e in events] == core_ids
    assert linked == {"http://rs.tdwg.org/dwc/terms/Occurrence": len(occurrences),
                      "http://rs.iobis.org/obis/terms/ExtendedMeasurementOrFact": len(facts)}
    # identifiers: unique, no spaces; every occurrence's and measurement's event is in the core
    _no_spaces_unique(pd.Series(core_ids), "eventID")
    _no_spaces_unique(pd.Series([o["occurrenceID"] for o in occurrences]), "occurrenceID")
    _no_spaces_unique(pd.Series([f["measurementID"] for f in facts]), "measurementID")
    ids = set(core_ids)
    assert {o["eventID"] for o in occurrences} <= ids and {f["eventID"] for f in facts} <= ids
    occ_ids = {o["occurrenceID"] for o in occurrences}
    assert {f["occurrenceID"] for f in facts if f["occurrenceID"]} <= occ_ids
    # an occurrence id decodes (RFC 3986 percent-decoding) to its event's id parts and its taxon
    sample = occurrences[0]
    parts = [unquote(p) for p in sample["occurrenceID"].split(":")]
    assert ":".join(parts[:2]) == ":".join(unquote(p) for p in sample["eventID"].split(":"))
    assert parts[2] == sample["scientificName"]
    # fishing effort is not in the archive unless asked for
    study = load_study(demo[0].folder)
    with duckdb.connect(str(study.store_dir / "harmonized.duckdb"), read_only=True) as con:
        fleets = {r[0] for r in con.execute("SELECT DISTINCT source_id FROM ingests WHERE source_kind = 'effort'")
                  .fetchall()}
    assert fleets and not {unquote(e.split(":")[0]) for e in core_ids} & fleets
    # times: eventDate is an ISO 8601 UTC instant or interval
    assert all(all(pd.Series(e["eventDate"].split("/")).str.match(ISO_Z)) for e in events)
    # units: every measurement with a value has a unit; taxa carry rank and kingdom from taxa.csv
    assert all(f["measurementUnit"] for f in facts if f["measurementValue"] != "")
    assert any(f["measurementUnitID"] for f in facts) and any(f["measurementTypeID"] for f in facts)
    assert all(o["taxonRank"] and o["kingdom"] for o in occurrences)


# --------------------------------------------------------------------------- the store

def test_store_current_view_in_duckdb_and_pyarrow(demo: tuple[DemoRun, dict[str, Path]]) -> None:
    store = demo[0].folder / "store"
    with duckdb.connect(str(store / "harmonized.duckdb"), read_only=True) as con:
        con.execute(f"SET file_search_path = '{store}'")       # docs/store.md
        con.execute("SET TimeZone = 'Pacific/Auckland'")
        kind, rows, ids, spaced, no_unit = con.execute(
            """SELECT any_value(typeof(event_start)), count(*), count(DISTINCT record_id),
                      count(*) FILTER (WHERE regexp_matches(record_id, '\\s')),
                      count(*) FILTER (WHERE value IS NOT NULL AND unit IS NULL)
               FROM current""").fetchall()[0]
        samples = con.execute("""SELECT count(*) FROM current
                                 WHERE source_kind IN ('trawl', 'plankton', 'transect', 'opportunistic')""").fetchall()[0][0]
        live = [r[0] for r in con.execute(
            """SELECT f.path FROM observation_files f JOIN ingests i USING (ingest_id)
               WHERE i.status = 'complete'""").fetchall()]
    assert kind == "TIMESTAMP WITH TIME ZONE" and rows == ids and spaced == 0 and no_unit == 0
    # reader 2: pyarrow over the live part files the manifest lists (hive partitions typed)
    part = ds.partitioning(pa.schema([("source_kind", pa.string()), ("season_year", pa.int32())]), flavor="hive")
    dataset = ds.dataset([str(store / p) for p in live], format="parquet", partitioning=part,
                         partition_base_dir=str(store / "observations"))
    assert dataset.schema.field("event_start").type == UTC
    assert dataset.schema.field("season_year").type == pa.int32()
    table = dataset.to_table(columns=["record_id", "source_kind", "unit", "value"],
                             filter=ds.field("source_kind").isin(["trawl", "plankton", "transect", "opportunistic"]))
    # sample rows are one row per value in files and view alike (gridded and effort parts are merged by the view)
    assert table.num_rows == samples
    frame = table.to_pandas()
    _no_spaces_unique(frame["record_id"], "store record_id")
    assert frame.loc[frame["value"].notna(), "unit"].notna().all()


def test_store_index_counts_the_twins_harmonize_lists(demo: tuple[DemoRun, dict[str, Path]]) -> None:
    """The demo's twins, read from parquet files alone (pandas and polars), are the ones the
    'twins' command lists (docs/store.md, "Reading with parquet alone")."""
    import polars as pl

    from harmonize.twins import twins_frame

    store = demo[0].folder / "store"
    with Store(store).connect() as con:
        listed = twins_frame(con)
    assert len(listed) > 0
    live = pd.read_parquet(store / "index" / "live_files.parquet")
    volunteer = live[live["source_kind"] == "opportunistic"]
    rows = pd.concat([pd.read_parquet(store / p, columns=["record_id", "ingest_id"]) for p in volunteer["path"]])
    flags = pd.read_parquet(store / "index" / "flags.parquet")
    flagged = rows.merge(flags[flags["flag"] == "probable_duplicate"], on=["record_id", "ingest_id"])
    assert sorted(flagged["record_id"]) == sorted(listed["record_id"])
    # reader 2: polars, the same join
    pl_rows = pl.concat([pl.read_parquet(store / p, columns=["record_id", "ingest_id"]) for p in volunteer["path"]])
    pl_flags = pl.read_parquet(store / "index" / "flags.parquet").filter(pl.col("flag") == "probable_duplicate")
    assert pl_rows.join(pl_flags, on=["record_id", "ingest_id"]).height == len(listed)
