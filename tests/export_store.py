"""A small hand-built store for the export tests, with every case the exports must handle.

Study: the Keldmar fixture (EPSG:6933, 25 km cells, min_vessels = 3). Sources:

- ``survey_trawl`` (trawl, agency, near_bottom, effort km2): T1..T4. T1 holds adult and
  juvenile Ostravix keldensis, the sensitive Calverion rubrum (2 caught), an inferred zero of
  Lumbrena pallida and a bottom temperature; T2 inferred zeros of Ostravix (count and
  biomass) and Calverion; T4 is a December haul (season_year 2020).
- ``volunteer_birds`` (opportunistic, volunteer, surface): V1 a complete checklist (2 h)
  whose Aukelle minima record is flagged probable_duplicate; "@V2" an incidental record
  without effort: presence-only Larivox pallens and Aukelle minima (sensitive) and a count of
  5 Procellix keldica. Its id starts with "@" to exercise the CSV formula guard.
- ``fleet_effort`` (effort, industry): fishing hours per cell and month; E1 (5 vessels) and
  E2 (2 vessels: confidential) in one cell in June and July 2020, E3 (exactly 3 vessels) in
  another cell.
- ``ocean_model`` (gridded, model): sea surface temperature of June 2020 in two cells (not
  samples): G1 in E3's cell, G2 (11.5 degC) in T1's cell, linked to T1 by co-location.
"""

from __future__ import annotations

import atexit
import copy
import shutil
import tempfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
from factories import store_frames

from harmonize.study import Study, load_study
from harmonize.tagging import Grid

FIXTURE = Path(__file__).resolve().parent.parent / "fixtures" / "keldmar"

TRAWL_EFFORT = {"T1": 0.05, "T2": 0.08, "T3": 0.04, "T4": 0.10}
TRAWL_POS = {"T1": (43.0, -153.0), "T2": (43.5, -151.5), "T3": (44.0, -150.5), "T4": (44.05, -150.45)}
V_POS = {"V1": (43.1234, -152.9876), "@V2": (43.2468, -152.8642)}


@dataclass
class ExportStore:
    """Ids and facts of the export test store."""

    ingests: dict[str, str]
    effort_cells: dict[str, str]


def _values(rows: list[dict], **defaults: object) -> pd.DataFrame:
    base = {"variable_kind": "taxon", "quantity": "count", "unit": "1", "zero_filled": False,
            "no_effort": False, "life_stage": None, "n_vessels": None, "flags": []}
    return pd.DataFrame([{**base, **defaults, **r} for r in rows])


def build_export_store(study: Study) -> ExportStore:
    """Write the four sources into the study's store; see the module docstring."""
    ingests: dict[str, str] = {}
    ev = pd.DataFrame({
        "event_id": list(TRAWL_EFFORT),
        "event_start": ["2020-06-10 08:00", "2020-07-01 09:00", "2021-01-15 10:00", "2019-12-20 07:00"],
        "event_end": ["2020-06-10 08:30", "2020-07-01 09:30", "2021-01-15 10:30", "2019-12-20 07:30"],
        "lat": [p[0] for p in TRAWL_POS.values()], "lon": [p[1] for p in TRAWL_POS.values()],
        "effort": list(TRAWL_EFFORT.values()), "effort_unit": "km2", "depth_layer": "near_bottom",
        "depth_min_m": [88.0, 100.0, 120.0, 125.0], "depth_max_m": [90.0, 102.0, 121.0, 128.0],
    })
    va = _values([
        {"event_id": "T1", "variable": "Ostravix keldensis", "value": 10.0, "life_stage": "adult"},
        {"event_id": "T1", "variable": "Ostravix keldensis", "value": 4.0, "life_stage": "juvenile"},
        {"event_id": "T1", "variable": "Ostravix keldensis", "value": 12.5, "quantity": "biomass", "unit": "kg",
         "life_stage": "adult"},
        {"event_id": "T1", "variable": "Calverion rubrum", "value": 2.0},
        {"event_id": "T1", "variable": "Lumbrena pallida", "value": 0.0, "zero_filled": True},
        {"event_id": "T1", "variable": "sea_water_temperature_at_sea_floor", "value": 6.5,
         "variable_kind": "physical", "quantity": "measurement", "unit": "degC", "no_effort": True},
        {"event_id": "T2", "variable": "Ostravix keldensis", "value": 0.0, "zero_filled": True},
        {"event_id": "T2", "variable": "Ostravix keldensis", "value": 0.0, "zero_filled": True,
         "quantity": "biomass", "unit": "kg"},
        {"event_id": "T2", "variable": "Lumbrena pallida", "value": 7.0},
        {"event_id": "T2", "variable": "Calverion rubrum", "value": 0.0, "zero_filled": True},
        {"event_id": "T3", "variable": "Ostravix keldensis", "value": 3.0},
        {"event_id": "T3", "variable": "Lumbrena pallida", "value": 1.0},
        {"event_id": "T4", "variable": "Ostravix keldensis", "value": 5.0},
    ])
    ingests["survey_trawl"] = store_frames(study, ev, va, source_id="survey_trawl", kind="trawl",
                                           protocol="keldmar_bottom_trawl").ingest_id

    ev = pd.DataFrame({
        "event_id": list(V_POS), "event_start": ["2020-06-12 07:00", "2020-06-13 15:00"],
        "event_end": ["2020-06-12 09:00", pd.NaT],
        "lat": [p[0] for p in V_POS.values()], "lon": [p[1] for p in V_POS.values()],
        "effort": [2.0, np.nan], "effort_unit": ["h", None], "depth_layer": "surface",
    })
    va = _values([
        {"event_id": "V1", "variable": "Procellix keldica", "value": 3.0},
        {"event_id": "V1", "variable": "Larivox pallens", "value": 2.0},
        {"event_id": "V1", "variable": "Aukelle minima", "value": 1.0, "flags": ["probable_duplicate"]},
        {"event_id": "@V2", "variable": "Larivox pallens", "value": 1.0, "quantity": "presence"},
        {"event_id": "@V2", "variable": "Aukelle minima", "value": 1.0, "quantity": "presence"},
        {"event_id": "@V2", "variable": "Procellix keldica", "value": 5.0},
    ])
    ingests["volunteer_birds"] = store_frames(study, ev, va, source_id="volunteer_birds", kind="opportunistic",
                                              provider_type="volunteer",
                                              protocol="keldmar_volunteer_checklist").ingest_id

    grid = Grid(study.crs, study.cell_size_km)
    ix, iy = grid.indices(np.array([-152.0, -150.0]), np.array([43.0, 44.0]))
    clon, clat = grid.cell_centres_lonlat(ix, iy)
    cells = [f"x{a}_y{b}" for a, b in zip(ix, iy, strict=True)]
    ev = pd.DataFrame({
        "event_id": ["E1", "E2", "E3"], "event_start": ["2020-06-01", "2020-07-01", "2020-06-01"],
        "event_end": ["2020-06-30 23:59", "2020-07-31 23:59", "2020-06-30 23:59"],
        "lat": [clat[0], clat[0], clat[1]], "lon": [clon[0], clon[0], clon[1]],
        "cell_id": [cells[0], cells[0], cells[1]], "depth_layer": "surface",
        "effort": np.nan, "effort_unit": None,
    })
    va = _values([
        {"event_id": "E1", "value": 12.0, "n_vessels": 5},
        {"event_id": "E2", "value": 3.0, "n_vessels": 2},
        {"event_id": "E3", "value": 7.5, "n_vessels": 3},
    ], variable="fishing_hours", variable_kind="effort", quantity="measurement", unit="h", no_effort=True)
    ingests["fleet_effort"] = store_frames(study, ev, va, source_id="fleet_effort", kind="effort",
                                           provider_type="industry").ingest_id

    t1_ix, t1_iy = grid.indices(np.array([TRAWL_POS["T1"][1]]), np.array([TRAWL_POS["T1"][0]]))
    t1_lon, t1_lat = grid.cell_centres_lonlat(t1_ix, t1_iy)
    ev = pd.DataFrame({"event_id": ["G1", "G2"], "event_start": ["2020-06-01", "2020-06-01"],
                       "event_end": ["2020-07-01", "2020-07-01"], "lat": [clat[1], t1_lat[0]],
                       "lon": [clon[1], t1_lon[0]], "cell_id": [cells[1], f"x{t1_ix[0]}_y{t1_iy[0]}"],
                       "depth_layer": "surface", "effort": [625.0, 625.0], "effort_unit": ["km2", "km2"]})
    va = _values([{"event_id": "G1", "variable": "sea_surface_temperature", "value": 12.0},
                  {"event_id": "G2", "variable": "sea_surface_temperature", "value": 11.5}],
                 variable_kind="physical", quantity="measurement", unit="degC", no_effort=True)
    ingests["ocean_model"] = store_frames(study, ev, va, source_id="ocean_model", kind="gridded",
                                          provider_type="model").ingest_id
    return ExportStore(ingests, {"E1": cells[0], "E2": cells[0], "E3": cells[1]})


#: The store is built once per test process and copied for each caller (its files name
#: nothing outside the study folder, so a copy is the same store): (template folder, facts).
_BUILT: dict[str, tuple[Path, ExportStore]] = {}


def export_study(folder: Path) -> tuple[Study, ExportStore]:
    """A copy of the Keldmar fixture in ``folder`` with the export test store built in it.

    The store is built once per process (in a temporary folder removed at exit) and copied:
    every caller gets its own study folder, which it may change.
    """
    if "template" not in _BUILT:
        template = Path(tempfile.mkdtemp(prefix="export-store-")) / "study"
        atexit.register(shutil.rmtree, template.parent, True)
        shutil.copytree(FIXTURE, template)
        _BUILT["template"] = (template, build_export_store(load_study(template)))
    template, facts = _BUILT["template"]
    shutil.copytree(template, folder)
    return load_study(folder), copy.deepcopy(facts)
