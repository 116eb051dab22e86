"""The audit finds every known gap of a hand-built store, with the right code and place, and nothing else."""

from __future__ import annotations

import math
import statistics
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from audit_stores import (
    MODEL_OFFSET_C,
    KnownGaps,
    _frame,
    build_known_gaps,
    copy_fixture_study,
)
from factories import store_frames

from harmonize.audit.run import AuditResult, audit
from harmonize.errors import ConfigError, HarmonizeError
from harmonize.study import Study, load_study


@pytest.fixture(scope="module")
def known(tmp_path_factory: pytest.TempPathFactory) -> tuple[Study, KnownGaps]:
    study = load_study(copy_fixture_study(tmp_path_factory.mktemp("audit") / "study"))
    return study, build_known_gaps(study)


@pytest.fixture(scope="module")
def known_audit(known: tuple[Study, KnownGaps]) -> AuditResult:
    """The audit of the known store, run once for the tests that only read it."""
    return audit(known[0])


def _place(f) -> tuple:  # type: ignore[no-untyped-def]
    return (f.code, f.severity, f.source_kind, f.season_year, f.season, f.depth_layer, f.stratum, f.variable)


def test_every_known_gap_is_found_and_nothing_else(known: tuple[Study, KnownGaps], known_audit: AuditResult) -> None:
    study, _ = known
    found = [_place(f) for f in known_audit.findings]
    assert found == [
        # errors first
        ("no_samples", "error", "trawl", 2021, "winter", None, None, None),
        # summer 2022 kept 4 of the 10 hauls each stratum had every earlier year: lost most
        ("thin_samples", "error", "trawl", 2022, "summer", None, "Thorne Deep", None),
        ("thin_samples", "error", "trawl", 2022, "summer", None, "Vossa Bank", None),
        ("missing_year", "error", "plankton", 2020, None, None, None, None),
        # season x layer combinations no biological source samples in any year
        ("no_samples", "warning", "all_biological", None, None, "mesopelagic", None, None),
        ("no_samples", "warning", "all_biological", None, "autumn", None, None, None),
        ("no_samples", "warning", "all_biological", None, "spring", None, None, None),
        ("no_samples", "warning", "all_biological", None, "winter", "epipelagic", None, None),
        ("no_samples", "warning", "all_biological", None, "winter", "surface", None, None),
        ("coverage_drop", "warning", "trawl", 2022, "summer", None, None, None),
        ("few_encounters", "warning", "trawl", None, "summer", "near_bottom", None, "Syrranthus minor"),
        ("volunteer_only", "warning", "opportunistic", None, "winter", "surface", None, None),
        ("source_disagreement", "warning", "trawl", None, None, "near_bottom", None,
         "sea_water_temperature_at_sea_floor"),
    ]


def test_no_samples_counts_the_earlier_years(known: tuple[Study, KnownGaps], known_audit: AuditResult) -> None:
    study, _ = known
    f = next(f for f in known_audit.findings if f.code == "no_samples" and f.severity == "error")
    # trawl had data in 2018-2020 before 2021, winter sampled in all three
    # 20 winter hauls in each earlier year: none by chance has probability exp(-20) (Poisson)
    assert dict(f.details) == {"level": "season", "earlier_years": 3, "earlier_years_sampled": 3,
                               "earlier_mean_samples": 20.0, "p_chance": pytest.approx(math.exp(-20))}
    assert "winter 2021" in f.message and "ingest" in f.message


def test_coverage_drop_against_the_median_of_earlier_years(known: tuple[Study, KnownGaps], known_audit: AuditResult) -> None:
    study, gaps = known
    f = next(f for f in known_audit.findings if f.code == "coverage_drop")
    n = gaps.n_domain_cells
    earlier = [len(set(gaps.trawl_cells[(y, "summer")])) / n for y in range(2018, 2022)]
    # median of the earlier shares with the standard library (statistics.median)
    assert f.details["earlier_median"] == pytest.approx(statistics.median(earlier))
    assert f.details["coverage_fraction"] == pytest.approx(8 / n)
    assert f.details["cells_sampled"] == 8 and f.details["domain_cells"] == n == 165
    assert f.details["coverage_fraction"] < study.audit.coverage_drop * f.details["earlier_median"]


def test_few_encounters_counts_non_zero_records(known: tuple[Study, KnownGaps], known_audit: AuditResult) -> None:
    study, _ = known
    result = known_audit
    f = next(f for f in result.findings if f.code == "few_encounters")
    # three hauls caught it, out of 4 x 20 + 8 summer hauls (samples)
    assert f.details["encounters"] == 3 and f.details["samples"] == 4 * 20 + 8
    assert f.details["min_encounters"] == 10
    assert "too sparse to model alone: merge, roll up or drop" in f.message
    # one finding per sparse taxon; the per-cell numbers are in the readiness table
    row = result.readiness.table.set_index(["taxon", "source_kind", "season"]).loc[
        ("Syrranthus minor", "trawl", "summer")]
    # the first summer haul of the first three years caught it (tests/audit_stores.py)
    assert (row["samples"], row["encounters"], row["years_with_encounters"]) == (88, 3, 3)
    assert row["share_zeros"] == pytest.approx(1 - 3 / 88)


def test_probable_duplicates_are_not_counted(known: tuple[Study, KnownGaps], known_audit: AuditResult) -> None:
    study, _ = known
    result = known_audit
    # The only Larivox pallens record is a flagged volunteer twin: no finding, no extent, no event.
    assert not any(f.variable == "Larivox pallens" for f in result.findings)
    opp = result.extent[result.extent["source_kind"] == "opportunistic"]
    assert set(opp["season"]) == {"winter"}
    assert int(opp["presence_only_events"].sum()) == 12 and int(opp["events"].sum()) == 0


def test_volunteer_only_names_the_season_and_layer(known: tuple[Study, KnownGaps], known_audit: AuditResult) -> None:
    study, _ = known
    f = next(f for f in known_audit.findings if f.code == "volunteer_only")
    assert f.details["events"] == 12 and f.details["source_kinds"] == ["opportunistic"]


def test_source_disagreement_reports_the_offset_and_spread(known: tuple[Study, KnownGaps], known_audit: AuditResult) -> None:
    study, gaps = known
    f = next(f for f in known_audit.findings if f.code == "source_disagreement")
    diffs = np.asarray(gaps.paired_differences)
    # mean and sample standard deviation (ddof=1) of the paired differences, by numpy
    assert f.details["mean_difference"] == pytest.approx(np.mean(diffs), abs=1e-9)
    assert f.details["mean_difference"] == pytest.approx(MODEL_OFFSET_C, abs=1e-9)
    assert f.details["sd_difference"] == pytest.approx(np.std(diffs, ddof=1), abs=1e-9)
    assert f.details["n_cell_periods"] == f.details["n_pairs"] == len(diffs) == 4 * 20 + 4 * 20 + 8
    assert f.details["source_a"] == "survey_trawl" and f.details["source_b"] == "ocean_model"
    assert f.details["tolerance"] == 0.5
    assert "+0.80 degC" in f.message and "168 matched pairs" in f.message


def test_tolerance_from_study_toml(known: tuple[Study, KnownGaps], tmp_path: Path) -> None:
    study, _ = known
    toml = study.file.read_text(encoding="utf-8")
    try:
        study.file.write_text(toml + "\n[audit.tolerance]\nsea_water_temperature_at_sea_floor = 1.0\n", encoding="utf-8")
        relaxed = audit(load_study(study.root))
        assert "source_disagreement" not in relaxed.codes()
        assert len(relaxed.metrics.comparisons) == 1  # the offset is still measured and reported
        study.file.write_text(toml + "\n[audit.tolerance]\nsea_water_temperature_at_sea_floor = -1\n", encoding="utf-8")
        with pytest.raises(ConfigError, match=r"audit\.tolerance\.sea_water_temperature_at_sea_floor.*above 0"):
            audit(load_study(study.root))
    finally:
        study.file.write_text(toml, encoding="utf-8")


def test_annual_audit_reports_the_chosen_year_only(known: tuple[Study, KnownGaps]) -> None:
    study, _ = known
    y2021 = {(f.code, f.season_year) for f in audit(study, year=2021).findings if f.season_year is not None}
    assert y2021 == {("no_samples", 2021)}
    y2022 = {(f.code, f.season_year) for f in audit(study, year=2022).findings if f.season_year is not None}
    assert y2022 == {("coverage_drop", 2022), ("thin_samples", 2022)}
    # later years are left out of the annual audit's tables
    assert audit(study, year=2020).coverage["season_year"].max() == 2020
    with pytest.raises(HarmonizeError, match="cannot audit season year 2031.*2018-2022"):
        audit(study, year=2031)


def test_a_source_silent_in_the_audited_year(study: Study) -> None:
    cells = [(-153.5, 43.0), (-151.5, 43.5), (-152.5, 44.5), (-150.5, 42.5), (-153.2, 42.4)]

    def tows(years: range) -> tuple[pd.DataFrame, pd.DataFrame]:
        ev = [{"event_id": f"e{y}{k}", "event_start": f"{y}-07-10", "lon": lon, "lat": lat,
               "depth_layer": "epipelagic"} for y in years for k, (lon, lat) in enumerate(cells)]
        va = [{"event_id": e["event_id"], "variable": "Copelix marina", "value": 4.0} for e in ev]
        return _frame(ev, {}), _frame(va, {"variable_kind": "taxon", "quantity": "count", "unit": "1",
                                          "zero_filled": False, "no_effort": False})

    store_frames(study, *tows(range(2018, 2021)), source_id="old_net", kind="plankton")
    store_frames(study, *tows(range(2018, 2022)), source_id="new_net", kind="plankton")
    # old_net stopped after 2020: the audit of 2021 calls it missing, the audit of everything does not
    annual = [(f.code, f.details.get("source_id")) for f in audit(study, year=2021).findings if f.code == "missing_year"]
    assert annual == [("missing_year", "old_net")]
    assert "missing_year" not in audit(study).codes()


def test_a_protocol_keeps_its_series_across_sources(study) -> None:  # type: ignore[no-untyped-def]
    # One survey protocol whose 2020 files came through another profile (another source id):
    # the survey's time series has no gap, so no missing_year (common practice: a survey
    # series is defined by its protocol, not by who delivered a year's files).
    import pandas as pd
    from factories import store_frames

    def hauls(years):  # type: ignore[no-untyped-def]
        ev = pd.DataFrame({"event_id": [f"h{y}" for y in years], "event_start": [f"{y}-07-01" for y in years],
                           "lat": 43.2, "lon": -153.0})
        va = pd.DataFrame({"event_id": ev["event_id"], "variable": "Ostravix keldensis", "value": 1.0})
        return ev, va

    store_frames(study, *hauls([2018, 2019, 2021]), source_id="survey_main", kind="trawl", protocol="keldmar_bottom_trawl")
    store_frames(study, *hauls([2020]), source_id="survey_2020_fix", kind="trawl", protocol="keldmar_bottom_trawl")
    store_frames(study, *hauls([2018, 2020]), source_id="no_protocol_source", kind="trawl")
    missing = [(f.season_year, f.details) for f in audit(study).findings if f.code == "missing_year"]
    assert missing == [(2019, {"source_id": "no_protocol_source", "source_ids": ["no_protocol_source"],
                               "years_with_records": [2018, 2020]})]


def test_volunteer_only_counts_samples_and_presence_only_apart(known: tuple[Study, KnownGaps], known_audit: AuditResult) -> None:
    study, _ = known
    f = next(f for f in known_audit.findings if f.code == "volunteer_only")
    # 3 presence-only sightings a winter, 2019-2022; the extent matrix shows them as presence-only, not samples
    assert (f.details["samples"], f.details["presence_only_events"]) == (0, 12)
    assert "(0 samples and 12 presence-only events)" in f.message
