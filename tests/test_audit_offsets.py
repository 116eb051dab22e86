"""The offset between an in-situ source and a gridded source, from matched pairs."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from factories import store_frames

from harmonize import load_study
from harmonize.audit.report import render_html
from harmonize.audit.run import audit
from harmonize.study import Study

VAR = "sea_water_temperature_at_sea_floor"
#: (lon, lat) of the sampled places, inside the fixture domain (42-45 N, 154-150 W)
PLACES = [(-153.5, 42.5), (-152.0, 43.0), (-151.0, 44.0), (-150.5, 44.5)]
#: a model that is right: June 8, July 10, August 12 degC at every place
MODEL = {6: 8.0, 7: 10.0, 8: 12.0}


def _model(study: Study, bias_by_month: dict[int, float] | None = None) -> None:
    """Monthly bottom temperatures as the gridded adapter stores them: one value per cell and month."""
    ev, va = [], []
    for k, (lon, lat) in enumerate(PLACES):
        for month, temp in MODEL.items():
            eid = f"cell{k}/2021-{month:02d}"
            ev.append({"event_id": eid, "event_start": f"2021-{month:02d}-01",
                       "event_end": f"2021-{month + 1:02d}-01", "lat": lat, "lon": lon, "depth_layer": "near_bottom",
                       "effort": 600.0, "effort_unit": "km2"})
            va.append({"event_id": eid, "variable": VAR, "value": temp, "variable_kind": "physical",
                       "quantity": "measurement", "unit": "degC"})
    store_frames(study, pd.DataFrame(ev), pd.DataFrame(va), source_id="ocean_model", kind="gridded",
                 provider_type="model")


def _sensors(study: Study, months: list[int], bias_c: float, per_place: int = 3) -> list[float]:
    """Bottom sensors on hauls: the true temperature of their month plus bias_c; returns the differences."""
    ev, va, diffs = [], [], []
    for k, (lon, lat) in enumerate(PLACES):
        for month in months:
            for j in range(per_place):
                eid = f"H{k}{month}{j}"
                ev.append({"event_id": eid, "event_start": f"2021-{month:02d}-{5 + 7 * j:02d} 08:00",
                           "lat": lat, "lon": lon, "depth_layer": "near_bottom", "bottom_depth_m": 80.0})
                value = MODEL.get(month, 11.0) + bias_c
                va += [{"event_id": eid, "variable": "Ostravix keldensis", "value": 3.0, "variable_kind": "taxon",
                        "quantity": "count", "unit": "1", "no_effort": False},
                       {"event_id": eid, "variable": VAR, "value": value, "variable_kind": "physical",
                        "quantity": "measurement", "unit": "degC", "no_effort": True}]
                diffs.append(value - MODEL.get(month, 11.0))
    store_frames(study, pd.DataFrame(ev), pd.DataFrame(va), source_id="bottom_trawl", kind="trawl")
    return diffs


def test_sensors_that_sampled_only_june_against_a_right_model_give_no_offset(study_dir: Path) -> None:
    study = load_study(study_dir)
    _model(study)
    _sensors(study, [6], 0.0)
    result = audit(study)
    comp = result.metrics.comparisons
    assert len(comp) == 1
    row = comp.iloc[0]
    # June sensors (8 degC) beside the model's June (8 degC): every difference is 0. Averaging
    # each source over the summer first would give 8 - (8 + 10 + 12) / 3 = -2 degC.
    assert row["mean_difference"] == pytest.approx(0.0, abs=1e-12)
    assert row["n_pairs"] == 4 * 3 and row["n_cell_periods"] == 4
    assert "source_disagreement" not in result.codes()


def test_a_constant_bias_is_the_offset(study_dir: Path) -> None:
    study = load_study(study_dir)
    _model(study)
    diffs = _sensors(study, [6, 7, 8], 0.8)
    result = audit(study)
    row = result.metrics.comparisons.iloc[0]
    # mean and sample sd (ddof=1) of the paired differences, by numpy
    assert row["mean_difference"] == pytest.approx(np.mean(diffs), abs=1e-12)
    assert row["mean_difference"] == pytest.approx(0.8, abs=1e-12)
    assert row["sd_difference"] == pytest.approx(np.std(diffs, ddof=1), abs=1e-12)
    assert row["n_pairs"] == 4 * 3 * 3 and row["n_cell_periods"] == 4 * 3
    assert (row["source_a"], row["source_b"]) == ("bottom_trawl", "ocean_model")
    f = next(f for f in result.findings if f.code == "source_disagreement")
    assert "+0.80 degC" in f.message and "36 matched pairs" in f.message and "12 cell-periods" in f.message
    assert f.details["delta_change_offset"] == pytest.approx(0.8, abs=1e-12)
    html = render_html(result)
    assert '<th class="num">pairs</th>' in html and "paired with the gridded value of its own cell and period" in html


def test_a_haul_outside_every_gridded_period_is_not_paired(study_dir: Path) -> None:
    study = load_study(study_dir)
    _model(study)
    _sensors(study, [9], 0.8)  # September: the model stops at August
    assert audit(study).metrics.comparisons.empty
