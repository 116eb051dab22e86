"""Long, wide and grid exports: round trips, offsets, confidentiality, CSV guard and provenance."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest
from export_store import TRAWL_EFFORT, ExportStore, export_study
from hypothesis import given
from hypothesis import strategies as st

import harmonize
from harmonize.contract import CONTRACT_VERSION
from harmonize.errors import HarmonizeError
from harmonize.export.grid import export_grid, read_grid
from harmonize.export.long import export_long, read_long
from harmonize.export.metadata import read_export_metadata, sidecar_path
from harmonize.export.safe_csv import neutralise_sql, neutralise_text
from harmonize.export.selection import ExportFilters, parse_years
from harmonize.export.wide import export_wide, read_wide
from harmonize.study import Study


@pytest.fixture(scope="module")
def shared(tmp_path_factory: pytest.TempPathFactory) -> tuple[Study, ExportStore]:
    # built once: every test here only reads the store
    return export_study(tmp_path_factory.mktemp("export") / "study")


@pytest.fixture
def study(shared: tuple[Study, ExportStore]) -> Study:
    return shared[0]


@pytest.fixture
def built(shared: tuple[Study, ExportStore]) -> ExportStore:
    return shared[1]


# ---------------------------------------------------------------------------------------- long
def test_long_parquet_offsets_and_provenance(study: Study, built: ExportStore, tmp_path: Path) -> None:
    result = export_long(study, tmp_path / "long.parquet")
    table = pd.read_parquet(result.path)
    assert result.rows == len(table) == 23          # 24 rows in the store, E2 (2 vessels) withheld
    # offset of a Poisson/negative-binomial model: ln(effort), checked against numpy
    # (McCullagh and Nelder 1989, Generalized Linear Models, section 6.2.3)
    positive = table["effort"] > 0
    np.testing.assert_allclose(table.loc[positive, "log_effort"], np.log(table.loc[positive, "effort"]), rtol=1e-12)
    assert table.loc[~positive, "log_effort"].isna().all()
    t1 = table[(table["event_id"] == "T1") & (table["quantity"] == "count")]
    np.testing.assert_allclose(t1["log_effort"], np.log(TRAWL_EFFORT["T1"]))
    meta = json.loads(pq.read_metadata(result.path).metadata[b"harmonize"])
    assert meta["tool_version"] == harmonize.__version__
    assert meta["contract_version"] == CONTRACT_VERSION
    assert {i["ingest_id"] for i in meta["ingests"]} == set(built.ingests.values())
    assert meta == read_export_metadata(result.path)


def test_long_filters_are_applied_and_recorded(study: Study, built: ExportStore, tmp_path: Path) -> None:
    filters = ExportFilters.build(kinds="trawl", years="2020", seasons=["summer"])
    result = export_long(study, tmp_path / "long.parquet", filters)
    table = pd.read_parquet(result.path)
    assert set(table["event_id"]) == {"T1", "T2"}
    meta = read_export_metadata(result.path)
    assert meta["filters"]["kinds"] == ["trawl"] and meta["filters"]["season_years"] == [2020]
    assert meta["filters"]["seasons"] == ["summer"]
    assert [i["ingest_id"] for i in meta["ingests"]] == [built.ingests["survey_trawl"]]


def test_confidential_fishing_rows_are_withheld(study: Study, built: ExportStore) -> None:
    # rule of three (common practice in fisheries agencies): fewer than min_vessels = 3 -> the
    # whole row is withheld (its cell, period, ping and vessel counts would locate the vessels)
    rows = read_long(study, ExportFilters.build(kinds="effort")).set_index("event_id")
    assert "E2" not in rows.index
    assert rows.loc["E1", "value"] == 12.0
    assert rows.loc["E3", "value"] == 7.5          # exactly 3 vessels is publishable


def test_long_csv_guards_text_and_has_sidecar(study: Study, built: ExportStore, tmp_path: Path) -> None:
    result = export_long(study, tmp_path / "long.csv", ExportFilters.build(sources="volunteer_birds"))
    raw = pd.read_csv(result.path, dtype=str, keep_default_na=False)
    # OWASP ASVS 5.0 V1.2.10: a text cell starting with @ is prefixed with a single quote
    assert "'@V2" in set(raw["event_id"]) and "@V2" not in set(raw["event_id"])
    # numbers are not text: negative longitudes keep their sign
    assert raw["lon"].str.startswith("-").all()
    assert "probable_duplicate" in set(raw["row_flags"])
    side = json.loads(sidecar_path(result.path).read_text())
    assert side["@context"] == "http://www.w3.org/ns/csvw" and side["url"] == "long.csv"
    assert [c["name"] for c in side["tableSchema"]["columns"]] == list(raw.columns)
    assert side["dc:provenance"]["ingests"][0]["ingest_id"] == built.ingests["volunteer_birds"]
    assert read_export_metadata(result.path)["format"] == "long"


# ---------------------------------------------------------------------------------------- wide
def test_wide_matrix_values_and_rules(study: Study, built: ExportStore) -> None:
    wide = read_wide(study).set_index("event_id")
    assert list(wide.index) == ["T4", "T1", "T2", "T3", "V1", "@V2"]   # samples only, by time
    # density = count / area swept, life stages summed: (10 + 4) / 0.05 km2 (arithmetic)
    assert wide.loc["T1", "Ostravix keldensis (per km2)"] == pytest.approx(280.0)
    assert wide.loc["T2", "Ostravix keldensis (per km2)"] == 0.0          # inferred absence stays 0
    assert np.isnan(wide.loc["T3", "Calverion rubrum (per km2)"])         # not recorded stays null
    assert wide.loc["@V2", "Procellix keldica (count, no effort)"] == 5.0  # no effort: the plain value
    assert pd.isna(wide.loc["@V2", "effort_unit"])
    # presence-only records are listed as text, never numbers; twins are left out
    assert wide.loc["@V2", "detected_presence_only"] == "Aukelle minima|Larivox pallens"
    assert not any(c.startswith("Aukelle minima") for c in wide.columns)
    assert not any(c.startswith("Larivox pallens") and pd.notna(wide.loc["@V2", c]) for c in wide.columns)
    assert wide.loc["T1", "sea_water_temperature_at_sea_floor"] == 6.5


def test_wide_sums_to_long(study: Study, built: ExportStore) -> None:
    wide = read_wide(study)
    long = read_long(study)
    taxa = long[(long["variable_kind"] == "taxon") & (long["quantity"] == "count")
                & ~long["row_flags"].map(lambda f: "probable_duplicate" in list(f))]
    measure = taxa["density"].where(taxa["density"].notna(), taxa["value"])
    unit = ("per " + taxa["effort_unit"]).where(taxa["density"].notna(), "count, no effort")
    expected = measure.groupby(taxa["variable"] + " (" + unit + ")").sum()
    got = wide[expected.index].sum()
    pd.testing.assert_series_equal(got, expected, check_names=False)


def test_wide_by_life_stage_and_biomass(study: Study, built: ExportStore, tmp_path: Path) -> None:
    wide = read_wide(study, by_life_stage=True).set_index("event_id")
    assert wide.loc["T1", "Ostravix keldensis [juvenile] (per km2)"] == pytest.approx(4.0 / 0.05)
    assert wide.loc["T1", "Ostravix keldensis [adult] (per km2)"] == pytest.approx(10.0 / 0.05)
    result = export_wide(study, tmp_path / "wide.parquet", quantity="biomass")
    table = pd.read_parquet(result.path).set_index("event_id")
    assert table.loc["T1", "Ostravix keldensis (kg per km2)"] == pytest.approx(12.5 / 0.05)
    meta = read_export_metadata(result.path)
    assert meta["options"]["quantity"] == "biomass"
    assert meta["options"]["rows_probable_duplicate_excluded"] == 1
    with pytest.raises(HarmonizeError, match="count, biomass"):
        read_wide(study, quantity="presence")


def test_wide_links_gridded_values(study: Study, built: ExportStore) -> None:
    # G2 covers T1's cell for June 2020; T2 (1 July, another cell) has no gridded value
    wide = read_wide(study, ExportFilters.build(kinds="trawl")).set_index("event_id")
    assert wide.loc["T1", "gridded_sea_surface_temperature"] == 11.5
    assert np.isnan(wide.loc["T2", "gridded_sea_surface_temperature"])
    assert "gridded_sea_surface_temperature" not in read_wide(study, link_gridded=False).columns


def test_wide_export_with_linked_gridded_values_opens_one_connection(
        study: Study, built: ExportStore, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # one read-only connection for the whole export, the co-location of gridded values included,
    # and no folder written inside the store (the spill folder is beside the output)
    from harmonize.store import Store

    opened: list[bool] = []
    connect = Store.connect

    def counting(self: Store, read_only: bool = True, *args: object, **kwargs: object):  # type: ignore[no-untyped-def]
        opened.append(read_only)
        return connect(self, read_only, *args, **kwargs)

    before = sorted(p.relative_to(study.store_dir) for p in study.store_dir.rglob("*"))
    monkeypatch.setattr(Store, "connect", counting)
    result = export_wide(study, tmp_path / "wide.parquet", ExportFilters.build(kinds="trawl"))
    monkeypatch.undo()
    assert opened == [True]
    assert "gridded_sea_surface_temperature" in pd.read_parquet(result.path).columns
    assert sorted(p.relative_to(study.store_dir) for p in study.store_dir.rglob("*")) == before
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".")] == []   # the spill folder is gone


def test_wide_joins_linked_covariates(study: Study, built: ExportStore, tmp_path: Path) -> None:
    linked = pd.DataFrame({"source_id": ["survey_trawl"], "event_id": ["T2"], "model_sst_degC": [11.25]})
    result = export_wide(study, tmp_path / "wide.csv", covariates=linked)
    table = pd.read_csv(result.path, dtype={"event_id": str}).set_index("event_id")
    assert table.loc["T2", "model_sst_degC"] == 11.25 and np.isnan(table.loc["T1", "model_sst_degC"])
    assert "'@V2" in table.index   # the CSV guard applies to the wide table too


# ---------------------------------------------------------------------------------------- grid
def test_grid_matches_a_hand_aggregate(study: Study, built: ExportStore) -> None:
    grid = read_grid(study)
    long = read_long(study)
    rows = long[(long["variable_kind"] == "taxon") & (long["quantity"] == "count")
                & ~long["row_flags"].map(lambda f: "probable_duplicate" in list(f)) & long["effort"].notna()]
    keys = ["source_kind", "cell_id", "season_year", "season", "depth_layer", "variable"]
    # sensitive events have no cell: their rows group under an empty cell_id
    per_event = rows.groupby([*keys, "event_id"], dropna=False).agg(value=("value", "sum"), effort=("effort", "max"),
                                                      density=("density", "sum")).reset_index()
    hand = per_event.groupby(keys, dropna=False).agg(events=("event_id", "size"), total_effort=("effort", "sum"),
                                       mean_density=("density", "mean"),
                                       share_zero=("value", lambda v: float((v == 0).mean()))).reset_index()
    got = grid[(grid["variable_kind"] == "taxon") & (grid["quantity"] == "count") & grid["effort_unit"].notna()]
    merged = hand.merge(got, on=keys, suffixes=("_hand", ""), validate="one_to_one")
    assert len(merged) == len(hand) == len(got)
    for col in ("events", "total_effort", "mean_density", "share_zero"):
        np.testing.assert_allclose(merged[col].astype(float), merged[f"{col}_hand"].astype(float))
    t1 = got[got["cell_id"].isna() & (got["variable"] == "Ostravix keldensis")]   # T1 holds a sensitive taxon
    assert t1["mean_density"].iloc[0] == pytest.approx(280.0)


def test_grid_leaves_a_confidential_row_out_of_its_group(study: Study, built: ExportStore, tmp_path: Path) -> None:
    result = export_grid(study, tmp_path / "grid.csv", ExportFilters.build(kinds="effort"))
    grid = pd.read_csv(result.path).set_index("cell_id")
    shared = grid.loc[built.effort_cells["E1"]]     # E1 (5 vessels) + E2 (2 vessels, withheld)
    assert shared["events"] == 1 and shared["total_value"] == 12.0
    assert "suppressed_events" not in grid.columns  # a count of hidden rows would place them
    assert grid.loc[built.effort_cells["E3"], "total_value"] == 7.5
    meta = read_export_metadata(result.path)
    assert meta["confidentiality"]["min_vessels"] == 3 and meta["confidentiality"]["rows_suppressed"] == 1
    assert meta["confidentiality"]["precise"] is False


# ---------------------------------------------------------------------------------------- guard
# OWASP ASVS 5.0 V1.2.10 (CSV formula injection): cells starting with = + - @ tab CR or NUL.
@pytest.mark.parametrize(("text", "expected"), [
    ("=1+2", "'=1+2"), ("+cmd", "'+cmd"), ("-2", "'-2"), ("@SUM(A1)", "'@SUM(A1)"), ("\tx", "'\tx"),
    ("\rx", "'\rx"), ("plain", "plain"), ("a=b", "a=b"), ("", ""),
])
def test_neutralise_text_owasp_cases(text: str, expected: str) -> None:
    assert neutralise_text(pd.Series([text])).iloc[0] == expected


@given(st.lists(st.text(alphabet=st.characters(blacklist_categories=("Cs",), blacklist_characters="\x00"),
                        max_size=6), min_size=1, max_size=20))
def test_sql_guard_agrees_with_pandas_guard(texts: list[str]) -> None:
    con = duckdb.connect()
    con.register("t", pd.DataFrame({"i": range(len(texts)), "s": texts}))
    got = [r[0] for r in con.execute(f"SELECT {neutralise_sql('s')} FROM t ORDER BY i").fetchall()]
    con.close()
    assert got == list(neutralise_text(pd.Series(texts)))


# ---------------------------------------------------------------------------------------- filters
def test_filter_errors_name_the_value_and_the_choices(study: Study, built: ExportStore, tmp_path: Path) -> None:
    with pytest.raises(HarmonizeError, match="season 'summr' is not in study.toml.*winter"):
        read_long(study, ExportFilters.build(seasons="summr"))
    with pytest.raises(HarmonizeError, match="variable 'Gadus' is not in the store"):
        read_long(study, ExportFilters.build(variables="Gadus"))
    with pytest.raises(HarmonizeError, match="unknown source kind 'trawls'.*trawl, plankton"):
        read_long(study, ExportFilters.build(kinds="trawls"))
    with pytest.raises(HarmonizeError, match=r"unknown file type '\.xlsx'"):
        export_long(study, tmp_path / "x.xlsx")
    assert parse_years("2019-2021, 2023") == (2019, 2020, 2021, 2023)
    with pytest.raises(HarmonizeError, match="ends before it starts"):
        parse_years("2021-2019")


# ---------------------------------------------------------------------------------------- CLI
def _cli(study_dir: Path, *args: str) -> subprocess.CompletedProcess[str]:
    code = "from harmonize.cli.app import main; main()"
    return subprocess.run([sys.executable, "-c", code, "--study", str(study_dir), *args],
                          capture_output=True, text=True, timeout=120)


@pytest.mark.subprocess
def test_cli_export_writes_and_reports(study: Study, built: ExportStore, tmp_path: Path) -> None:
    out = tmp_path / "grid.parquet"
    done = _cli(study.root, "export", "grid", str(out), "--kind", "effort,trawl", "--years", "2020")
    assert done.returncode == 0, done.stderr
    assert "fishing-effort row" in done.stdout and "withheld" in done.stdout and "does not assess stocks" in done.stdout
    meta = read_export_metadata(out)
    assert meta["filters"]["kinds"] == ["effort", "trawl"] and meta["filters"]["season_years"] == [2020]
    bad = _cli(study.root, "export", "long", str(tmp_path / "x.csv"), "--layers", "abyss")
    assert bad.returncode == 2 and "depth layer 'abyss'" in bad.stderr
