"""Twins by track and by count (issue 17, finding 6).

- A seabird reported beside a transect segment is a repeat of the segment's count when it is
  within the window of any point the ship passed, so the distance is to the nearest point of
  the segment's track (the strip runs along the whole track: Tasker et al. 1984, The Auk
  101:567-577), not to its midpoint. Distances here are set with GeographicLib (Karney 2013).
- Two observers counting one flock agree within a factor of two (common practice): a
  volunteer count far above the agency's is another sighting; a complete checklist with its
  own effort is matched record by record and never dropped whole.
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import pytest
from geographiclib.geodesic import Geodesic

from harmonize import Store, load_study, run
from harmonize.study import Study
from tests.factories import store_frames

G = Geodesic.WGS84
START = (43.5, -152.0)
END = G.Direct(*START, 90.0, 10_000.0)  # a 10 km segment due east
HEADER = ("sighting_id,list_id,obs_time,latitude,longitude,observer_name,species,how_many,all_reported,"
          "minutes_watched,km_travelled\n")


def _segment(study: Study, counts: dict[str, float]) -> None:
    mid = G.Direct(*START, 90.0, 5_000.0)
    events = pd.DataFrame({"event_id": ["S1"], "event_start": ["2022-11-05T08:00"],
                           "event_end": ["2022-11-05T08:35"], "lat": [mid["lat2"]], "lon": [mid["lon2"]],
                           "depth_min_m": [0.0], "depth_max_m": [0.0], "effort": [3.0],
                           "track_start_lat": [START[0]], "track_start_lon": [START[1]],
                           "track_end_lat": [END["lat2"]], "track_end_lon": [END["lon2"]]})
    values = pd.DataFrame({"event_id": ["S1"] * len(counts), "variable": list(counts), "value": list(counts.values())})
    store_frames(study, events, values, source_id="keldmar_ship_survey", kind="transect")


def _volunteer(study_dir: Path, rows: list[str]) -> dict[str, bool]:
    (study_dir / "v.csv").write_text(HEADER + "".join(r + "\n" for r in rows))
    study = load_study(study_dir)
    run(study, "opportunistic_volunteer", {"rows": study_dir / "v.csv"})
    with Store(study.store_dir).connect() as con:
        rows_ = con.execute("""SELECT event_id || ':' || variable, list_contains(flags, 'probable_duplicate')
                               FROM observations WHERE source_kind = 'opportunistic' AND NOT zero_filled""").fetchall()
    return dict(rows_)


@pytest.mark.parametrize(("from_start", "side", "twin"), [
    # the fast lane runs one case inside and one outside the window; make test runs all
    pytest.param(-150.0, 0.0, True, marks=pytest.mark.slow),      # 150 m before the start, on the line: 5.15 km from the midpoint
    (10_150.0, 0.0, True),    # 150 m past the end
    pytest.param(2_000.0, 1_900.0, True, marks=pytest.mark.slow),  # 1.9 km abeam of a point on the track
    pytest.param(2_000.0, 2_100.0, False, marks=pytest.mark.slow),  # 2.1 km abeam: outside the 2 km window
    (12_200.0, 0.0, False),   # 2.2 km past the end
])
def test_distance_is_to_the_nearest_point_of_the_track(study_dir: Path, from_start: float, side: float,
                                                       twin: bool) -> None:
    study = load_study(study_dir)
    _segment(study, {"Procellix keldica": 4.0})
    along = G.Direct(*START, 90.0 if from_start >= 0 else 270.0, abs(from_start))
    point = G.Direct(along["lat2"], along["lon2"], 0.0, side)
    flagged = _volunteer(study_dir, [f"A1,,2022-11-05T08:20,{point['lat2']:.7f},{point['lon2']:.7f},Ann,keld fulmar,noted,false,,"])
    assert list(flagged.values()) == [twin]


def test_busy_checklist_is_matched_record_by_record(study_dir: Path) -> None:
    """The issue's case: a one-hour complete checklist (200 gulls, 3 fulmars) 0.5 km from the
    segment's midpoint, where the ship counted 1 gull and 1 fulmar: no record is a repeat."""
    study = load_study(study_dir)
    _segment(study, {"Larivox pallens": 1.0, "Procellix keldica": 1.0})
    mid = G.Direct(*START, 90.0, 5_000.0)
    near = G.Direct(mid["lat2"], mid["lon2"], 0.0, 500.0)
    where = f"{near['lat2']:.7f},{near['lon2']:.7f}"
    flagged = _volunteer(study_dir, [f"C1,L1,2022-11-05T08:00,{where},Bo,pale gull,200,true,60,0",
                                     f"C2,L1,2022-11-05T08:00,{where},Bo,keld fulmar,3,true,60,0"])
    assert flagged and not any(flagged.values())


def test_a_count_within_a_factor_two_is_still_a_twin(study_dir: Path) -> None:
    study = load_study(study_dir)
    _segment(study, {"Larivox pallens": 3.0, "Procellix keldica": 1.0})
    mid = G.Direct(*START, 90.0, 5_000.0)
    near = G.Direct(mid["lat2"], mid["lon2"], 0.0, 500.0)
    where = f"{near['lat2']:.7f},{near['lon2']:.7f}"
    flagged = _volunteer(study_dir, [f"C1,L1,2022-11-05T08:00,{where},Bo,pale gull,5,true,60,0",
                                     f"C2,L1,2022-11-05T08:00,{where},Bo,keld fulmar,3,true,60,0"])
    # 5 gulls <= 2 x 3: a repeat; 3 fulmars > 2 x 1: another sighting
    assert {k.split(":")[1]: v for k, v in flagged.items()} == {"Larivox pallens": True, "Procellix keldica": False}
