"""The memory-lean trawl path: integer-coded catch, zero-filling by code, block-wise writing.

The store a trawl ingest writes must not depend on how its rows were made: catch keys as
categorical codes, value lists as Arrow columns, observation rows made and written in
blocks. Each test compares the new path with a plain reference on the same input.
"""

from __future__ import annotations

import hashlib
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from examples import scaled
from hypothesis import given, settings
from hypothesis import strategies as st

import harmonize.ingest as ingest
from harmonize import Store, load_study
from harmonize.adapters.base import AdapterOutput
from harmonize.adapters.zero_filling import zero_fill
from harmonize.ingest import assemble, prepare, store_output
from tests.trawl_profiles import GENERATED_TRAWL_PROFILE, generated_hauls

#: Content digest of the messy trawl fixture's store (observation rows without ingest ids),
#: made by the implementation before the block-wise change (commit 8ccd175: one table, Python
#: lists), then renewed once for issue 17, whose changes to this content are deliberate and
#: tested on their own: new nullable columns (count_observed, subsample_fraction,
#: provider_record_id, track_*), the tow's track positions, and target windows read in season
#: years (haul H011 of 2019-12-15 is in season year 2020: no zeros of the 2015-2019 target).
#: Renewed for issue 21 (zone-aware UTC event times, the new density_unit column); before
#: renewing, the new content with times converted back to naive UTC and density_unit dropped
#: gave exactly the previous digest 64a2df5c...d579.
MESSY_DIGEST = "31434b70a528c040915549d7d3348c692eac661506b3fb36d6de99d53a2e626d"


def _content(study_dir: Path, ingest_id: str | None = None) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame]:
    """Observations, quarantine and ingest accounting of a store (or one ingest), without ids and times."""
    where = f"WHERE ingest_id = '{ingest_id}'" if ingest_id else ""
    with Store(load_study(study_dir).store_dir).connect() as con:
        obs = con.sql(f"SELECT * EXCLUDE (ingest_id) FROM observations {where} ORDER BY record_id").df()
        qua = con.sql(f"SELECT * EXCLUDE (ingest_id) FROM quarantine {where} ORDER BY source_file, source_row").df()
        ing = con.sql("SELECT rows_read, rows_accepted, rows_quarantined, records_written, records_zero_filled "
                      f"FROM ingests {where}").df()
    return obs, qua, ing


def _digest(obs: pd.DataFrame) -> str:
    text = obs.astype(str).to_csv(index=False)
    return hashlib.sha256(text.encode()).hexdigest()


def _inputs(study_dir: Path, hauls: str = "hauls_messy.csv", catch: str = "catch_messy.csv") -> dict[str, Path]:
    return {"events": study_dir / hauls, "records": study_dir / catch}


def test_messy_fixture_store_equals_previous_implementation(study_dir: Path) -> None:
    from harmonize import run

    result = run(load_study(study_dir), "trawl_agency", _inputs(study_dir))
    obs, qua, ing = _content(study_dir)
    assert _digest(obs) == MESSY_DIGEST
    assert len(qua) == 11 and ing["rows_read"].tolist() == [23]
    assert ing["records_written"].tolist() == [len(obs)] == [result.records_written]
    assert int(obs["zero_filled"].sum()) == result.records_zero_filled > 0


def _plain(out: AdapterOutput) -> AdapterOutput:
    """The same output with values as the adapters used to give them: text and Python lists."""
    va = out.values.copy()
    for col in va.columns:
        if isinstance(va[col].dtype, pd.CategoricalDtype):
            va[col] = va[col].astype(object).where(va[col].notna(), None)
        elif isinstance(va[col].dtype, pd.ArrowDtype):
            va[col] = pd.Series([list(v) for v in va[col]], index=va.index, dtype=object)
    va["n_vessels"] = pd.NA
    return AdapterOutput(out.events, va, out.quarantine, out.files, out.notes)


def _assembled(study_dir: Path, out: AdapterOutput, block_rows: int) -> pd.DataFrame:
    study = load_study(study_dir)
    _, profile = prepare(study, "trawl_agency")
    blocks = list(ingest.assemble_blocks(out, study, profile, "trawl", "test-ingest", block_rows=block_rows))
    assert all(b.num_rows <= block_rows for b in blocks)
    import pyarrow as pa

    return pa.concat_tables(blocks).to_pandas()


_TAXA = ["Ostravix keldensis", "keld cod", "LUMB PAL", "Syrranthus minor", "Gadoides ignotus", "red calverion", ""]


@st.composite
def _trawl_files(draw: st.DrawFn) -> tuple[str, str]:
    n_hauls = draw(st.integers(1, 6))
    hauls = generated_hauls(draw, n_hauls)
    rows = ["haul_id,species,life_stage,weight,count"]
    for _ in range(draw(st.integers(0, 25))):
        haul = draw(st.sampled_from([f"H{i}" for i in range(n_hauls)] + ["H99", ""]))
        taxon = draw(st.sampled_from(_TAXA))
        stage = draw(st.sampled_from(["adult", "Adult", "juvenile", ""]))
        weight = draw(st.sampled_from(["1.5", "0.25", "", "n.d."]))
        count = draw(st.sampled_from(["3", "", "12"]))
        rows.append(f"{haul},{taxon},{stage},{weight},{count}")
    if len(rows) == 1:
        rows.append("H0,keld cod,adult,1,1")
    return "\n".join(hauls) + "\n", "\n".join(rows) + "\n"




@settings(max_examples=scaled(15), deadline=None)
@given(files=_trawl_files(), block_rows=st.integers(1, 7))
def test_generated_trawl_input_coded_blocks_equal_plain_one_table(
    tmp_path_factory: pytest.TempPathFactory, files: tuple[str, str], block_rows: int
) -> None:
    import shutil

    study_dir = tmp_path_factory.mktemp("gen") / "study"
    shutil.copytree(Path(__file__).resolve().parent.parent / "fixtures" / "keldmar", study_dir)
    (study_dir / "profiles" / "trawl_agency.toml").write_text(GENERATED_TRAWL_PROFILE, encoding="utf-8")
    (study_dir / "h.csv").write_text(files[0], encoding="utf-8")
    (study_dir / "c.csv").write_text(files[1], encoding="utf-8")
    study = load_study(study_dir)
    adapter, profile = prepare(study, "trawl_agency")
    out = adapter.read(_inputs(study_dir, "h.csv", "c.csv"), profile, study)
    assert all(f.rows_read == f.rows_accepted + f.rows_quarantined for f in out.files)
    ours = _assembled(study_dir, out, block_rows)
    plain = _assembled(study_dir, _plain(out), 10**6)
    pd.testing.assert_frame_equal(ours, plain)
    # the values of the coded path equal what the public zero_fill infers on plain text
    zeros = out.values[out.values["zero_filled"]]
    assert len(zeros) == len(ours[ours["zero_filled"]])


def test_tiny_blocks_write_the_same_store_as_one_block(study_dir: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    study = load_study(study_dir)
    adapter, profile = prepare(study, "trawl_agency")
    out = adapter.read(_inputs(study_dir), profile, study)
    one = store_output(study, profile, adapter.kind, out)
    content_one = _content(study_dir, one.ingest_id)
    monkeypatch.setattr(ingest, "BLOCK_ROWS", 3)
    tiny = store_output(study, profile, adapter.kind, out, replace=True, inputs_sha256="another run")
    assert tiny.superseded == [one.ingest_id]
    with Store(study.store_dir).connect() as con:
        files = con.sql("SELECT count(*) FROM observation_files").fetchall()[0][0]
    assert files > 2  # several blocks: several files
    content_tiny = _content(study_dir, tiny.ingest_id)
    pd.testing.assert_frame_equal(content_one[0], content_tiny[0])
    pd.testing.assert_frame_equal(content_one[1], content_tiny[1])
    pd.testing.assert_frame_equal(content_one[2], content_tiny[2])
    assert tiny.records_written == one.records_written == len(content_one[0])
    assert tiny.records_zero_filled == one.records_zero_filled
    # assemble() (one table) holds the rows of the blocks, in the same order
    whole = assemble(out, study, profile, "trawl", "x")
    blocks = list(ingest.assemble_blocks(out, study, profile, "trawl", "x", block_rows=4))
    assert len(blocks) > 1
    assert whole["record_id"].to_pylist() == [r for b in blocks for r in b["record_id"].to_pylist()]
    assert sorted(whole["record_id"].to_pylist()) == content_one[0]["record_id"].tolist()


def _zero_fill_reference(events: pd.DataFrame, caught: pd.DataFrame, blocked: pd.DataFrame,
                         targets: pd.DataFrame, quantities: list[tuple[str, str]]) -> pd.DataFrame:
    """The merge-based zero_fill before integer codes (commit 8ccd175), for comparison, with
    the shared rule that an unstaged catch blocks the staged zeros of its taxon."""
    pairs = events[["event_id", "year"]].merge(
        targets.rename(columns={"taxon": "variable"})[["variable", "life_stage", "first_year", "last_year"]],
        how="cross")
    year = pairs["year"].astype("int64")
    valid = (pairs["first_year"].isna() | (year >= pairs["first_year"].fillna(0))) & (
        pairs["last_year"].isna() | (year <= pairs["last_year"].fillna(9999)))
    pairs = pairs[valid.to_numpy()]
    any_stage = caught[["event_id", "variable"]].drop_duplicates().assign(_hit=True)
    staged = caught[["event_id", "variable", "life_stage"]].dropna().drop_duplicates().assign(_hit_stage=True)
    pairs = pairs.merge(any_stage, on=["event_id", "variable"], how="left")
    pairs = pairs.merge(staged, on=["event_id", "variable", "life_stage"], how="left")
    # a catch without a stage may be any stage: it meets staged targets too (issue 17)
    unstaged = caught[caught["life_stage"].isna()][["event_id", "variable"]].drop_duplicates().assign(_any=True)
    pairs = pairs.merge(unstaged, on=["event_id", "variable"], how="left")
    met = np.where(pairs["life_stage"].isna(), pairs["_hit"].notna(),
                   pairs["_hit_stage"].notna() | pairs["_any"].notna())
    pairs = pairs[~met]
    if len(blocked):
        pairs = pairs.merge(blocked[["event_id", "variable"]].drop_duplicates().assign(_blocked=True),
                            on=["event_id", "variable"], how="left")
        pairs = pairs[pairs["_blocked"].isna()]
    q = pd.DataFrame(quantities, columns=["quantity", "unit"])
    zeros = pairs[["event_id", "variable", "life_stage"]].merge(q, how="cross")
    zeros["value"] = 0.0
    return zeros.reset_index(drop=True)


@settings(max_examples=scaled(60), deadline=None)
@given(data=st.data())
def test_zero_fill_by_codes_equals_merges(data: st.DataObject) -> None:
    from types import SimpleNamespace

    taxa = ["A a", "B b", "C c"]
    targets = pd.DataFrame({
        "protocol": "p",
        "taxon": data.draw(st.lists(st.sampled_from(taxa), min_size=1, max_size=4)),
    })
    k = len(targets)
    targets["life_stage"] = data.draw(st.lists(st.sampled_from([None, "adult", "larva"]), min_size=k, max_size=k))
    targets["first_year"] = data.draw(st.lists(st.sampled_from([None, 2019.0]), min_size=k, max_size=k))
    targets["last_year"] = data.draw(st.lists(st.sampled_from([None, 2020.0]), min_size=k, max_size=k))
    n_ev = data.draw(st.integers(1, 5))
    events = pd.DataFrame({"event_id": [f"E{i}" for i in range(n_ev)],
                           "year": data.draw(st.lists(st.sampled_from([2018, 2019, 2021]), min_size=n_ev,
                                                      max_size=n_ev))})
    m = data.draw(st.integers(0, 12))
    pick = st.lists(st.sampled_from([f"E{i}" for i in range(n_ev)] + ["E9"]), min_size=m, max_size=m)
    caught = pd.DataFrame({"event_id": data.draw(pick),
                           "variable": data.draw(st.lists(st.sampled_from(taxa + ["D d"]), min_size=m, max_size=m)),
                           "life_stage": data.draw(st.lists(st.sampled_from([None, "adult", "larva"]),
                                                            min_size=m, max_size=m))})
    caught = caught.astype({"event_id": "str", "variable": "str", "life_stage": object})  # text even when empty
    b = data.draw(st.integers(0, 3))
    blocked = pd.DataFrame({"event_id": data.draw(st.lists(st.sampled_from(["E0", "E1"]), min_size=b, max_size=b)),
                            "variable": data.draw(st.lists(st.sampled_from(taxa), min_size=b, max_size=b))})
    quantities = [("biomass", "kg"), ("count", "1")]
    study = SimpleNamespace(targets=targets)
    expected = _zero_fill_reference(events, caught, blocked, targets, quantities)
    for keys in (caught, caught.astype({"event_id": "category", "variable": "category", "life_stage": "category"})):
        got = zero_fill(events, keys, blocked, study, "p", quantities)  # type: ignore[arg-type]
        assert got[["event_id", "variable", "quantity", "unit"]].astype(object).values.tolist() == \
            expected[["event_id", "variable", "quantity", "unit"]].astype(object).values.tolist()
        assert got["life_stage"].isna().tolist() == expected["life_stage"].isna().tolist()
        assert (got["value"] == 0.0).all()


def test_keep_only_keeps_rejected_rows_raw_text(tmp_path: Path) -> None:
    from harmonize.reading.text import read_table

    path = tmp_path / "c.csv"
    path.write_text("haul,taxon\nH1,a\nH2,b\nH3,\"c, d\"\nH4,e\n", encoding="utf-8")
    study_profile = load_study(Path(__file__).resolve().parent.parent / "fixtures" / "keldmar")
    _, profile = prepare(study_profile, "trawl_agency")
    table, _ = read_table(path, profile, "records")
    before = table.raw_json(np.array([1, 2]))
    table.keep_only(np.array([False, True, True, False]))
    assert table.n_rows == 4 and len(table.frame) == 2
    assert table.raw_json(np.array([1, 2])) == before == ['{"haul": "H2", "taxon": "b"}', '{"haul": "H3", "taxon": "c, d"}']


@settings(max_examples=scaled(60), deadline=None)
@given(events=st.lists(st.sampled_from(["H1", "H2", "H3", "H 4", "H;5"]), max_size=6),
       values=st.lists(st.one_of(st.none(), st.sampled_from(["H1", "H3", "H;5", "X9"])), max_size=12))
def test_distinct_present_equals_the_set_of_values(events: list[str], values: list[str | None]) -> None:
    # The distinct-id lookup behind events_without_values and the trawl adapter gives what a
    # row-by-row isin gives, for plain text ids and for categorical ones (coded catch keys).
    from harmonize.membership import distinct_present

    ev = pd.Series(events, dtype="str")
    va = pd.Series(values, dtype="str")
    expected = [e in {v for v in values if v is not None} for e in events]
    assert ev.isin(distinct_present(va)).tolist() == expected
    assert ev.isin(distinct_present(va.astype("category"))).tolist() == expected


_TEXT = st.one_of(st.none(), st.sampled_from(["H1", "H2", "h1", "H10", "", " H1"]))


@given(st.lists(_TEXT, max_size=30), st.lists(_TEXT, max_size=10),
       st.sampled_from(["string[pyarrow]", "category", "large_string"]))
def test_is_in_answers_as_pandas_isin(values: list, lookup: list, dtype: str) -> None:
    """is_in (Arrow or category codes) gives what pandas' isin on plain Python objects gives
    (other dtypes go to pandas' isin itself)."""
    from harmonize.membership import is_in

    if dtype == "large_string":
        import pyarrow as pa

        series = pd.Series(values, dtype=pd.ArrowDtype(pa.large_string()))
    else:
        series = pd.Series(values, dtype=dtype)
    expected = pd.Series(values, dtype=object).isin(pd.Series(lookup, dtype=object)).to_numpy()
    for as_ in (pd.Series(lookup, dtype="string[pyarrow]"), np.asarray(lookup, dtype=object)):
        assert is_in(series, as_).tolist() == expected.tolist()
