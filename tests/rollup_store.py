"""A small store with an invented genus split, for the roll-up, audit and readiness tests.

taxa.csv: genus Keldora with species Keldora alba and Keldora nigra (parent Keldora), and
Ostravix keldensis (no parent). Source ``split_trawl`` (trawl, effort km2, near_bottom)
recorded the genus in 2018-2019 and the two species from 2020 on:

===== ==== ======= ========================================= ===========================
haul  year effort  records                                   Keldora by hand (count/km2)
===== ==== ======= ========================================= ===========================
H1    2018 0.5     Keldora 4                                 4 / 0.5 = 8
H2    2018 0.25    Keldora 0 (inferred)                      0
H3    2019 0.5     Keldora 6                                 6 / 0.5 = 12
H4    2020 0.5     alba 3, nigra 5                           (3 + 5) / 0.5 = 16
H5    2020 0.25    alba 0, nigra 0 (both inferred)           0 (zero_filled)
H6    2021 0.5     alba 2, nigra 0 (inferred)                2 / 0.5 = 4
H7    2021 0.5     alba 0 (inferred); nigra not recorded      not recorded (incomplete)
H8    2021 0.5     alba 1; nigra not recorded                not recorded (incomplete)
===== ==== ======= ========================================= ===========================

Every haul also holds Ostravix keldensis, count 1 (untouched by any roll-up). Source
``split_volunteers`` (opportunistic, presence-only): P1 alba and nigra present, P2 nigra
present -> Keldora present (value 1) at both.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import pandas as pd
from factories import store_frames

from harmonize.study import Study, load_study

FIXTURE = Path(__file__).resolve().parent.parent / "fixtures" / "keldmar"

TAXA_CSV = """\
taxon,group,aliases,sensitive,rank,parent,taxon_id
Keldora,fish,,false,genus,,urn:test:keldora
Keldora alba,fish,,false,species,Keldora,urn:test:alba
Keldora nigra,fish,,false,species,Keldora,urn:test:nigra
Ostravix keldensis,fish,keld cod,false,species,,
Procellix keldica,seabird,,false,species,,
"""

HAULS = {  # event: (start, effort km2)
    "H1": ("2018-06-10 08:00", 0.5), "H2": ("2018-07-02 08:00", 0.25), "H3": ("2019-06-11 08:00", 0.5),
    "H4": ("2020-06-09 08:00", 0.5), "H5": ("2020-07-01 08:00", 0.25), "H6": ("2021-06-08 08:00", 0.5),
    "H7": ("2021-06-20 08:00", 0.5), "H8": ("2021-07-04 08:00", 0.5),
}
RECORDS = [  # event, taxon, count, inferred zero
    ("H1", "Keldora", 4.0, False), ("H2", "Keldora", 0.0, True), ("H3", "Keldora", 6.0, False),
    ("H4", "Keldora alba", 3.0, False), ("H4", "Keldora nigra", 5.0, False),
    ("H5", "Keldora alba", 0.0, True), ("H5", "Keldora nigra", 0.0, True),
    ("H6", "Keldora alba", 2.0, False), ("H6", "Keldora nigra", 0.0, True),
    ("H7", "Keldora alba", 0.0, True), ("H8", "Keldora alba", 1.0, False),
] + [(h, "Ostravix keldensis", 1.0, False) for h in HAULS]


def split_study(folder: Path) -> Study:
    """A copy of the Keldmar fixture in ``folder`` with the split taxa and both sources stored."""
    shutil.copytree(FIXTURE, folder)
    (folder / "taxa.csv").write_text(TAXA_CSV, encoding="utf-8")
    (folder / "targets.csv").write_text("protocol,taxon\n", encoding="utf-8")
    study = load_study(folder)
    ev = pd.DataFrame({"event_id": list(HAULS), "event_start": [v[0] for v in HAULS.values()],
                       "lat": 43.0, "lon": -153.0, "effort": [v[1] for v in HAULS.values()],
                       "effort_unit": "km2", "depth_layer": "near_bottom"})
    va = pd.DataFrame([{"event_id": e, "variable": t, "value": v, "zero_filled": z} for e, t, v, z in RECORDS])
    store_frames(study, ev, va, source_id="split_trawl", kind="trawl", protocol="split_protocol")
    ev = pd.DataFrame({"event_id": ["P1", "P2"], "event_start": ["2020-06-12 07:00", "2021-06-13 07:00"],
                       "lat": 43.1, "lon": -152.9, "effort": float("nan"), "effort_unit": None,
                       "depth_layer": "surface"})
    va = pd.DataFrame([{"event_id": e, "variable": t, "value": 1.0, "quantity": "presence"}
                       for e, t in (("P1", "Keldora alba"), ("P1", "Keldora nigra"), ("P2", "Keldora nigra"))])
    store_frames(study, ev, va, source_id="split_volunteers", kind="opportunistic", provider_type="volunteer")
    return study
