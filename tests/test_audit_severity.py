"""Severity from evidence: a gap chance does not explain is an error, a chance-level one a note.

The expected probabilities are computed here with scipy.stats.poisson, independently of the
audit's own Poisson sum: for a mean of m samples a year, P(none) = exp(-m) and P(at most k) =
sum_{i<=k} exp(-m) m^i / i! (Poisson 1837; e.g. Johnson, Kemp and Kotz 2005, Univariate
Discrete Distributions, ch. 4).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from audit_stores import _frame, copy_fixture_study
from factories import store_frames
from hypothesis import given
from hypothesis import strategies as st
from scipy.stats import poisson

from harmonize.audit.findings import CHANCE_P, poisson_cdf
from harmonize.audit.run import audit, domain_cells
from harmonize.study import Study, load_study

YEARS = range(2018, 2024)
#: Tows per spring: a regular epipelagic series (10 a year) with one real gap (2022) and one
#: near-empty year (2023); a sparse mesopelagic layer (1-2 a year) missing once (2021).
EPI = {2018: 10, 2019: 10, 2020: 10, 2021: 10, 2022: 0, 2023: 1}
MESO = {2018: 1, 2019: 2, 2020: 1, 2021: 0, 2022: 2, 2023: 1}


def _tows(study: Study) -> None:
    cells = domain_cells(study).reset_index(drop=True)
    ev, va = [], []
    for layer, per_year in (("epipelagic", EPI), ("mesopelagic", MESO)):
        for year, n in per_year.items():
            for k in range(n):
                cell = cells.iloc[(7 * k + year) % len(cells)]
                eid = f"{layer[:4]}{year}{k}"
                ev.append({"event_id": eid, "event_start": f"{year}-04-{10 + k:02d} 08:00", "lat": cell["lat"],
                           "lon": cell["lon"], "depth_layer": layer})
                va.append({"event_id": eid, "variable": "Copelix marina", "value": 3.0})
    store_frames(study, _frame(ev, {"effort": 50.0, "effort_unit": "m3"}),
                 _frame(va, {"variable_kind": "taxon", "quantity": "count", "unit": "1",
                             "zero_filled": False, "no_effort": False}),
                 source_id="net_tows", kind="plankton")


@pytest.fixture(scope="module")
def result(tmp_path_factory: pytest.TempPathFactory):  # type: ignore[no-untyped-def]
    study = load_study(copy_fixture_study(tmp_path_factory.mktemp("severity") / "study"))
    _tows(study)
    return audit(study)


def _one(result, code: str, year: int, layer: str):  # type: ignore[no-untyped-def]
    hits = [f for f in result.findings if (f.code, f.season_year, f.depth_layer) == (code, year, layer)]
    assert len(hits) == 1, [(f.code, f.season_year, f.depth_layer) for f in result.findings]
    return hits[0]


def test_a_real_gap_in_a_regular_series_is_an_error(result) -> None:  # type: ignore[no-untyped-def]
    f = _one(result, "no_samples", 2022, "epipelagic")
    mean = np.mean([EPI[y] for y in range(2018, 2022)])  # 10 a year before 2022
    expected = poisson.pmf(0, mean)  # exp(-10) = 4.5e-5
    assert f.details["earlier_mean_samples"] == pytest.approx(mean)
    assert f.details["p_chance"] == pytest.approx(expected, rel=1e-9)
    assert expected < CHANCE_P and f.severity == "error"
    assert "probability < 0.0001 (Poisson)" in f.message


def test_a_sparse_layer_missing_once_is_a_note(result) -> None:  # type: ignore[no-untyped-def]
    f = _one(result, "no_samples", 2021, "mesopelagic")
    mean = np.mean([MESO[y] for y in range(2018, 2021)])  # (1 + 2 + 1) / 3
    expected = poisson.pmf(0, mean)  # about 0.26: chance
    assert f.details["p_chance"] == pytest.approx(expected, rel=1e-9)
    assert expected >= CHANCE_P and f.severity == "info"
    assert "chance explains it" in f.message


def test_thin_samples_severity_from_the_earlier_mean(result) -> None:  # type: ignore[no-untyped-def]
    # 1 tow in 2023 against 10, 10, 10, 10, 0 before (the gap year counts as zero): mean 8
    f = _one(result, "thin_samples", 2023, "epipelagic")
    expected = poisson.cdf(1, np.mean([EPI[y] for y in range(2018, 2023)]))
    assert f.details["p_chance"] == pytest.approx(expected, rel=1e-9)
    assert expected < CHANCE_P and f.severity == "error"
    # the sparse layer is always thin: notes, never errors
    sparse = [f for f in result.findings if f.code == "thin_samples" and f.depth_layer == "mesopelagic"]
    assert sparse and {f.severity for f in sparse} == {"info"}
    for f in sparse:
        earlier = [MESO[y] for y in range(2018, f.season_year)]
        if earlier:
            assert f.details["p_chance"] == pytest.approx(poisson.cdf(MESO[f.season_year], np.mean(earlier)))
        else:  # the first year has nothing to compare with
            assert f.details["p_chance"] is None


@given(k=st.integers(0, 30), mean=st.floats(0.0, 200.0, allow_nan=False))
def test_poisson_cdf_matches_scipy(k: int, mean: float) -> None:
    assert poisson_cdf(k, mean)[0] == pytest.approx(poisson.cdf(k, mean), rel=1e-9, abs=1e-300)


def test_a_planned_stratum_that_lost_most_is_an_error(tmp_path: Path) -> None:
    study = load_study(copy_fixture_study(tmp_path / "study"))
    cells = domain_cells(study).reset_index(drop=True)
    west = cells[cells["lon"] < -152.0].reset_index(drop=True)
    east = cells[cells["lon"] > -152.0].reset_index(drop=True)
    ev, va = [], []
    # 6 hauls a year in each stratum, then 2 in the west in 2022
    for year in range(2018, 2023):
        for part, frame, n in (("w", west, 2 if year == 2022 else 6), ("e", east, 6)):
            for k in range(n):
                cell = frame.iloc[k]
                eid = f"{part}{year}{k}"
                ev.append({"event_id": eid, "event_start": f"{year}-07-{10 + k:02d} 08:00", "lat": cell["lat"],
                           "lon": cell["lon"], "depth_layer": "near_bottom"})
                va.append({"event_id": eid, "variable": "Ostravix keldensis", "value": 2.0})
    store_frames(study, _frame(ev, {"effort": 0.05, "effort_unit": "km2"}),
                 _frame(va, {"variable_kind": "taxon", "quantity": "count", "unit": "1",
                             "zero_filled": False, "no_effort": False}),
                 source_id="shelf_trawl", kind="trawl")
    found = [f for f in audit(study).findings if f.code == "thin_samples" and f.stratum is not None]
    assert len(found) == 1
    f = found[0]
    assert (f.severity, f.season_year, f.details["events"]) == ("error", 2022, 2)
    assert f.details["earlier_mean_samples"] == pytest.approx(6.0)
    # 2 of 6 is chance-level on its own (p about 0.06), but the stratum lost two thirds of its hauls
    assert poisson.cdf(2, 6.0) > CHANCE_P
    assert "lost most of its samples" in f.message


def _coverage(cells_by_year: dict[int, int], domain: int = 548) -> object:
    """Metrics holding only a coverage table: one source kind, one season, cells sampled per year."""
    import pandas as pd

    from harmonize.audit.metrics import Metrics

    years = sorted(cells_by_year)
    cov = pd.DataFrame({"source_kind": "opportunistic", "season": "summer", "season_year": years,
                        "events": [max(c, 1) for c in cells_by_year.values()],
                        "cells_sampled": list(cells_by_year.values()), "domain_cells": domain,
                        "coverage_fraction": [c / domain for c in cells_by_year.values()], "complete": True})
    empty = pd.DataFrame()
    return Metrics(extent=empty, coverage=cov, layer_events=empty, stratum_events=empty, source_years=empty,
                   bio_providers=empty, encounters=empty, comparisons=empty, cell_maps=empty, suppressed=empty,
                   n_domain_cells=domain)


@pytest.mark.parametrize(("cells", "severity"), [
    # 4 cells a year before, 1 now: below half the median, but P(X <= 1 | mean 4) = 0.092 -> a note
    ({2018: 4, 2019: 4, 2020: 1}, "info"),
    # 50 cells a year before, 20 now: P(X <= 20 | mean 50) ~ 1e-6 -> a warning
    ({2018: 50, 2019: 50, 2020: 20}, "warning"),
])
def test_coverage_drop_severity_from_evidence(cells: dict[int, int], severity: str) -> None:
    from types import SimpleNamespace

    from harmonize.audit.findings import coverage_drop

    study = SimpleNamespace(audit=SimpleNamespace(coverage_drop=0.5))
    found = coverage_drop(_coverage(cells), study, None)  # type: ignore[arg-type]
    assert [f.severity for f in found] == [severity]
    earlier = np.median([cells[2018], cells[2019]])
    expected_p = poisson.cdf(cells[2020], earlier)  # scipy, independently of the audit's sum
    assert found[0].details["p_chance"] == pytest.approx(expected_p, rel=1e-9)
    assert (expected_p >= CHANCE_P) == (severity == "info")
