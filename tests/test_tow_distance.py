"""Tow length (issue 17, finding 4): a logged distance wins over the straight start-end line.

Area swept a = D x w with D the distance towed (Sparre and Venema 1998, FAO Fisheries
Technical Paper 306/1 Rev. 2, section 13.5). The straight line between start and end cuts a
tow's turns short, so a logged distance is the better D when the provider has one (common
practice); a straight line more than 10 % away from the log is flagged for a look.
"""

from __future__ import annotations

from pathlib import Path

import pytest
from geographiclib.geodesic import Geodesic

from harmonize import load_study, run
from harmonize.store import Store

PROFILE = """
[source]
id = "trawl_logged"
kind = "trawl"
provider_type = "agency"
protocol = "keldmar_bottom_trawl"

[columns.events]
event_id = "HAUL"
start_time = "START"
end_time = "END"
start_lat = "LAT_S"
start_lon = "LON_S"
end_lat = "LAT_E"
end_lon = "LON_E"
distance = "DIST_KM"
net_width_m = "WING_M"
bottom_depth_m = "DEPTH_M"

[columns.records]
event_id = "HAUL"
taxon = "SPECIES"
count = "N"
"""
START = (43.0, -153.0)
END = (43.02, -153.0)  # about 2.22 km due north


def _straight_km() -> float:
    # Karney 2013, Algorithms for geodesics, J. Geodesy 87:43-55 (GeographicLib)
    return Geodesic.WGS84.Inverse(*START, *END)["s12"] / 1000.0


def _ingest(study_dir: Path, logged: str) -> tuple[float, list[str], list[str]]:
    (study_dir / "profiles" / "trawl_logged.toml").write_text(PROFILE)
    (study_dir / "h.csv").write_text(
        "HAUL,START,END,LAT_S,LON_S,LAT_E,LON_E,DIST_KM,WING_M,DEPTH_M\n"
        f"T1,2021-07-01T06:00,2021-07-01T06:30,{START[0]},{START[1]},{END[0]},{END[1]},{logged},20,50\n")
    (study_dir / "c.csv").write_text("HAUL,SPECIES,N\nT1,keld cod,7\n")
    study = load_study(study_dir)
    result = run(study, "trawl_logged", {"events": study_dir / "h.csv", "records": study_dir / "c.csv"})
    with Store(study.root / "store").connect(read_only=True) as con:
        effort, flags = con.sql("SELECT effort, flags FROM observations WHERE variable = 'Ostravix keldensis' "
                                "AND NOT zero_filled").fetchall()[0]
    return effort, list(flags), result.notes


def test_logged_distance_wins_and_a_far_straight_line_is_flagged(study_dir: Path) -> None:
    """The issue's haul: logged 3.6 km, straight line 2.22 km -> area from 3.6 km, flagged."""
    effort, flags, notes = _ingest(study_dir, "3.6")
    assert effort == pytest.approx(3.6 * 20 / 1000.0, rel=1e-12)
    assert "distance_logged" in flags and "distance_disagrees" in flags
    assert any("1 haul(s)" in n and "distance_disagrees" in n for n in notes)


# the fast lane runs the cases nearest the 10 % edge on each side; make test runs all
@pytest.mark.parametrize("share", [pytest.param(0.95, marks=pytest.mark.slow), pytest.param(1.05, marks=pytest.mark.slow),
                                   1.09, 0.915, 1.12, 0.88])
def test_straight_line_flagged_only_beyond_ten_percent(study_dir: Path, share: float) -> None:
    logged = _straight_km() * share
    effort, flags, notes = _ingest(study_dir, repr(logged))
    assert effort == pytest.approx(logged * 20 / 1000.0, rel=1e-12)
    far = abs(_straight_km() - logged) > 0.10 * logged
    assert ("distance_disagrees" in flags) is far
    assert any("distance_disagrees" in n for n in notes) is far


def test_without_a_log_the_straight_line_is_used(study_dir: Path) -> None:
    effort, flags, _ = _ingest(study_dir, "")
    assert effort == pytest.approx(_straight_km() * 20 / 1000.0, rel=1e-9)
    assert "distance_logged" not in flags and "distance_disagrees" not in flags
