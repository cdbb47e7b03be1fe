"""Attribution and missing data in the response analysis: a change is credited to the regimen that was
running, a change that cannot be computed or confirmed is never "stable", and a laboratory's reproducibility
file cannot turn a direction around. Invented scores and studies (no real patient)."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd
import pytest

from test_response_domain import D, classify_all, graded
from tracker.errors import InputRejected
from tracker.response import change, reproducibility, rules
from tracker.response.regimens import TreatmentPeriod, regimens
from tracker.response.settings import ResponseSettings


def test_a_percent_rule_on_a_zero_baseline_is_not_assessable_not_stable():
    # A clinic's own rule (invented): adjusted INCAT worse by ≥ 50 % of its
    # baseline. From 0 no percentage exists.
    own = rules.RuleSet(
        "clinic-percent",
        "1",
        "invented percent rule",
        (
            rules.Rule(
                "adjusted_incat", 50, ">=", "percent", 1, True, "local rule, invented for a test", "local"
            ),
        ),
    )
    periods = [TreatmentPeriod("ivig", D("2024-01-08"), None, 1.0, "g/kg", 21)]
    rows = [*graded("2024-01-05", 1, 0), *graded("2024-04-05", 1, 3)]  # adjusted INCAT 0 → 3
    [result] = classify_all(periods, rows, "2024-04-05", "clinic-percent", {"clinic-percent": own})
    assert result.classification == "not_assessable"
    assert "cannot be computed" in result.missing[0]


def test_a_switch_of_therapy_without_an_end_date_hands_the_change_to_the_new_regimen():
    # IVIg every 21 days, no end recorded; SCIG weekly from 2024-01-10 (invented). Adjusted
    # INCAT (ICE definition, Hughes RAC et al. Lancet Neurol 2008): 3 → 1 on IVIg, then 4 on
    # SCIG: the relapse is SCIG's, not IVIg's.
    periods = [
        TreatmentPeriod("ivig", D("2023-01-10"), None, 1.0, "g/kg", 21),
        TreatmentPeriod("scig", D("2024-01-10"), None, 0.4, "g/kg", 7),
    ]
    plan = regimens(periods)
    assert plan[0].assessed_until == D("2024-01-09") and plan[1].assessed_until is None
    rows = [
        *graded("2023-01-05", 1, 3),
        *graded("2023-10-05", 1, 1),
        *graded("2024-01-08", 1, 1),
        *graded("2024-06-05", 1, 4),
    ]
    ivig, scig = classify_all(periods, rows, "2024-06-05")
    assert (ivig.regimen.therapy, ivig.classification) == ("ivig", "improved")
    assert ivig.evidence[0]["date"] == D("2024-01-08")  # followed only until SCIG began
    assert (scig.regimen.therapy, scig.classification) == ("scig", "worsened")


def test_a_baseline_never_predates_the_previous_regimen():
    # Corticosteroid taper (invented): 60 mg from 2023-09-11, 40 mg from 2023-11-06. The score
    # of 2023-09-05 is the 60 mg regimen's baseline; crediting the 40 mg step with the change
    # from it would hide whose effect it was.
    periods = [
        TreatmentPeriod("corticosteroid", D("2023-09-11"), D("2023-11-05"), 60, "mg", 1),
        TreatmentPeriod("corticosteroid", D("2023-11-06"), D("2024-01-07"), 40, "mg", 1),
    ]
    rows = [*graded("2023-09-05", 1, 3), *graded("2023-12-12", 1, 2)]
    sixty, forty = classify_all(periods, rows, "2023-12-12")
    assert (
        forty.classification == "not_assessable" and "previous regimen began (2023-09-11)" in forty.missing[0]
    )
    # With the setting off (our rule, shown in the trace), the 2023-09-05 score is taken again.
    plan = regimens(periods)
    scores_by = rules.series_by_scale(
        pd.DataFrame([{"date": D(d), "scale": s, "value": float(v)} for d, s, v in rows])
        .assign(patient=1)
        .pipe(_computed)
    )
    loose = rules.classify(
        plan[1],
        scores_by,
        rules.rule_sets()["trial-aincat"],
        at=D("2023-12-12"),
        settings=ResponseSettings(baseline_after_previous_regimen=False),
    )
    assert loose.classification == "improved" and loose.evidence[0]["baseline_date"] == D("2023-09-05")
    assert any(s["setting"] == "baseline_after_previous_regimen" for s in ResponseSettings().describe())


def _computed(frame: pd.DataFrame) -> pd.DataFrame:
    from tracker.response.scales import with_computed

    return with_computed(frame)[0]


def test_a_laboratory_file_cannot_turn_a_direction_around_or_drop_a_figure(tmp_path):
    good = tmp_path / "lab.csv"
    good.write_text(
        "parameter,better,cov_pct,change_kind,source\n"
        "segment_velocity,Higher,5,Percent,our laboratory (invented)\n",
        encoding="utf-8",
    )
    table = reproducibility.from_file(good)
    assert table["segment_velocity"].higher_is_better and table["segment_velocity"].change_kind == "percent"
    assert table["segment_velocity"].sdc == round(2.77 * 5, 1)  # SDC ≈ 2.77 × CoV (normatives.md §3.1)
    reversed_file = tmp_path / "reversed.csv"
    reversed_file.write_text(
        "parameter,better,cov_pct,source\nsegment_velocity,lower,5,our laboratory (invented)\n",
        encoding="utf-8",
    )
    with pytest.raises(InputRejected) as refused:
        reproducibility.from_file(reversed_file)
    assert [(p.row, p.column) for p in refused.value.problems] == [(2, "better")]
    empty = tmp_path / "empty.csv"
    empty.write_text(
        "parameter,cov_pct,sdc_pct,source\ndistal_latency,,,our laboratory (invented)\n", encoding="utf-8"
    )
    with pytest.raises(InputRejected) as refused:
        reproducibility.from_file(empty)
    assert [(p.row, p.column) for p in refused.value.problems] == [(2, "sdc_pct")]


def test_a_temperature_not_recorded_makes_a_change_less_certain():
    # Common practice, no source: a change whose limb temperature is unknown at
    # one visit cannot be trusted as fully.
    values = pd.DataFrame(
        [
            {
                "visit_key": 1,
                "nerve": "median",
                "side": "left",
                "modality": "motor",
                "parameter": "segment_velocity",
                "where": "wrist → elbow",
                "value": 50.0,
                "absent": False,
                "temperature_c": 33.0,
                "lff_hz": 2.0,
                "distance_mm": 230.0,
            },
            {
                "visit_key": 2,
                "nerve": "median",
                "side": "left",
                "modality": "motor",
                "parameter": "segment_velocity",
                "where": "wrist → elbow",
                "value": 49.0,
                "absent": False,
                "temperature_c": np.nan,
                "lff_hz": 2.0,
                "distance_mm": 230.0,
            },
        ],
        columns=change.NERVE_VALUE_COLUMNS,
    )
    frame = change.nerve_changes(
        values, 2, 1, "previous", dt.date(2024, 1, 10), reproducibility.shipped(), ResponseSettings()
    )
    assert "limb temperature not recorded" in frame["less_certain"].iloc[0]
    values.loc[1, "temperature_c"] = 33.0
    values.loc[1, "distance_mm"] = np.nan
    frame = change.nerve_changes(
        values, 2, 1, "previous", dt.date(2024, 1, 10), reproducibility.shipped(), ResponseSettings()
    )
    assert frame["less_certain"].iloc[0] == "distance not recorded at both visits"


def test_slope_and_interval_equal_scipy_linregress():
    # The statistics library itself (SciPy): slope, standard error and Student t
    # quantile with n − 2 degrees of freedom.
    from scipy import stats

    from tracker.response.trend import slope_per_year

    days = [D("2022-01-03"), D("2022-05-17"), D("2022-11-30"), D("2023-06-02"), D("2024-02-20")]
    values = [41.0, 39.5, 36.2, 37.9, 33.1]  # invented velocities, m/s
    years = [(d - days[0]).days / 365.25 for d in days]
    fit = stats.linregress(years, values)
    half = stats.t.ppf(0.975, len(days) - 2) * fit.stderr
    result = slope_per_year(days, values)
    assert result.slope == pytest.approx(fit.slope, rel=1e-12)
    assert (result.low, result.high) == (
        pytest.approx(fit.slope - half, rel=1e-9),
        pytest.approx(fit.slope + half, rel=1e-9),
    )
