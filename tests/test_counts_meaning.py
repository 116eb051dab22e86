"""What was counted survives to the store and the exports (issue 17, findings 3, 5 and 10).

- A split plankton count keeps the number counted and the split (so that a count model can
  use the offset ln(V x split)): density = count / split / V (BCO-DMO parameter
  documentation for net-tow abundance; UNESCO 1968, Zooplankton sampling, from memory).
- Darwin Core individualCount is "the number of individuals present at the time of the
  Occurrence" (TDWG Darwin Core term definition): birds on the water and in flight are both
  present, so the count is their sum; a taxon is never both present and absent at one event.
- The provider's own record id is kept and exported (Darwin Core catalogNumber).
"""

from __future__ import annotations

import math
import shutil
from pathlib import Path

import pandas as pd
import pyarrow.parquet as pq
import pytest
from factories import store_frames

from harmonize import load_study, run
from harmonize.export.dwca import export_dwca, read_archive_table
from harmonize.export.long import read_long
from harmonize.store import Store

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"

TOWS = """TOW,START_UTC,END_UTC,LAT,LON,Z_TOP,Z_BOTTOM,WATER_DEPTH,NET_CM,REVS,VOL_L,NOTE,REF_REVS
P1,2021-04-12T10:00:00Z,2021-04-12T10:05:00Z,43.0,-152.0,0,200,800,60,1000,,,
"""
COUNTS = """TOW,TAXON,STAGE,N,SPLIT
P1,Copelix marina,adult,125,0.25
P1,Nauplia keldica,,30,0.5
P1,Nauplia keldica,,10,0.25
"""


def _plankton(study_dir: Path) -> pd.DataFrame:
    (study_dir / "tows.csv").write_text(TOWS)
    (study_dir / "counts.csv").write_text(COUNTS)
    study = load_study(study_dir)
    run(study, "plankton_agency", {"events": study_dir / "tows.csv", "records": study_dir / "counts.csv"})
    return read_long(study).set_index("variable")


def test_split_count_keeps_what_was_counted(study_dir: Path) -> None:
    obs = _plankton(study_dir)
    volume = 1000 * 0.26873 * math.pi * 0.6 ** 2 / 4  # V = revs x k x pi d^2 / 4
    cop = obs.loc["Copelix marina"]
    assert cop["value"] == 500 and cop["count_observed"] == 125 and cop["subsample_fraction"] == 0.25
    assert cop["density"] == pytest.approx(125 / 0.25 / volume, rel=1e-12)
    # two rows of different splits: 30/0.5 + 10/0.25 = 100 raised from 40 counted
    nau = obs.loc["Nauplia keldica"]
    assert nau["value"] == 100 and nau["count_observed"] == 40
    assert nau["subsample_fraction"] == pytest.approx(40 / 100)
    assert "mixed_subsample_fractions" in list(nau["row_flags"])


def test_darwin_core_individual_count_is_the_number_counted(study_dir: Path, tmp_path: Path) -> None:
    _plankton(study_dir)
    path = export_dwca(load_study(study_dir), tmp_path / "a.zip").path
    occ = read_archive_table(path, "occurrence.txt").set_index("scientificName")
    assert occ.loc["Copelix marina", "individualCount"] == "125"
    assert "subsample" in occ.loc["Copelix marina", "occurrenceRemarks"]
    emof = read_archive_table(path, "extendedmeasurementorfact.txt")
    cop = emof[emof["occurrenceID"].str.contains("Copelix")].set_index("measurementType")["measurementValue"]
    assert float(cop["abundance (count of individuals, raised to the whole sample)"]) == 500
    assert float(cop["count of individuals in the counted subsample"]) == 125
    assert float(cop["subsample fraction counted"]) == 0.25
    with __import__("zipfile").ZipFile(path) as zf:
        assert b"individualCount is the number of individuals counted" in zf.read("eml.xml")


def test_darwin_core_sums_behaviours_and_is_never_present_and_absent(study_dir: Path, tmp_path: Path) -> None:
    """The issue's case: 5 birds on the water + 3 counted in flight is 8 individuals."""
    study = load_study(study_dir)
    events = pd.DataFrame({"event_id": ["S1"], "event_start": ["2021-06-01T10:00:00"], "lat": [43.0],
                           "lon": [-152.0], "depth_min_m": [0.0], "depth_max_m": [0.0]})
    values = pd.DataFrame({
        "event_id": ["S1"] * 4,
        "variable": ["Procellix keldica", "Procellix keldica", "Larivox pallens", "Larivox pallens"],
        "behavior": ["on_water", "in_flight", "on_water", "in_flight"],
        "value": [5.0, 3.0, 2.0, 0.0], "zero_filled": [False, False, False, True],
    })
    store_frames(study, events, values, source_id="strip", kind="transect", protocol="keldmar_seabird_strip")
    path = export_dwca(study, tmp_path / "b.zip").path
    occ = read_archive_table(path, "occurrence.txt").set_index("scientificName")
    assert occ.loc["Procellix keldica", "individualCount"] == "8"
    assert occ.loc["Procellix keldica", "behavior"] == "in_flight | on_water"
    assert occ.loc["Larivox pallens", "individualCount"] == "2"
    assert occ.loc["Larivox pallens", "occurrenceStatus"] == "present"
    emof = read_archive_table(path, "extendedmeasurementorfact.txt")
    gull = emof[emof["occurrenceID"].str.contains("Larivox")]
    # the inferred zero in flight is not published beside the present gull
    assert not gull["measurementRemarks"].str.contains("inferred zero").any()
    fulmar = emof[emof["occurrenceID"].str.contains("Procellix")].set_index("measurementType")
    assert float(fulmar.loc["abundance (count of individuals), on water", "measurementValue"]) == 5
    assert float(fulmar.loc["abundance (count of individuals), in flight", "measurementValue"]) == 3


def test_provider_record_ids_are_stored_and_exported(study_dir: Path, tmp_path: Path) -> None:
    shutil.copy(FIXTURES / "opportunistic" / "volunteer_messy.csv", study_dir / "v.csv")
    study = load_study(study_dir)
    run(study, "opportunistic_volunteer", {"rows": study_dir / "v.csv"})
    raw = pd.read_csv(study_dir / "v.csv", dtype=str)
    obs = read_long(study)
    counted = obs[~obs["zero_filled"]]
    ids = set("|".join(counted["provider_record_id"].dropna()).split("|"))
    assert ids and ids <= set(raw["sighting_id"])
    s001 = counted[counted["provider_record_id"] == "S001"]
    assert list(s001["variable"]) == ["Procellix keldica"]  # "keld fulmar" on that row
    occ = read_archive_table(export_dwca(study, tmp_path / "c.zip").path, "occurrence.txt")
    assert "S001" in set(occ["catalogNumber"])


def test_a_store_written_before_the_new_columns_still_opens(study_dir: Path) -> None:
    """New columns are nullable: parquet files without them read them as null."""
    _plankton(study_dir)
    for part in (study_dir / "store" / "observations").rglob("*.parquet"):
        table = pq.read_table(part, partitioning=None)
        old = table.drop_columns([c for c in ("count_observed", "subsample_fraction", "provider_record_id",
                                              "track_start_lat", "track_start_lon", "track_end_lat", "track_end_lon")
                                  if c in table.column_names])
        pq.write_table(old, part)
    with Store(study_dir / "store").connect(read_only=True) as con:
        rows = con.sql("SELECT count(*), count(count_observed), count(provider_record_id), count(track_end_lon) "
                       "FROM observations").fetchall()
    assert rows[0][0] > 0 and rows[0][1:] == (0, 0, 0)
