"""Fuzzing the text reader: its two paths agree, and the long-line guard never misses a line.

``read_table`` reads well-formed UTF-8 files with Arrow's CSV reader and everything else
line by line; on any input, broken or not, both must give the same cells, row numbers and
malformed-line accounting (or the same refusal). The guard against endless lines is
checked against the obvious definition (the longest run of bytes between line breaks).
"""

from __future__ import annotations

from pathlib import Path
from unittest import mock

import pytest
from fuzzing import Mutation, mutate_all, mutations
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from harmonize.errors import InputFileError
from harmonize.profile import Profile
from harmonize.reading import text as reading_text

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
SAMPLES = sorted(p for kind in ("trawl", "plankton", "transect", "opportunistic", "effort")
                 for p in (FIXTURES / kind).glob("*.csv"))
_SETTINGS = settings(suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])


def _profile(tmp: Path) -> Profile:
    return Profile(path=tmp / "p.toml", source_id="fuzz", kind="trawl", provider_type="agency", protocol=None)


def _read(path: Path, profile: Profile) -> tuple[list[str], list[list[object]], list[tuple[int, str]]] | str:
    try:
        table, malformed = reading_text.read_table(path, profile, "rows")
    except InputFileError as exc:
        return f"refused: {exc.problem}"
    return list(table.frame.columns), table.frame.to_numpy().tolist(), list(malformed)


@_SETTINGS
@given(sample=st.sampled_from(SAMPLES), ms=st.lists(mutations(), min_size=0, max_size=4))
def test_arrow_and_line_readers_agree_on_broken_files(tmp_path: Path, sample: Path, ms: list[Mutation]) -> None:
    path = tmp_path / sample.name
    path.write_bytes(mutate_all(sample.read_bytes(), ms))
    profile = _profile(tmp_path)
    either = _read(path, profile)
    with mock.patch.object(reading_text, "_read_csv_arrow", lambda *_: None):
        line_by_line = _read(path, profile)
    assert either == line_by_line


@_SETTINGS
@given(data=st.binary(max_size=60).map(lambda b: bytes(x % 4 for x in b)),
       limit=st.integers(1, 12), block=st.integers(1, 16))
def test_long_line_guard_matches_the_longest_line(tmp_path: Path, data: bytes, limit: int, block: int) -> None:
    # bytes 0..3 map to a, b, \n, \r: short files dense in line breaks of both kinds
    text = data.translate(bytes.maketrans(b"\x00\x01\x02\x03", b"ab\n\r"))
    path = tmp_path / "lines.csv"
    path.write_bytes(text)
    longest = max(len(run) for run in text.replace(b"\r", b"\n").split(b"\n"))
    try:
        reading_text.refuse_long_lines(path, limit=limit, block_size=block)
        refused = False
    except InputFileError as exc:
        refused = True
        assert "is longer than" in str(exc) and str(path) in str(exc)
    assert refused == (longest > limit)


# ------------------------------------------------------------------ the oracle's own count
@pytest.mark.parametrize(("data", "rows"), [
    (b"a,b\n1,2\n3,4\n", 2),
    (b"\xef\xbb\xbfa,b\n1,2\n", 1),                 # a byte-order mark is not a cell
    (b"a,b\n\n1,2\n , \n,\n3,4", 2),                # blank lines and blank cells take no number
    (b"a,b\r1,2\r3,4\r", 2),                        # bare carriage returns end lines
    (b'a,b\n"x\ny",2\n3,4\n', 2),                   # a quoted cell spans two lines: one row
    (b"a,b\n1,2\na,b\n1,2,3\n", 3),                 # a repeated header and a long row are rows
    (b"a;b\n1,5;2\n", 1),                           # semicolons: the header's most frequent delimiter
    (b"a,b\n1,\xe92\n", None),                      # not UTF-8: not a text file to count
    (b"\n\n", None),                                # no header
])
def test_the_fuzz_oracle_counts_data_rows_as_a_person_does(data: bytes, rows: int | None) -> None:
    from fuzzing import count_data_rows

    assert count_data_rows(data) == rows


def test_an_internal_error_is_never_an_acceptable_refusal(study: object, tmp_path: Path) -> None:
    import fuzzing

    from harmonize.errors import HarmonizeError

    path = tmp_path / "hauls.csv"
    path.write_text("a\n1\n")
    message = f"internal accounting error in {path.name}: 3 rows read, 1 accepted + 1 quarantined; please report this"
    with mock.patch.object(fuzzing, "run", side_effect=HarmonizeError(message)), \
            pytest.raises(AssertionError, match="an internal error is a bug"):
        fuzzing.check_outcome(study, "trawl_agency", {"rows": path})  # type: ignore[arg-type]
    with mock.patch.object(fuzzing, "run", side_effect=HarmonizeError(f"{path.name}: the file has no header row")):
        assert fuzzing.check_outcome(study, "trawl_agency", {"rows": path}).refused  # type: ignore[arg-type]
