"""The shared opening of the two-table kinds (adapters/event_record.py): one rule, one wording.

Each kind's messy fixture repeats an event id (H002, P002, S02); the
expected messages are written out here, not built by the code under test.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest

from harmonize import load_study, run
from harmonize.adapters.event_record import EventRecordAdapter
from harmonize.adapters.registry import get_adapter

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"

KINDS = [
    # profile, events file, records file, repeated id and its second data row, what the
    # message calls an event
    ("trawl_agency", "trawl/hauls_messy.csv", "trawl/catch_messy.csv", "H002", 3, "haul"),
    ("plankton_agency", "plankton/tows_messy.csv", "plankton/counts_messy.csv", "P002", 4, "tow"),
    ("transect_agency", "transect/segments_messy.csv", "transect/birds_messy.csv", "S02", 4, "segment"),
]


@pytest.mark.parametrize("kind", ["trawl", "plankton", "transect"])
def test_the_two_table_kinds_share_the_opening(kind: str) -> None:
    assert isinstance(get_adapter(kind), EventRecordAdapter)


@pytest.mark.parametrize(("profile", "events", "records", "repeated", "again", "word"), KINDS)
def test_a_repeated_event_id_and_records_of_rejected_events(study_dir: Path, profile: str, events: str,
                                                           records: str, repeated: str, again: int, word: str) -> None:
    ev, rc = study_dir / Path(events).name, study_dir / Path(records).name
    shutil.copy(FIXTURES / events, ev)
    shutil.copy(FIXTURES / records, rc)
    result = run(load_study(study_dir), profile, {"events": ev, "records": rc}, write=False)
    q = result.quarantine
    dup = q[(q["source_file"] == ev.name) & (q["reason_code"] == "duplicate_record")]
    assert dup["source_row"].tolist() == [again]
    assert dup["message"].iloc[0] == (
        f"{word} '{repeated}' appears earlier in the file; only its first row counts (when that row is "
        "quarantined too, correct it and drop this one)")
    # a record of an event that went to quarantine follows it, naming the event's row and reason
    by_row = q[q["source_file"] == ev.name].set_index("source_row")
    followers = q[(q["source_file"] == rc.name) & q["message"].str.startswith(f"its {word} '")]
    assert len(followers) > 0
    for message, reason in zip(followers["message"], followers["reason_code"], strict=True):
        row = int(message.split("(events row ")[1].split(")")[0])
        assert reason == by_row.loc[row, "reason_code"]
        assert message.endswith(f"was rejected: {by_row.loc[row, 'message']}")
    orphans = q[(q["source_file"] == rc.name) & (q["reason_code"] == "orphan_record")]
    assert all(m.startswith(f"{word} '") and m.endswith("' is not in the events file") for m in orphans["message"])
    assert result.rows_read == result.rows_accepted + result.rows_quarantined


def test_the_volunteer_record_id_uses_the_same_wording(study_dir: Path) -> None:
    rows = "\n".join([
        "sighting_id,list_id,obs_time,latitude,longitude,observer_name,species,how_many,all_reported,minutes_watched,km_travelled",
        "R1,C1,2021-06-01T08:00:00Z,43.0,-152.0,Ann,Procellix keldica,2,true,30,1",
        "R1,C1,2021-06-01T08:00:00Z,43.0,-152.0,Ann,Larivox pallens,1,true,30,1",
    ]) + "\n"
    path = study_dir / "sightings.csv"
    path.write_text(rows, encoding="utf-8")
    result = run(load_study(study_dir), "opportunistic_volunteer", {"rows": path}, write=False)
    q = result.quarantine
    assert q["reason_code"].tolist() == ["duplicate_record"]
    assert q["message"].iloc[0] == ("record 'R1' appears earlier in the file; only its first row counts (when "
                                    "that row is quarantined too, correct it and drop this one)")


def test_repeated_ids_count_from_the_first_row_and_skip_rows_without_an_id() -> None:
    import numpy as np
    import pandas as pd

    from harmonize.reading.quarantine import Rejections, reject_repeated_ids

    ids = pd.Series(["a", "b", "a", "a", None, None], dtype="string")
    rej = Rejections()
    hit = reject_repeated_ids(rej, "rows", ids, "haul")
    assert np.flatnonzero(hit).tolist() == [2, 3]   # the first "a" counts; no id is no repeat
    # only rows still alive (a logbook checks repeats after typing): row 3 was rejected before
    rej = Rejections()
    hit = reject_repeated_ids(rej, "rows", ids, "haul", within=np.array([True, True, True, False, True, True]))
    assert np.flatnonzero(hit).tolist() == [2]
    assert rej.first_reasons("rows")["message"].tolist() == [
        "haul 'a' appears earlier in the file; only its first row counts (when that row is quarantined too, "
        "correct it and drop this one)"]
