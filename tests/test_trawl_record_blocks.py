"""A catch file read in blocks of rows gives what the whole file read at once gives.

The trawl adapter reads its catch file block by block (harmonize.reading.blocks)
and makes its values a run of hauls at a time (TrawlValues); the store must not depend on
where blocks and runs begin and end. Tiny blocks (a few rows, a few bytes of text) force
many of them, rows that span blocks, and the fall-back to the line-by-line reader after
some blocks were read.
"""

from __future__ import annotations

import re
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from examples import scaled
from hypothesis import given, settings
from hypothesis import strategies as st

import harmonize.ingest as ingest
import harmonize.reading.blocks as record_blocks
from harmonize import Store, load_study
from harmonize.contract import fields
from harmonize.errors import InputFileError
from harmonize.ingest import prepare
from harmonize.reading.fields import coerce_fields
from harmonize.reading.quarantine import Rejections
from harmonize.reading.text import read_table
from tests.trawl_profiles import GENERATED_TRAWL_PROFILE, generated_hauls

FIXTURE = Path(__file__).resolve().parent.parent / "fixtures" / "keldmar"


_TAXA = ["Ostravix keldensis", "keld cod", "LUMB PAL", "Syrranthus minor", "Gadoides ignotus", "\"red, calverion\"", ""]


@st.composite
def _files(draw: st.DrawFn) -> tuple[str, str]:
    """A haul file and a catch file with the usual troubles: unknown hauls and taxa, bad
    numbers, empty cells, blank lines, quoted delimiters, and (sometimes) a malformed line."""
    n_hauls = draw(st.integers(1, 5))
    hauls = generated_hauls(draw, n_hauls)
    rows = ["haul_id,species,life_stage,weight,count"]
    for _ in range(draw(st.integers(1, 30))):
        kind = draw(st.sampled_from(["row"] * 8 + ["blank", "malformed"]))
        if kind == "blank":
            rows.append("")
            continue
        if kind == "malformed":
            rows.append("H0,keld cod,adult")
            continue
        haul = draw(st.sampled_from([f"H{i}" for i in range(n_hauls)] + ["H99", ""]))
        taxon = draw(st.sampled_from(_TAXA))
        stage = draw(st.sampled_from(["adult", "Adult", "juvenile", ""]))
        weight = draw(st.sampled_from(["1.5", "0.25", "", "n.d.", "-2"]))
        count = draw(st.sampled_from(["3", "", "12"]))
        rows.append(f"{haul},{taxon},{stage},{weight},{count}")
    return "\n".join(hauls) + "\n", "\n".join(rows) + "\n"


def _study(root: Path, files: tuple[str, str]) -> Path:
    study_dir = root / "study"
    shutil.copytree(FIXTURE, study_dir)
    (study_dir / "profiles" / "trawl_agency.toml").write_text(GENERATED_TRAWL_PROFILE, encoding="utf-8")
    (study_dir / "h.csv").write_text(files[0], encoding="utf-8")
    (study_dir / "c.csv").write_text(files[1], encoding="utf-8")
    return study_dir


def _store_content(study_dir: Path) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame]:
    """Observations, quarantine and accounting, without ids and times, in a stable order."""
    with Store(load_study(study_dir).store_dir).connect() as con:
        obs = con.sql("SELECT * EXCLUDE (ingest_id) FROM observations ORDER BY ALL").df()
        qua = con.sql("SELECT * EXCLUDE (ingest_id) FROM quarantine ORDER BY ALL").df()
        ing = con.sql("SELECT rows_read, rows_accepted, rows_quarantined, records_written, records_zero_filled "
                      "FROM ingests").df()
    return obs, qua, ing


@settings(max_examples=scaled(12), deadline=None)
@given(files=_files(), block_bytes=st.integers(1, 120), line_rows=st.integers(1, 4), block_rows=st.integers(1, 6))
def test_tiny_blocks_and_runs_write_the_same_store_as_one(
    tmp_path_factory: pytest.TempPathFactory, files: tuple[str, str], block_bytes: int, line_rows: int,
    block_rows: int,
) -> None:
    from harmonize import run

    whole = _study(tmp_path_factory.mktemp("whole"), files)
    try:
        run(load_study(whole), "trawl_agency", {"events": whole / "h.csv", "records": whole / "c.csv"})
    except InputFileError:  # a catch file of blank lines only: refused alike (the test below)
        return
    tiny = _study(tmp_path_factory.mktemp("tiny"), files)
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(record_blocks, "BLOCK_BYTES", block_bytes)
        mp.setattr(record_blocks, "LINE_BLOCK_ROWS", line_rows)
        mp.setattr(ingest, "BLOCK_ROWS", block_rows)
        run(load_study(tiny), "trawl_agency", {"events": tiny / "h.csv", "records": tiny / "c.csv"})
    for a, b in zip(_store_content(whole), _store_content(tiny), strict=True):
        pd.testing.assert_frame_equal(a, b)


@settings(max_examples=scaled(25), deadline=None)
@given(files=_files(), block_bytes=st.integers(1, 200), line_rows=st.integers(1, 5))
def test_block_reader_equals_whole_file_reader(tmp_path_factory: pytest.TempPathFactory, files: tuple[str, str],
                                               block_bytes: int, line_rows: int) -> None:
    # The reference is the whole-file reader and typing (read_table + coerce_fields), which
    # the rest of the adapters use: same typed values, same rejections (row, reason,
    # message) and the same raw text of every row.
    study_dir = _study(tmp_path_factory.mktemp("r"), files)
    study = load_study(study_dir)
    _, profile = prepare(study, "trawl_agency")
    specs = fields("trawl_records")
    path = study_dir / "c.csv"
    expected_rej = Rejections()
    got_rej = Rejections()
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(record_blocks, "BLOCK_BYTES", block_bytes)
        mp.setattr(record_blocks, "LINE_BLOCK_ROWS", line_rows)
        try:
            table, malformed = read_table(path, profile, "records")
        except InputFileError as exc:  # e.g. only blank lines: the same refusal
            with pytest.raises(InputFileError, match=re.escape(str(exc))):
                record_blocks.read_typed_blocks(path, profile, "records", specs, got_rej, "trawl_records")
            return
        raw, got = record_blocks.read_typed_blocks(path, profile, "records", specs, got_rej, "trawl_records")
    expected = coerce_fields(table, specs, profile, expected_rej, "trawl_records", malformed)
    assert raw.n_rows == table.n_rows
    assert list(raw.frame.columns) == list(table.frame.columns)
    for spec in specs:
        a, b = expected[spec.name], got[spec.name]
        if spec.type == "string":
            assert isinstance(b.dtype, pd.CategoricalDtype)
            assert a.astype(object).where(a.notna(), None).tolist() == b.astype(object).where(b.notna(), None).tolist()
        else:
            np.testing.assert_array_equal(a.to_numpy(dtype=float, na_value=np.nan), b.to_numpy(dtype=float, na_value=np.nan))
    pd.testing.assert_frame_equal(got_rej.to_frame([raw]), expected_rej.to_frame([table]))
    every = np.arange(table.n_rows)
    assert raw.raw_json(every) == table.raw_json(every)
    keep = np.zeros(table.n_rows, dtype=bool)
    keep[::2] = True
    raw.keep_only(keep)
    table.keep_only(keep)
    assert raw.raw_json(every[::2]) == table.raw_json(every[::2])
