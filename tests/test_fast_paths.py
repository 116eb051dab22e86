"""The fast paths added for speed give exactly what the plain implementations give.

- ``read_table``: Arrow's CSV reader (fast path) against Python's ``csv`` module (the
  reference reader of the standard library, RFC 4180 quoting) on awkward but well-formed
  files; files with malformed rows must fall back to the line-by-line reader.
- The trawl catch aggregation against a plain pandas ``groupby`` (pandas as the reference
  library) on random catch rows.
- The list-column conversion into Arrow against the element-by-element Python conversion.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pytest
from hypothesis import given
from hypothesis import strategies as st

from harmonize.adapters.trawl import _catch_values
from harmonize.ingest import _list_array
from harmonize.profile import Profile
from harmonize.reading import fields
from harmonize.reading import text as reading_text
from harmonize.reading.text import read_table


def _profile(tmp_path: Path, **kw: object) -> Profile:
    return Profile(path=tmp_path / "p.toml", source_id="s", kind="trawl", provider_type="agency",
                   protocol=None, raw={"source": {"id": "s"}}, **kw)


def _both(path: Path, profile: Profile, monkeypatch: pytest.MonkeyPatch) -> tuple[pd.DataFrame, pd.DataFrame]:
    fast, bad_fast = read_table(path, profile, "events")
    assert reading_text._read_csv_arrow(path, profile) is not None, "the fast reader should accept this file"
    with monkeypatch.context() as m:
        m.setattr(reading_text, "_read_csv_arrow", lambda *a: None)
        plain, bad_plain = read_table(path, profile, "events")
    assert bad_fast == bad_plain == []
    return fast.frame, plain.frame


AWKWARD = [
    # quoted delimiter, quoted newline, doubled quotes, trailing spaces kept
    'id,name,note\n1,"Keld, cod","two\nlines"\n2,"say ""hi""",  spaced  \n',
    # BOM, blank lines, a whitespace-only row and a delimiter-only row are not data rows
    '\ufeffid,name\n\n1,a\n  ,  \n,\n2,b\n\n',
    # header after blank rows; CRLF line ends; unicode
    '\n,\nid,name\r\n1,Østravix\r\n2,Kéld\r\n',
    # semicolons, sniffed from the header
    'id;value\n1;2,5\n2;3,0\n',
]


@pytest.mark.parametrize("text", AWKWARD)
def test_fast_reader_equals_python_csv(text: str, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    path = tmp_path / "f.csv"
    path.write_bytes(text.encode("utf-8"))
    fast, plain = _both(path, _profile(tmp_path), monkeypatch)
    pd.testing.assert_frame_equal(fast, plain, check_dtype=False)
    assert fast.to_numpy().tolist() == plain.to_numpy().tolist()


def test_fast_reader_tab_file(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    path = tmp_path / "f.tsv"
    path.write_text("id\tname\n1\ta b\n2\t\n", encoding="utf-8")
    fast, plain = _both(path, _profile(tmp_path), monkeypatch)
    pd.testing.assert_frame_equal(fast, plain, check_dtype=False)
    assert fast["name"].tolist() == ["a b", ""]


@given(st.lists(st.lists(st.text(alphabet='ab ,"\n\r\t;é', max_size=6), min_size=3, max_size=3), min_size=1, max_size=8))
def test_fast_reader_random_cells(tmp_path_factory: pytest.TempPathFactory, rows: list[list[str]]) -> None:
    import csv
    import io

    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(["a", "b", "c"])
    writer.writerows(rows)
    path = tmp_path_factory.mktemp("csv") / "f.csv"
    path.write_text(buf.getvalue(), encoding="utf-8")
    profile = _profile(path.parent, delimiter=",")
    fast = reading_text._read_csv_arrow(path, profile)
    if fast is None:  # a file the fast reader hands to the line-by-line reader is fine
        return
    original = reading_text._read_csv_arrow
    reading_text._read_csv_arrow = lambda *a: None  # the line-by-line reader (Python's csv module)
    try:
        plain, malformed = read_table(path, profile, "rows")
    finally:
        reading_text._read_csv_arrow = original
    assert malformed == []
    assert fast.to_numpy().tolist() == plain.frame.to_numpy().tolist()


def test_malformed_rows_fall_back_with_row_numbers(tmp_path: Path) -> None:
    path = tmp_path / "f.csv"
    path.write_text("id,name\n1,a\n2\n3,c,extra\n4,d\n", encoding="utf-8")
    profile = _profile(tmp_path)
    assert reading_text._read_csv_arrow(path, profile) is None
    table, malformed = read_table(path, profile, "events")
    assert malformed == [(2, "2", 1), (3, "3,c,extra", 3)]  # (data row, text, fields found)
    assert table.frame["id"].tolist() == ["1", "", "", "4"]


def test_other_encodings_use_the_line_reader(tmp_path: Path) -> None:
    path = tmp_path / "f.csv"
    path.write_bytes("id,name\n1,Ø\n".encode("latin-1"))
    profile = _profile(tmp_path, encoding="latin-1")
    assert reading_text._read_csv_arrow(path, profile) is None
    assert read_table(path, profile, "events")[0].frame["name"].tolist() == ["Ø"]


def _catch_values_reference(catch: pd.DataFrame) -> pd.DataFrame:
    """The plain pandas version (the implementation before the fast path)."""
    keys = ["event_id", "variable", "life_stage"]
    agg = catch.groupby(keys, dropna=False, sort=False).agg(
        weight=("weight", lambda s: s.sum(min_count=1)), count=("count", lambda s: s.sum(min_count=1)),
        rows=("row", list), n=("row", "size")).reset_index()
    parts = []
    for quantity, col in (("biomass", "weight"), ("count", "count")):
        part = agg[agg[col].notna()]
        parts.append(pd.DataFrame({"event_id": part["event_id"], "variable": part["variable"],
                                   "life_stage": part["life_stage"], "quantity": quantity,
                                   "value": part[col].astype(float), "rows": part["rows"], "n": part["n"]}))
    return pd.concat(parts, ignore_index=True)


def test_catch_aggregation_equals_pandas_groupby() -> None:
    rng = np.random.default_rng(5)
    n = 3000
    weight = rng.lognormal(0, 1, n)
    weight[rng.random(n) < 0.2] = np.nan
    count = rng.poisson(5, n).astype(float)
    count[rng.random(n) < 0.3] = np.nan
    catch = pd.DataFrame({
        "event_id": rng.choice(["H1", "H2", "H3", None], n),
        "variable": rng.choice(["Ostravix keldensis", "Lumbrena pallida"], n),
        "life_stage": pd.Series(rng.choice(["adult", "larva", None], n), dtype="string"),
        "weight": weight, "count": count, "row": np.arange(1, n + 1),
    }, index=rng.permutation(n) + 100)
    got = _catch_values(catch)
    ref = _catch_values_reference(catch)
    assert len(got) == len(ref)
    np.testing.assert_allclose(got["value"].to_numpy(), ref["value"].to_numpy(), rtol=1e-12)
    assert got["quantity"].tolist() == ref["quantity"].tolist()
    assert got["event_id"].astype(object).where(got["event_id"].notna(), None).tolist() == \
        ref["event_id"].astype(object).where(ref["event_id"].notna(), None).tolist()
    assert [list(r) for r in got["source_record_rows"]] == [list(r) for r in ref["rows"]]
    assert got["n_values"].tolist() == ref["n"].tolist()
    assert [list(f) for f in got["flags"]] == [["merged_rows"] if k > 1 else [] for k in ref["n"]]


def test_list_column_conversion_equals_python_lists() -> None:
    cells = pd.Series([[1, 2], np.array([3]), (4, 5), None, np.nan, pd.NA, [], "x"], dtype=object)
    got = _list_array(cells, pa.list_(pa.int64())).to_pylist()
    assert got == [[1, 2], [3], [4, 5], [], [], [], [], []]
    floats = pd.Series([[1.0, 2.0], None], dtype=object)
    assert _list_array(floats, pa.list_(pa.int64())).to_pylist() == [[1, 2], []]
    flags = pd.Series([["a"], None, ("b", "c")], dtype=object)
    assert _list_array(flags, pa.list_(pa.string())).to_pylist() == [["a"], [], ["b", "c"]]


NUMBERISH = st.one_of(
    st.floats(allow_nan=True, allow_infinity=True).map(repr),
    st.integers(min_value=-(10**30), max_value=10**30).map(str),
    st.text(alphabet="0123456789+-.eE ,_xabinfNAL/", max_size=8),
)


@given(st.lists(st.one_of(st.none(), NUMBERISH), max_size=30))
def test_to_float_equals_pandas_to_numeric(cells: list[str | None]) -> None:
    text = pd.Series(cells, dtype="string").str.strip()
    expected = pd.to_numeric(text, errors="coerce").astype("float64").to_numpy()
    got = fields.to_float(text).to_numpy()
    np.testing.assert_array_equal(got, expected)  # NaN == NaN here; same cells fail


@given(st.lists(st.one_of(st.none(), st.sampled_from(sorted(fields.NA_TOKENS)).map(str.upper),
                          st.text(max_size=6)), max_size=30))
def test_na_tokens_equal_casefold_lookup(cells: list[str | None]) -> None:
    text = pd.Series(cells, dtype="string")
    expected = (text.isna() | text.str.casefold().isin(fields.NA_TOKENS)).to_numpy(dtype=bool)
    assert fields._na_tokens(text).to_numpy(dtype=bool).tolist() == expected.tolist()


def test_partition_writer_equals_duckdb_partitioned_copy(tmp_path: Path) -> None:
    """Slices of the sorted table written one by one give DuckDB's own PARTITION_BY layout."""
    import duckdb

    from harmonize.store_layout import _write_partitions_sorted_in_copy, write_partitions

    rng = np.random.default_rng(2)
    n = 5000
    table = pa.table({
        "record_id": [f"r{i}" for i in range(n)],
        "source_kind": rng.choice(["trawl", "effort"], n),
        "season_year": pa.array(np.where(rng.random(n) < 0.05, None, rng.integers(2019, 2023, n)).tolist(),
                                pa.int32()),
        "event_start": pa.array(pd.to_datetime(rng.integers(0, 10**6, n), unit="s").astype("datetime64[us]")),
        "event_id": rng.choice(["H1", "H2", "H3"], n),
        "flags": pa.array([["a"] if i % 7 == 0 else [] for i in range(n)], pa.list_(pa.string())),
    })
    ours, theirs = tmp_path / "ours", tmp_path / "theirs"
    write_partitions(table, ours)
    con = duckdb.connect()
    _write_partitions_sorted_in_copy(con, table, theirs)
    con.close()
    dirs = {p.parent.relative_to(ours).as_posix() for p in ours.rglob("*.parquet")}
    assert dirs == {p.parent.relative_to(theirs).as_posix() for p in theirs.rglob("*.parquet")}
    assert "source_kind=trawl/season_year=__HIVE_DEFAULT_PARTITION__" in dirs

    def read(folder: Path) -> pd.DataFrame:
        return duckdb.sql(f"SELECT * FROM read_parquet('{folder}/**/*.parquet', hive_partitioning = true, "
                          "hive_types = {'source_kind': VARCHAR, 'season_year': INTEGER}) "
                          "ORDER BY record_id").df()

    pd.testing.assert_frame_equal(read(ours), read(theirs))
    # within each file, rows follow event_start then event_id
    for part in ours.rglob("*.parquet"):
        rows = duckdb.sql(f"SELECT event_start, event_id FROM read_parquet('{part}')").df()
        assert rows.equals(rows.sort_values(["event_start", "event_id"], kind="stable").reset_index(drop=True))


_KEY_ROWS = st.lists(st.tuples(st.sampled_from(["effort", "trawl", "transect"]),
                               st.one_of(st.none(), st.integers(2019, 2021)),
                               st.one_of(st.none(), st.integers(0, 3)),
                               st.sampled_from(["H1", "H10", "H2", "h1", "Ø1"])), max_size=12)


def _key_table(rows: list[tuple]) -> pa.Table:
    kinds, years, starts, ids = zip(*rows, strict=True) if rows else ((), (), (), ())
    return pa.table({
        "source_kind": pa.array(list(kinds), pa.string()),
        "season_year": pa.array(list(years), pa.int32()),
        "event_start": pa.array([None if s is None else pd.Timestamp("2020-01-01", tz="UTC") + pd.Timedelta(hours=s)
                                 for s in starts], pa.timestamp("us", tz="UTC")),
        "event_id": pa.array(list(ids), pa.string()),
        "record_id": pa.array([f"r{i}" for i in range(len(rows))], pa.string()),
    })


@given(_KEY_ROWS, st.booleans())
def test_store_order_check_agrees_with_a_sort(rows: list[tuple], sort_first: bool) -> None:
    """Rule: a table is in store order when sorting it by source_kind, season_year,
    event_start, event_id (nulls last, text by bytes as DuckDB orders VARCHAR) leaves it as
    it is. The writer slices such a table without sorting it (store_layout.in_store_order)."""
    from harmonize.store_layout import in_store_order

    def key(r: tuple) -> tuple:
        return tuple((v is None, v.encode() if isinstance(v, str) else (v or 0)) for v in r)

    if sort_first:
        rows = sorted(rows, key=key)
    expected = all(key(a) <= key(b) for a, b in zip(rows, rows[1:], strict=False))
    assert in_store_order(_key_table(rows)) == expected


@given(_KEY_ROWS)
def test_partition_writer_gives_the_same_files_sorted_or_not(tmp_path_factory: pytest.TempPathFactory,
                                                              rows: list[tuple]) -> None:
    """A table already in store order (sliced as it is) and the same rows in another order
    (sorted by DuckDB first) give the same partitions, rows and order within each file."""
    import duckdb

    from harmonize.store_layout import write_partitions

    if not rows:
        return
    table = _key_table(rows)
    con = duckdb.connect()
    con.register("t", table)
    ordered = con.sql("SELECT * FROM t ORDER BY source_kind, season_year, event_start, event_id, record_id") \
        .to_arrow_table()
    con.close()
    folder = tmp_path_factory.mktemp("parts")
    results = []
    for name, t in (("sorted", ordered), ("shuffled", table.take(np.random.default_rng(0).permutation(len(rows))))):
        write_partitions(t, folder / name)
        files = sorted(p.relative_to(folder / name).parent.as_posix() for p in (folder / name).rglob("*.parquet"))
        content = {d: duckdb.sql(f"SELECT event_start, event_id FROM read_parquet('{folder / name / d}/*.parquet')")
                   .fetchall() for d in files}
        results.append((files, content))
    assert results[0] == results[1]
