"""Hand-built stores with known gaps, for the audit tests.

The "known gaps" store (fixture study Keldmar, 165 domain cells of 25 km) holds:

- trawl (agency, near_bottom): winter and summer 2018-2022, 20 hauls in 20 distinct cells
  (10 per stratum) each season, EXCEPT winter 2021 (no hauls: no_samples) and summer 2022
  (8 hauls in 8 cells, 4 per stratum: coverage_drop, and thin_samples
  in each stratum, which lost most of its 10 hauls). Two common fish in every haul;
  Syrranthus minor caught in exactly three summer hauls (few_encounters). Bottom
  temperature per haul.
- ocean model (gridded, model, near_bottom): bottom temperature for every domain cell,
  winter and summer 2018-2022; in the trawled cells it reads the haul's value minus
  0.8 +- 0.1 degC (source_disagreement with a known offset).
- seabird transects (agency, surface): summer 2018-2022, 6 segments (3 per stratum).
- plankton tows (agency, epipelagic): summer 2018, 2019, 2021, 2022 (2020 silent:
  missing_year), 6 tows (3 per stratum).
- volunteer records (opportunistic, volunteer, surface): presence-only sightings of
  Aukelle minima in winter 2019-2022 (volunteer_only), plus one summer record flagged
  probable_duplicate that every count must ignore.
"""

from __future__ import annotations

import shutil
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
from factories import store_frames

from harmonize.audit.run import domain_cells
from harmonize.study import Study

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
YEARS = range(2018, 2023)
WINTER_DAY, SUMMER_DAY = "01-15", "07-15"
MODEL_OFFSET_C = 0.8


@dataclass
class KnownGaps:
    """What the known-gaps store holds, computed while building it (outside the audit)."""

    trawl_cells: dict[tuple[int, str], list[str]] = field(default_factory=dict)
    paired_differences: list[float] = field(default_factory=list)
    n_domain_cells: int = 0


_VALUE_ROW = {"variable_kind": "taxon", "quantity": "count", "unit": "1", "zero_filled": False,
              "no_effort": False, "flags": []}
_EVENT_ROW = {"effort": 1.0, "effort_unit": "km2", "bottom_depth_m": float("nan")}


def _frame(rows: list[dict], defaults: dict) -> pd.DataFrame:
    """Rows with every column filled (a key a row leaves out takes the default)."""
    return pd.DataFrame([{**defaults, **r} for r in rows])


def _cells(study: Study) -> tuple[pd.DataFrame, pd.DataFrame]:
    cells = domain_cells(study).sort_values(["iy", "ix"]).reset_index(drop=True)
    west = cells[cells["lon"] < -152.0].reset_index(drop=True)
    east = cells[cells["lon"] > -152.0].reset_index(drop=True)
    return west, east


def _pick(frame: pd.DataFrame, n: int, start: int) -> pd.DataFrame:
    idx = (start + 7 * np.arange(n)) % len(frame)
    assert len(set(idx)) == n
    return frame.iloc[idx]


def build_known_gaps(study: Study) -> KnownGaps:
    """Fill the study's store with the sources described in the module docstring."""
    west, east = _cells(study)
    all_cells = domain_cells(study)
    known = KnownGaps(n_domain_cells=len(all_cells))

    # ---------------------------------------------------------------- trawl
    ev_rows, va_rows, trawl_temp = [], [], {}
    syrranthus_left = 3
    for year in YEARS:
        for season, day, n_per_stratum in (("winter", WINTER_DAY, 10), ("summer", SUMMER_DAY, 10)):
            if (year, season) == (2021, "winter"):
                continue
            if (year, season) == (2022, "summer"):
                n_per_stratum = 4
            picked = pd.concat([_pick(west, n_per_stratum, year), _pick(east, n_per_stratum, year + 3)])
            known.trawl_cells[(year, season)] = list(picked["cell_id"])
            for k, cell in enumerate(picked.itertuples(index=False)):
                eid = f"T{year}{season[0]}{k:02d}"
                ev_rows.append({"event_id": eid, "event_start": f"{year}-{day} 08:00", "lat": cell.lat,
                                "lon": cell.lon, "depth_layer": "near_bottom", "bottom_depth_m": 80.0})
                temp = 7.0 + 0.1 * k
                trawl_temp[(cell.cell_id, year, season)] = temp
                va_rows += [
                    {"event_id": eid, "variable": "Ostravix keldensis", "value": 5.0 + k},
                    {"event_id": eid, "variable": "Lumbrena pallida", "value": 2.0},
                    {"event_id": eid, "variable": "sea_water_temperature_at_sea_floor", "value": temp,
                     "variable_kind": "physical", "quantity": "measurement", "unit": "degC", "no_effort": True},
                ]
                if season == "summer":
                    hit = syrranthus_left > 0 and k == 0
                    syrranthus_left -= hit
                    va_rows.append({"event_id": eid, "variable": "Syrranthus minor", "value": 2.0 if hit else 0.0,
                                    "zero_filled": not hit})
    store_frames(study, _frame(ev_rows, _EVENT_ROW), _frame(va_rows, _VALUE_ROW), source_id="survey_trawl",
                 kind="trawl", protocol="keldmar_bottom_trawl")

    # ---------------------------------------------------------------- ocean model
    ev_rows, va_rows = [], []
    for year in YEARS:
        for season in ("winter", "summer"):
            for j, cell in enumerate(all_cells.itertuples(index=False)):
                eid = f"{cell.cell_id}_{year}_{season}"
                # a season mean, as the gridded adapter writes it: period [start, end)
                start, end = ((f"{year - 1}-12-01", f"{year}-03-01") if season == "winter"
                              else (f"{year}-06-01", f"{year}-09-01"))
                ev_rows.append({"event_id": eid, "event_start": start, "event_end": end, "lat": cell.lat,
                                "lon": cell.lon, "cell_id": cell.cell_id, "depth_layer": "near_bottom",
                                "effort": 625.0})
                trawl = trawl_temp.get((cell.cell_id, year, season))
                if trawl is None:
                    value = 6.0
                else:
                    noise = 0.1 if j % 2 else -0.1
                    value = trawl - MODEL_OFFSET_C + noise
                    known.paired_differences.append(trawl - value)
                va_rows.append({"event_id": eid, "variable": "sea_water_temperature_at_sea_floor", "value": value,
                                "variable_kind": "physical", "quantity": "measurement", "unit": "degC"})
    store_frames(study, _frame(ev_rows, _EVENT_ROW), _frame(va_rows, _VALUE_ROW), source_id="ocean_model",
                 kind="gridded", provider_type="model")

    # ---------------------------------------------------------------- transects, plankton
    for source_id, kind, layer, taxon, years in (
        ("seabird_strip", "transect", "surface", "Procellix keldica", YEARS),
        ("plankton_net", "plankton", "epipelagic", "Copelix marina", [y for y in YEARS if y != 2020]),
    ):
        ev_rows, va_rows = [], []
        for year in years:
            picked = pd.concat([_pick(west, 3, year + 11), _pick(east, 3, year + 13)])
            for k, cell in enumerate(picked.itertuples(index=False)):
                eid = f"{kind[0]}{year}{k}"
                ev_rows.append({"event_id": eid, "event_start": f"{year}-{SUMMER_DAY} 10:00", "lat": cell.lat,
                                "lon": cell.lon, "depth_layer": layer})
                va_rows.append({"event_id": eid, "variable": taxon, "value": 3.0 + k})
        store_frames(study, _frame(ev_rows, _EVENT_ROW), _frame(va_rows, _VALUE_ROW), source_id=source_id, kind=kind)

    # ---------------------------------------------------------------- volunteers
    ev_rows, va_rows = [], []
    for year in range(2019, 2023):
        for k in range(3):
            cell = west.iloc[(year + 5 * k) % len(west)]
            eid = f"V{year}{k}"
            ev_rows.append({"event_id": eid, "event_start": f"{year}-{WINTER_DAY} 12:00", "lat": cell["lat"],
                            "lon": cell["lon"], "depth_layer": "surface", "effort": float("nan"),
                            "effort_unit": None})
            va_rows.append({"event_id": eid, "variable": "Aukelle minima", "value": 1.0, "quantity": "presence"})
    twin = east.iloc[0]
    ev_rows.append({"event_id": "V-twin", "event_start": f"2020-{SUMMER_DAY} 10:05", "lat": twin["lat"],
                    "lon": twin["lon"], "depth_layer": "surface", "effort": 2.0, "effort_unit": "h"})
    va_rows.append({"event_id": "V-twin", "variable": "Larivox pallens", "value": 4.0, "quantity": "count",
                    "flags": ["probable_duplicate"]})
    store_frames(study, _frame(ev_rows, _EVENT_ROW), _frame(va_rows, _VALUE_ROW), source_id="volunteer_birds",
                 kind="opportunistic", provider_type="volunteer")
    return known


def copy_fixture_study(target: Path) -> Path:
    """A fresh copy of fixtures/keldmar in ``target``."""
    shutil.copytree(FIXTURES / "keldmar", target)
    return target
