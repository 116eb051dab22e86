"""The wide export never mixes units or kinds in one column (issue 17, finding 2).

Density is count / effort in the effort's unit (strip transects: n / (L x w), Tasker et al.
1984, The Auk 101:567-577; plankton: count / V, BCO-DMO); a value counted without effort
(flying birds counted continuously measure a flux, not a density: Tasker et al. 1984) is no
density, and densities per km2, per m3 and per hour are different quantities (common
practice: never add numbers of different units).
"""

from __future__ import annotations

import json
from pathlib import Path

import pandas as pd
import pyarrow.parquet as pq
import pytest
from factories import store_frames

from harmonize import load_study
from harmonize.export.metadata import sidecar_path
from harmonize.export.wide import export_wide, read_wide

STRIP_KM2 = 3.0867 * 0.3  # 10 min at 10 kn (3.0867 km) x a 300 m strip


@pytest.fixture
def mixed(study_dir: Path):  # type: ignore[no-untyped-def]
    study = load_study(study_dir)
    seg = pd.DataFrame({"event_id": ["S1"], "event_start": ["2021-06-01T10:00:00"], "lat": [43.0],
                        "lon": [-152.0], "effort": [STRIP_KM2], "effort_unit": ["km2"]})
    birds = pd.DataFrame({"event_id": ["S1", "S1"], "variable": ["Procellix keldica"] * 2,
                          "behavior": ["on_water", "in_flight"], "value": [5.0, 3.0],
                          "no_effort": [False, True]})   # flying birds counted continuously
    store_frames(study, seg, birds, source_id="strip", kind="transect")
    tow = pd.DataFrame({"event_id": ["P1"], "event_start": ["2021-06-02T10:00:00"], "lat": [43.0],
                        "lon": [-152.0], "effort": [75.98], "effort_unit": ["m3"]})
    counts = pd.DataFrame({"event_id": ["P1"], "variable": ["Procellix keldica"], "value": [500.0]})
    store_frames(study, tow, counts, source_id="tows", kind="plankton")
    return study


def test_no_column_mixes_units_or_adds_counts_to_densities(mixed) -> None:  # type: ignore[no-untyped-def]
    wide = read_wide(mixed).set_index("event_id")
    # the case: 5 on the water (5 / 0.926 km2 = 5.40 per km2) and 3 counted in flight
    # must not give 8.40 "per km2"
    assert wide.loc["S1", "Procellix keldica (per km2)"] == pytest.approx(5 / STRIP_KM2, rel=1e-12)
    assert wide.loc["S1", "Procellix keldica (count, no effort)"] == 3.0
    assert wide.loc["P1", "Procellix keldica (per m3)"] == pytest.approx(500 / 75.98, rel=1e-12)
    assert pd.isna(wide.loc["P1", "Procellix keldica (per km2)"])
    assert pd.isna(wide.loc["S1", "Procellix keldica (per m3)"])


def test_each_taxon_column_states_its_unit(mixed, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    expected = {"Procellix keldica (per km2)": "1/km2", "Procellix keldica (per m3)": "1/m3",
                "Procellix keldica (count, no effort)": "1"}
    result = export_wide(mixed, tmp_path / "w.parquet")
    schema = pq.read_schema(result.path)
    for col, unit in expected.items():
        assert schema.field(col).metadata == {b"unit": unit.encode()}
    assert result.metadata["options"]["taxon_units"] == expected
    csv = export_wide(mixed, tmp_path / "w.csv")
    side = json.loads(sidecar_path(csv.path).read_text())
    units = {c["titles"]: c.get("schema:unitText") for c in side["tableSchema"]["columns"]}
    assert {k: units[k] for k in expected} == expected
