"""Bad trawl input: one clear sentence naming file, row and column; nothing is lost."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from examples import scaled
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from trawl_profiles import BASIC_PROFILE

from harmonize import load_study, run
from harmonize.errors import ConfigError, InputFileError, ReasonCode

HAULS = """HAUL_NO,START,END,LAT_S,LON_S,LAT_E,LON_E,WING_M,DEPTH_FM
A1,2021-07-01T06:00,2021-07-01T06:30,43.0,-153.0,43.025,-153.0,20,40
A2,2021-07-02T06:00,2021-07-02T06:30,43.5,-151.5,43.525,-151.5,20,60
"""
CATCH = """HAUL,SPECIES,WT_G,N
A1,keld cod,1000,2
"""



@pytest.fixture(autouse=True)
def _basic_profile(study_dir: Path) -> None:
    (study_dir / "profiles" / "trawl_basic.toml").write_text(BASIC_PROFILE)


def _write(study_dir: Path, hauls: str | bytes = HAULS, catch: str | bytes = CATCH) -> dict[str, Path]:
    ev, rc = study_dir / "h.csv", study_dir / "c.csv"
    for path, content in ((ev, hauls), (rc, catch)):
        path.write_bytes(content.encode() if isinstance(content, str) else content)
    return {"events": ev, "records": rc}


def test_clean_file_gives_expected_rows(study_dir: Path) -> None:
    study = load_study(study_dir)
    result = run(study, "trawl_basic", _write(study_dir), write=False)
    assert result.rows_quarantined == 0
    # A1: 1 taxon caught x 2 quantities + 2 uncaught targets x 2 zeros (Syrranthus from 2019,
    # Calverion only until 2019); A2: 3 targets x 2 zeros
    assert result.records_written == 2 + 4 + 6
    assert result.records_zero_filled == 10


def test_row_split_with_another_delimiter_names_both_field_counts(study_dir: Path) -> None:
    # A catch line written with semicolons reads as one field; the message says how many
    # fields the row has and how many the header has, as the ping reader's message does.
    study = load_study(study_dir)
    catch = CATCH + "A2;keld cod;500;1\n"
    result = run(study, "trawl_basic", _write(study_dir, catch=catch), write=False)
    q = result.quarantine
    bad = q[q["source_file"] == "c.csv"]
    assert list(zip(bad["source_row"], bad["reason_code"], bad["message"], strict=True)) == [
        (2, "bad_type", "row has a different number of fields than the header (1 instead of 4); "
                        "check delimiters and quotes")]


def test_missing_column_names_file_profile_and_columns(study_dir: Path) -> None:
    study = load_study(study_dir)
    inputs = _write(study_dir, hauls=HAULS.replace("WING_M", "WIDTH"))
    with pytest.raises(InputFileError, match=r"h\.csv: column 'WING_M', which trawl_basic\.toml \[columns\.events\] maps to field 'net_width_m', is not in the file; columns are: HAUL_NO, .*WIDTH"):
        run(study, "trawl_basic", inputs, write=False)


def test_empty_file(study_dir: Path) -> None:
    study = load_study(study_dir)
    with pytest.raises(InputFileError, match=r"c\.csv: the file is empty"):
        run(study, "trawl_basic", _write(study_dir, catch=""), write=False)


def test_header_only_file(study_dir: Path) -> None:
    study = load_study(study_dir)
    with pytest.raises(InputFileError, match=r"h\.csv: the file has a header but no data rows"):
        run(study, "trawl_basic", _write(study_dir, hauls=HAULS.splitlines()[0] + "\n"), write=False)


def test_wrong_encoding_says_how_to_fix(study_dir: Path) -> None:
    study = load_study(study_dir)
    latin = CATCH.replace("keld cod", "Ostravix keldensis").encode() + b"A2,pale lumb,5,1\n" + "A2,Øst,5,1\n".encode("latin-1")
    with pytest.raises(InputFileError, match=r"c\.csv: is not valid utf-8 text \(byte 0xd8 at offset \d+\); re-save it as UTF-8 or set \[source\] encoding"):
        run(study, "trawl_basic", _write(study_dir, catch=latin), write=False)


def test_declared_encoding_is_used(study_dir: Path) -> None:
    profile = study_dir / "profiles" / "trawl_basic.toml"
    profile.write_text(profile.read_text().replace('timezone = "UTC"', 'timezone = "UTC"\nencoding = "latin-1"'))
    study = load_study(study_dir)
    catch = (CATCH + "A2,Østravix,5,1\n").encode("latin-1")
    result = run(study, "trawl_basic", _write(study_dir, catch=catch), write=False)
    assert result.quarantine["message"].tolist() == ["taxon 'Østravix' is not in the taxa list; closest known: Ostravix keldensis"]


def test_unknown_unit_is_a_config_error(study_dir: Path) -> None:
    profile = study_dir / "profiles" / "trawl_basic.toml"
    profile.write_text(profile.read_text().replace('weight = "g"', 'weight = "stane"'))
    study = load_study(study_dir)
    with pytest.raises(ConfigError, match=r"trawl_basic.toml: \[units\] weight: 'stane' is not a unit pint or UDUNITS "
                       r"reads .*; give a mass unit in UDUNITS or pint spelling, e\.g\. kg, g, grams"):
        run(study, "trawl_basic", _write(study_dir), write=False)
    profile.write_text(profile.read_text().replace('weight = "stane"', 'weight = "fathoms"'))
    with pytest.raises(ConfigError, match=r"\[units\] weight: 'fathoms' is fathom, a unit of \[length\], not a mass unit"):
        run(load_study(study_dir), "trawl_basic", _write(study_dir), write=False)


def test_profile_field_that_does_not_exist(study_dir: Path) -> None:
    profile = study_dir / "profiles" / "trawl_basic.toml"
    profile.write_text(profile.read_text().replace('net_width_m = "WING_M"', 'net_width = "WING_M"'))
    study = load_study(study_dir)
    with pytest.raises(ConfigError, match=r"columns\.events\.net_width: 'net_width' is not a field of this adapter; fields: .*net_width_m"):
        run(study, "trawl_basic", _write(study_dir), write=False)


@pytest.mark.parametrize(
    ("old", "new", "reason", "message"),
    [
        ("2021-07-02T06:00,", "02/31/2021 06:00,", "bad_time", "start_time (column 'START') holds '02/31/2021 06:00', which is not a date-time"),
        (",20,60", ",twenty,60", "bad_type", "net_width_m (column 'WING_M') holds 'twenty', which is not a number"),
        (",20,60", ",0,60", "out_of_range", "net_width_m (column 'WING_M') = 0 m is outside the allowed range (> 0 and <= 300 m)"),
        (",20,60", ",,60", "missing_value", "net_width_m (column 'WING_M') is empty"),
        ("2021-07-02T06:30", "2021-07-02T06:00", "bad_effort", "tow duration is 0"),
        ("43.525,-151.5", "43.5,-151.5", "bad_effort", "area swept is 0"),
        ("43.5,-151.5,43.525", "49.5,-151.5,49.525", "outside_domain", "tow midpoint (49.5125, -151.5000) lies outside the study domain"),
    ],
)
def test_bad_haul_values(study_dir: Path, old: str, new: str, reason: str, message: str) -> None:
    study = load_study(study_dir)
    assert old in HAULS
    result = run(study, "trawl_basic", _write(study_dir, hauls=HAULS.replace(old, new, 1)), write=False)
    q = result.quarantine
    assert q["source_file"].tolist() == ["h.csv"] and q["source_row"].tolist() == [2]
    assert q["reason_code"].tolist() == [reason]
    assert message in q["message"].iloc[0]
    assert result.rows_read == result.rows_accepted + result.rows_quarantined == 3


def test_slow_tow_message_gives_numbers(study_dir: Path) -> None:
    # 0.4 km in 30 min = 0.43 knots, below the 0.5 knot floor
    study = load_study(study_dir)
    hauls = HAULS.replace("43.5,-151.5,43.525,-151.5", "43.5,-151.5,43.5036,-151.5")
    q = run(study, "trawl_basic", _write(study_dir, hauls=hauls), write=False).quarantine
    assert q["reason_code"].tolist() == ["implausible_speed"]
    assert q["message"].iloc[0].startswith("towing speed 0.43 knots (0.400 km in 30 min) is outside 0.5-8 knots")


def test_time_zone_of_profile_is_applied(study_dir: Path) -> None:
    profile = study_dir / "profiles" / "trawl_basic.toml"
    profile.write_text(profile.read_text().replace('timezone = "UTC"', 'timezone = "Pacific/Honolulu"'))
    study = load_study(study_dir)
    hauls = HAULS.replace("2021-07-02T06:00,2021-07-02T06:30", "2021-07-02T06:00+00:00,2021-07-02T06:30Z")
    run(study, "trawl_basic", _write(study_dir, hauls=hauls))
    from harmonize import Store

    with Store(study.store_dir).connect() as con:
        starts = dict(con.execute("SELECT DISTINCT event_id, event_start FROM observations").fetchall())
    assert starts["A1"] == pd.Timestamp("2021-07-01 16:00", tz="UTC")  # HST is UTC-10, no DST
    assert starts["A2"] == pd.Timestamp("2021-07-02 06:00", tz="UTC")  # explicit offsets win


# --- property: whatever the damage, every row is accounted for --------------------------------

_DAMAGE = st.sampled_from(["", "abc", "-1", "1e400", "NaN", "2021-02-30", "  ", '"', "99999", "=1+2", "-999"])


@settings(suppress_health_check=[HealthCheck.function_scoped_fixture], max_examples=scaled(30))
@given(cells=st.lists(st.tuples(st.integers(0, 5), st.integers(0, 8), _DAMAGE), min_size=1, max_size=12),
       catch_cells=st.lists(st.tuples(st.integers(0, 5), st.integers(0, 3), _DAMAGE), max_size=8))
def test_every_row_is_accepted_or_quarantined(study_dir: Path, cells, catch_cells) -> None:  # type: ignore[no-untyped-def]
    rng = np.random.default_rng(0)
    n = 6
    hauls = pd.DataFrame({
        "HAUL_NO": [f"H{i}" for i in range(n)],
        "START": [f"2021-07-0{i + 1}T06:00" for i in range(n)],
        "END": [f"2021-07-0{i + 1}T06:30" for i in range(n)],
        "LAT_S": 43.0 + rng.uniform(0, 1, n).round(3), "LON_S": -153.0 + rng.uniform(0, 2, n).round(3),
    })
    hauls["LAT_E"] = hauls["LAT_S"] + 0.025
    hauls["LON_E"] = hauls["LON_S"]
    hauls["WING_M"], hauls["DEPTH_FM"] = 20, 50
    hauls = hauls.astype(str)
    catch = pd.DataFrame({"HAUL": [f"H{i % n}" for i in range(n)], "SPECIES": "keld cod", "WT_G": "1000", "N": "3"})
    for r, c, v in cells:
        hauls.iat[r, c] = v
    for r, c, v in catch_cells:
        catch.iat[r, c] = v
    study = load_study(study_dir)
    result = run(study, "trawl_basic", _write(study_dir, hauls.to_csv(index=False), catch.to_csv(index=False)), write=False)
    for f in result.files:
        assert f.rows_read == f.rows_accepted + f.rows_quarantined
    # a line of nothing but delimiters carries no data: like a blank line, it is not a data row
    data_rows = sum(int((frame.astype(str).apply(lambda c: c.str.strip()) != "").any(axis=1).sum())
                    for frame in (hauls, catch))
    assert result.rows_read == data_rows
    q = result.quarantine
    assert set(q["reason_code"]) <= {c.value for c in ReasonCode}
    assert not q.duplicated(["source_file", "source_row"]).any()
    assert q["message"].str.len().min() > 10 if len(q) else True
