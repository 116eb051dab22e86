"""End-to-end: the messy trawl fixture through ingest, the store and its accounting."""

from __future__ import annotations

from pathlib import Path

import duckdb
import pandas as pd
import pytest
from geographiclib.geodesic import Geodesic

from harmonize import Store, load_study, run
from harmonize.errors import DuplicateIngestError
from harmonize.store import STORE_VERSION


def _inputs(study_dir: Path) -> dict[str, Path]:
    return {"events": study_dir / "hauls_messy.csv", "records": study_dir / "catch_messy.csv"}


def test_messy_trawl_accounting_and_reasons(study_dir: Path) -> None:
    study = load_study(study_dir)
    result = run(study, "trawl_agency", _inputs(study_dir))
    assert result.status == "complete"
    # every input row accepted or quarantined
    assert result.rows_read == 11 + 12
    assert result.rows_read == result.rows_accepted + result.rows_quarantined
    reasons = dict(zip(result.quarantine["source_row"].astype(str) + "@" + result.quarantine["source_file"],
                       result.quarantine["reason_code"], strict=True))
    assert reasons == {
        "3@hauls_messy.csv": "duplicate_record",
        "4@hauls_messy.csv": "end_before_start",
        "5@hauls_messy.csv": "out_of_range",       # latitude and longitude swapped
        "6@hauls_messy.csv": "implausible_speed",
        "7@hauls_messy.csv": "bad_time",
        "8@hauls_messy.csv": "bad_type",
        "3@catch_messy.csv": "unknown_taxon",
        "6@catch_messy.csv": "out_of_range",
        "8@catch_messy.csv": "end_before_start",   # catch of a rejected haul follows it
        "9@catch_messy.csv": "orphan_record",
        "11@catch_messy.csv": "missing_value",
    }
    assert Store(study.store_dir).check() == []


def test_reingest_is_a_noop_and_replace_supersedes(study_dir: Path) -> None:
    study = load_study(study_dir)
    first = run(study, "trawl_agency", _inputs(study_dir))
    again = run(study, "trawl_agency", _inputs(study_dir))
    assert again.status == "unchanged" and again.ingest_id == first.ingest_id
    con = duckdb.connect(str(study.store_dir / "harmonized.duckdb"), read_only=True)
    assert con.execute("SELECT count(*) FROM ingests").fetchall()[0][0] == 1
    con.close()
    # a corrected catch file under the same name needs --replace
    catch = study_dir / "catch_messy.csv"
    catch.write_text(catch.read_text().replace("H099,keld cod", "H010,keld cod"))
    with pytest.raises(DuplicateIngestError, match="--replace"):
        run(study, "trawl_agency", _inputs(study_dir))
    third = run(study, "trawl_agency", _inputs(study_dir), replace=True)
    assert third.superseded == [first.ingest_id]
    store = Store(study.store_dir)
    ingests = store.ingests()
    assert dict(zip(ingests["ingest_id"], ingests["status"], strict=True)) == {
        first.ingest_id: "superseded", third.ingest_id: "complete"}
    with store.connect() as con:
        live = con.execute("SELECT DISTINCT ingest_id FROM observations").fetchall()
    assert live == [(third.ingest_id,)]
    assert store.check() == []


def _without_protocol(study_dir: Path) -> str:
    """A copy of the trawl profile with no zero-filling protocol (profiles/trawl_bare.toml)."""
    text = (study_dir / "profiles" / "trawl_agency.toml").read_text()
    assert 'protocol = "keldmar_bottom_trawl"\n' in text
    (study_dir / "profiles" / "trawl_bare.toml").write_text(text.replace('protocol = "keldmar_bottom_trawl"\n', ""))
    return "trawl_bare"


def test_empty_haul_without_protocol_is_kept_without_values(study_dir: Path) -> None:
    # H010 has no catch row and no bottom temperature; with no protocol nothing is inferred
    # for it, so it yields no observation row: a real empty haul, kept in events_without_values.
    study = load_study(study_dir)
    result = run(study, _without_protocol(study_dir), _inputs(study_dir))
    assert list(result.events_without_values["event_id"]) == ["H010"]
    store = Store(study.store_dir)
    assert store.check() == []
    empty = store.events_without_values()
    assert len(empty) == 1
    h010 = empty.iloc[0]
    assert (h010["ingest_id"], h010["source_id"], h010["source_kind"], h010["event_id"]) == (
        result.ingest_id, "keldmar_trawl", "trawl", "H010")
    assert (h010["source_file"], h010["source_row"], list(h010["flags"])) == ("hauls_messy.csv", 10, [])
    assert h010["protocol"] is None
    assert (h010["year"], h010["season"], h010["season_year"], h010["depth_layer"]) == (2020, "summer", 2020, "near_bottom")
    assert h010["event_start"] == pd.Timestamp("2020-06-15 08:00")
    # 70 fathoms (1 fathom = 1.8288 m exactly, international yard and pound agreement 1959)
    assert h010["bottom_depth_m"] == pytest.approx(70 * 1.8288)
    # area swept = geodesic tow length (geographiclib, Karney 2013, "Algorithms for geodesics")
    # x wing spread (20 m); the tow runs from 44.0000N to 44.0250N along 150.5W
    tow_km = Geodesic.WGS84.Inverse(44.0, -150.5, 44.025, -150.5)["s12"] / 1000
    assert h010["effort_unit"] == "km2" and h010["effort"] == pytest.approx(tow_km * 0.020, rel=1e-9)
    assert h010["lat"] == pytest.approx(44.0125) and h010["lon"] == pytest.approx(-150.5)
    assert h010["cell_id"] is not None
    with store.connect() as con:
        assert con.execute("SELECT count(*) FROM observations WHERE event_id = 'H010'").fetchall()[0][0] == 0


def test_replace_supersedes_events_without_values(study_dir: Path) -> None:
    study = load_study(study_dir)
    profile = _without_protocol(study_dir)
    first = run(study, profile, _inputs(study_dir))
    store = Store(study.store_dir)
    assert list(store.events_without_values()["event_id"]) == ["H010"]
    # the corrected catch file gives H010 a catch: the new ingest has no event without values,
    # and the superseded ingest's H010 is no longer read
    catch = study_dir / "catch_messy.csv"
    catch.write_text(catch.read_text().replace("H099,keld cod", "H010,keld cod"))
    second = run(study, profile, _inputs(study_dir), replace=True)
    assert second.superseded == [first.ingest_id] and second.events_without_values.empty
    assert store.events_without_values().empty
    assert store.check() == []
    # a replace that empties H010 again brings it back, under the new ingest only
    catch.write_text(catch.read_text().replace("H010,keld cod", "H099,keld cod"))
    third = run(study, profile, _inputs(study_dir), replace=True)
    empty = store.events_without_values()
    assert list(zip(empty["ingest_id"], empty["event_id"], strict=True)) == [(third.ingest_id, "H010")]
    assert store.check() == []


def test_store_without_the_events_without_values_table_still_opens(study_dir: Path) -> None:
    # A store written before the table existed (store version 1): readers see no such
    # events and the check passes; the next writer adds the table and records the current version.
    study = load_study(study_dir)
    run(study, "trawl_agency", _inputs(study_dir))
    store = Store(study.store_dir)
    con = duckdb.connect(str(store.db_path))
    con.execute("DROP TABLE events_without_values")
    con.execute("DELETE FROM store_meta WHERE key = 'store_version'")
    con.close()
    assert store.events_without_values().empty
    assert list(store.events_without_values().columns)[:3] == ["ingest_id", "source_id", "source_kind"]
    assert store.check() == []
    run(study, _without_protocol(study_dir), {"events": study_dir / "hauls_messy.csv",
                                              "records": study_dir / "catch_messy.csv"}, replace=True)
    with store.connect() as c:
        # brought up to date by the check or the writer
        assert c.execute("SELECT value FROM store_meta WHERE key = 'store_version'").fetchall() == [(str(STORE_VERSION),)]
    assert list(store.events_without_values()["event_id"]) == ["H010"]
    assert store.check() == []


def test_an_event_without_values_carries_the_tags_it_would_carry_with_values(study_dir: Path) -> None:
    # Rule: an event's tags and effort belong to the event, not to its values. H010 stored
    # as an event without values (no catch, no protocol) must carry exactly the event columns
    # its observation rows carry once a catch row is given to it (the same haul, re-ingested).
    study = load_study(study_dir)
    profile = _without_protocol(study_dir)
    run(study, profile, _inputs(study_dir))
    lonely = Store(study.store_dir).events_without_values()
    catch = study_dir / "catch_messy.csv"
    catch.write_text(catch.read_text().replace("H099,keld cod", "H010,keld cod"))
    run(study, profile, _inputs(study_dir), replace=True)
    with Store(study.store_dir).connect() as con:
        caught = con.sql("SELECT * FROM observations WHERE event_id = 'H010'").df()
    columns = ["source_id", "source_kind", "provider_type", "protocol", "event_id", "event_start", "event_end",
               "year", "season", "season_year", "depth_layer", "lat", "lon", "cell_id", "stratum", "depth_min_m",
               "depth_max_m", "bottom_depth_m", "effort", "effort_unit", "observer_id", "source_file"]
    assert len(lonely) == 1 and len(caught) >= 1
    for col in columns:
        found = caught[col].drop_duplicates().tolist()
        assert len(found) == 1, col
        expected = lonely[col].iloc[0]
        if col in ("event_start", "event_end"):  # that table holds UTC times without their zone
            expected = pd.Timestamp(expected).tz_localize("UTC")
        if expected is None or (not isinstance(expected, str) and pd.isna(expected)):
            assert found[0] is None or pd.isna(found[0]), col
        else:
            assert found[0] == expected, col
    # the event's own row number in the hauls file (observations carry their catch rows instead)
    assert lonely["source_row"].iloc[0] == 10
