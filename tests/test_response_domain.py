"""Treatment response, pure logic (no database): published definitions as
worked examples, then invented stories.

Published definitions are checked just below, at and just above each threshold with the source's own
comparator; the source is written beside each check. Every patient story, date and value in the second half is
INVENTED for these tests (plain TreatmentPeriod lists and score frames) and describes no real person.
"""

from __future__ import annotations

import datetime as dt
import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from tracker.errors import InputRejected
from tracker.response import change, reproducibility, rules, trend
from tracker.response.regimens import TreatmentPeriod, regimens
from tracker.response.scales import scale_table, with_computed
from tracker.response.settings import ResponseSettings

D = dt.date.fromisoformat
CLASSIFICATIONS = {"improved", "stable", "worsened", "not_assessable"}


def scores(rows: list[tuple[str, str, float]]) -> pd.DataFrame:
    """A score frame of one patient from (date, scale, value) rows."""
    return pd.DataFrame(
        [{"patient": 1, "date": D(d), "scale": s, "value": float(v)} for d, s, v in rows],
        columns=["patient", "date", "scale", "value"],
    )


def graded(day: str, arm: int, leg: int, **others: float) -> list[tuple[str, str, float]]:
    """INCAT arm and leg grades of one day (plus any other scales of that day)."""
    return [
        (day, "incat_arm", arm),
        (day, "incat_leg", leg),
        *[(day, scale, value) for scale, value in others.items()],
    ]


def value_of(frame: pd.DataFrame, day: str, scale: str) -> float:
    [value] = frame[(frame["date"] == D(day)) & (frame["scale"] == scale)]["value"].tolist()
    return value


def classify_all(
    periods: list[TreatmentPeriod],
    rows: list[tuple[str, str, float]],
    at: str,
    rule_set: str = rules.DEFAULT_RULES,
    available: dict | None = None,
) -> list[rules.Classification]:
    """Every regimen started by ``at``, classified as seen on ``at`` (recorded plus computed scores)."""
    plan = [r for r in regimens(periods) if r.start_date <= D(at)]
    frame, _ = with_computed(scores(rows))
    series = rules.series_by_scale(frame)
    chosen = (available or rules.rule_sets())[rule_set]
    return [rules.classify(r, series, chosen, at=D(at)) for r in plan]


def previous_verdict(scale: str, before: float, after: float) -> str:
    """The verdict of a change between two scored days of one scale (reference: the previous score)."""
    frame = scores([("2024-01-10", scale, before), ("2024-04-10", scale, after)])
    changes = change.score_changes(frame, scale_table(), {}, ResponseSettings())
    [verdict] = changes[(changes["reference"] == "previous") & (changes["date"] == D("2024-04-10"))][
        "verdict"
    ].tolist()
    return verdict


# -- Adjusted INCAT (published definition) -------------------------------------------------------------------


# Adjusted INCAT: as INCAT, but a change of the arm grade between 0 and 1 is not counted. ICE
# trial, Hughes RAC et al. Lancet Neurol 2008;7:136–144, definition as read in normatives.md
# §4.1 (Biomarker Research 2019 table).
@pytest.mark.parametrize(
    ("arm", "leg", "incat", "adjusted"),
    [
        (0, 0, 0, 0),  # normal
        (1, 0, 1, 0),  # arm grade 1 alone is not counted by the adjusted score
        (2, 0, 2, 1),  # arm grade 2 counts one point
        (1, 3, 4, 3),
        (5, 5, 10, 9),  # the adjusted score tops out at 9 (arm 5 counts 4)
    ],
)
def test_incat_and_adjusted_incat_from_the_grades(arm, leg, incat, adjusted):
    frame, notes = with_computed(scores(graded("2024-01-10", arm, leg)))
    assert value_of(frame, "2024-01-10", "incat") == incat  # INCAT = arm 0–5 + leg 0–5 (normatives.md §4.1)
    assert value_of(frame, "2024-01-10", "adjusted_incat") == adjusted
    assert set(frame[frame["scale"].isin(["incat", "adjusted_incat"])]["computed"]) == {True}
    assert notes == []


def test_an_arm_change_from_0_to_1_is_not_counted_by_the_adjusted_incat():
    # ICE (Hughes RAC et al. Lancet Neurol 2008), normatives.md §4.1: the arm change 0 → 1 does not count.
    frame, _ = with_computed(scores([*graded("2024-01-10", 0, 2), *graded("2024-04-10", 1, 2)]))
    changes = change.score_changes(frame, scale_table(), {}, ResponseSettings())
    previous = changes[(changes["reference"] == "previous") & (changes["date"] == D("2024-04-10"))].set_index(
        "scale"
    )
    assert previous.loc["incat", "change"] == 1 and previous.loc["incat", "verdict"] == "worsened"
    assert (
        previous.loc["adjusted_incat", "change"] == 0
        and previous.loc["adjusted_incat", "verdict"] == "within_noise"
    )


def test_an_arm_change_from_1_to_2_is_counted_by_the_adjusted_incat():
    # ICE (Hughes RAC et al. Lancet Neurol 2008), normatives.md §4.1: only the 0–1 step is left out.
    frame, _ = with_computed(scores([*graded("2024-01-10", 1, 2), *graded("2024-04-10", 2, 2)]))
    changes = change.score_changes(frame, scale_table(), {}, ResponseSettings())
    previous = changes[(changes["reference"] == "previous") & (changes["date"] == D("2024-04-10"))].set_index(
        "scale"
    )
    assert (
        previous.loc["adjusted_incat", "change"] == 1
        and previous.loc["adjusted_incat", "verdict"] == "worsened"
    )


def test_typed_totals_that_disagree_with_the_grades_are_named():
    # Invented: a typed INCAT of 4 beside grades 1 + 2, and a typed adjusted
    # INCAT of 3 beside the same grades.
    rows = [*graded("2024-01-10", 1, 2), ("2024-01-10", "incat", 4), ("2024-01-10", "adjusted_incat", 3)]
    frame, notes = with_computed(scores(rows))
    assert value_of(frame, "2024-01-10", "incat") == 4  # the typed total is kept …
    assert value_of(frame, "2024-01-10", "adjusted_incat") == 2  # … the adjusted score comes from the grades
    assert len(notes) == 2 and "typed INCAT 4 differs from arm + leg grades 3" in notes[0]
    assert "typed adjusted INCAT 3 replaced by 2" in notes[1]


def test_the_weaker_hand_is_the_lower_grip_of_the_day():
    frame, _ = with_computed(
        scores([("2024-01-10", "grip_kpa_left", 62.5), ("2024-01-10", "grip_kpa_right", 48.0)])
    )
    assert value_of(frame, "2024-01-10", "grip_kpa_weaker") == 48.0


# -- Minimal important changes: just below, at, just above, with the source's comparator ---------------------


@pytest.mark.parametrize(
    ("scale", "before", "after", "expected"),
    [
        # INCAT ≥1 point: ICE, ProCID and PATH (normatives.md §4.1). Higher is worse.
        ("incat", 3, 3, "within_noise"),
        ("incat", 3, 2.1, "within_noise"),
        ("incat", 3, 2, "improved"),
        ("incat", 3, 4, "worsened"),
        ("incat", 3, 5, "worsened"),
        # Adjusted INCAT ≥1 point: ICE, Hughes RAC et al. Lancet Neurol 2008; PATH, van Schaik IN et al.
        # Lancet Neurol 2018 (normatives.md §4.2).
        ("adjusted_incat", 2, 2.9, "within_noise"),
        ("adjusted_incat", 2, 3, "worsened"),
        ("adjusted_incat", 2, 1, "improved"),
        # I-RODS ≥4 centile points: ADHERE, Allen JA et al. Lancet Neurol 2024 (normatives.md §4.1; from
        # memory, not verified, per §4.2). Higher is better.
        ("i_rods", 50, 53.9, "within_noise"),
        ("i_rods", 50, 54, "improved"),
        ("i_rods", 50, 54.1, "improved"),
        (
            "i_rods",
            12.4,
            16.4,
            "improved",
        ),  # 16.4 − 12.4 is 3.9999999999999982 in binary: at the threshold after rounding
        ("i_rods", 50, 46, "worsened"),
        # MRC sum ≥2 points: Practical Neurology table (normatives.md §4.1). Higher is better.
        ("mrc_sum", 50, 51, "within_noise"),
        ("mrc_sum", 50, 52, "improved"),
        ("mrc_sum", 50, 53, "improved"),
        ("mrc_sum", 50, 48, "worsened"),
        # Vigorimeter grip >8 kPa: Vanhoutte EK, Latov N, Deng C et al. Eur J Neurol 2013;20:748–755 —
        # strictly more than 8, so 8.0 is not met and 8.1 is.
        ("grip_kpa_left", 50, 57.9, "within_noise"),
        ("grip_kpa_left", 50, 58.0, "within_noise"),
        ("grip_kpa_left", 50, 58.1, "improved"),
        ("grip_kpa_right", 60, 52.0, "within_noise"),
        ("grip_kpa_right", 60, 51.9, "worsened"),
        # 10-metre walk ±28 %: Practical Neurology table (normatives.md §4.1). Higher (slower) is worse.
        ("ten_metre_walk_s", 10, 12.79, "within_noise"),  # +27.9 %
        ("ten_metre_walk_s", 10, 12.8, "worsened"),  # +28 %
        ("ten_metre_walk_s", 10, 12.81, "worsened"),  # +28.1 %
        ("ten_metre_walk_s", 6.0, 7.68, "worsened"),  # +28 %, 27.999999999999996 in binary before rounding
        ("ten_metre_walk_s", 10, 7.2, "improved"),  # −28 %
        ("ten_metre_walk_s", 10, 7.21, "within_noise"),  # −27.9 %
    ],
)
def test_minimal_important_change_below_at_above(scale, before, after, expected):
    assert previous_verdict(scale, before, after) == expected


def test_the_grades_have_no_minimal_important_change_of_their_own():
    # No publication gives an MIC for the arm or leg grade alone (normatives.md §4.1 lists none).
    assert previous_verdict("incat_arm", 0, 2) == "no_threshold"


@pytest.mark.parametrize(
    ("change_size", "threshold", "comparator", "met"),
    [
        (0.99, 1, ">=", False),
        (1.0, 1, ">=", True),
        (8.0, 8, ">", False),
        (8.1, 8, ">", True),
        (-8.1, 8, ">", True),
        (0.1 + 0.2, 0.3, ">=", True),
    ],  # 0.1 + 0.2 = 0.30000000000000004 and still "at" 0.3 after rounding
)
def test_meets_uses_the_comparator_after_rounding(change_size, threshold, comparator, met):
    # The project's comparison rule (DEVELOPERS.md): both sides rounded half-to-even to 6 places.
    assert change.meets(change_size, threshold, comparator) is met


# -- Smallest detectable change (reproducibility) ------------------------------------------------------------


def test_sdc_factor_is_1_96_times_root_2():
    # SDC (95 %, one person) = 1.96 × √2 × SEM ≈ 2.77 × CoV (normatives.md §3.1, derived).
    assert reproducibility.SDC_FACTOR == pytest.approx(1.96 * math.sqrt(2), abs=0.005)


def test_shipped_sdc_from_the_published_cov():
    # Kong X, Lesser EA, Gozani SN. BioMed Eng OnLine 2009;8:33: between-session CoV of latencies
    # and velocities up to 9.8 %, amplitudes up to 19.8 % (normatives.md §3.1). 2.77 × 9.8 = 27.146
    # ≈ 27.1 %; 2.77 × 19.8 = 54.846 ≈ 54.8 %.
    table = reproducibility.shipped()
    for parameter in ("segment_velocity", "distal_latency", "f_latency", "sensory_velocity"):
        assert table[parameter].cov_pct == 9.8 and table[parameter].sdc == 27.1
        assert table[parameter].sdc == pytest.approx(2.77 * 9.8, abs=0.05)
    for parameter in ("distal_cmap_amplitude", "proximal_cmap_amplitude", "snap_amplitude"):
        assert table[parameter].cov_pct == 19.8 and table[parameter].sdc == 54.8
        assert table[parameter].sdc == pytest.approx(2.77 * 19.8, abs=0.05)
    # No published between-session figure for the block percentage (normatives.md §3.2, gap): no SDC.
    assert table["block_pct"].sdc is None


def test_laboratory_sdc_computed_from_its_cov(tmp_path):
    # A laboratory file giving only a CoV: Kong's 9.8 % (BioMed Eng OnLine 2009;8:33) → 2.77 × 9.8 ≈ 27.1 %,
    # within 0.1 of the unrounded 1.96 × √2 × 9.8 = 27.16 % (normatives.md §3.1).
    path = tmp_path / "lab.csv"
    path.write_text(
        "parameter,cov_pct,source\nsegment_velocity,9.8,Kong X et al. BioMed Eng OnLine 2009;8:33\n",
        encoding="utf-8",
    )
    table = reproducibility.from_file(path)
    assert table["segment_velocity"].sdc == pytest.approx(27.1, abs=1e-9)
    assert table["segment_velocity"].sdc == pytest.approx(1.96 * math.sqrt(2) * 9.8, abs=0.1)
    assert table["segment_velocity"].status == "laboratory"
    # The same CoV gives the same SDC whether shipped or from a laboratory file.
    assert table["segment_velocity"].sdc == reproducibility.shipped()["segment_velocity"].sdc
    assert (
        table["distal_latency"] == reproducibility.shipped()["distal_latency"]
    )  # rows it does not list are kept


def test_laboratory_file_without_source_or_with_bad_numbers_is_refused(tmp_path):
    path = tmp_path / "lab.csv"
    path.write_text(
        "parameter,sdc_pct,source\nsegment_velocity,12,\nf_latency,abc,ours\nmotor_cv,10,ours\n",
        encoding="utf-8",
    )
    with pytest.raises(InputRejected) as refused:
        reproducibility.from_file(path)
    where = {(p.row, p.column) for p in refused.value.problems}
    assert where == {(2, "source"), (3, "sdc_pct"), (4, "parameter")}


# -- Trends: slope per year with its 95 % confidence interval ------------------------------------------------


def test_points_exactly_on_a_line_give_its_slope_and_a_zero_width_interval():
    # Hand-computed: 2020-01-01 → 2024-01-01 → 2028-01-01 → 2032-01-01 are 1461 days apart
    # each (one 29 February in every four years), i.e. exactly 4 years of 365.25 days.
    # y = 2·x + 1 with x in years: 1, 9, 17, 25.
    days = [D("2020-01-01"), D("2024-01-01"), D("2028-01-01"), D("2032-01-01")]
    assert [(b - a).days for a, b in zip(days, days[1:])] == [1461, 1461, 1461]
    result = trend.slope_per_year(days, [1.0, 9.0, 17.0, 25.0])
    assert result.points == 4 and result.reason == ""
    assert result.slope == pytest.approx(2.0, abs=1e-9)
    assert result.low == pytest.approx(2.0, abs=1e-9) and result.high == pytest.approx(2.0, abs=1e-9)


def test_noisy_slope_and_interval_against_numpy_and_the_t_formula():
    # Invented noisy series. Reference: numpy.polyfit for the slope; the ordinary-least-squares standard
    # error SE = √(Σ residual² / (n − 2) / Σ (x − x̄)²) and half-width t(0.975, n − 2) × SE (any regression
    # textbook; common practice, no source), the t quantile from scipy.stats.t.
    start = D("2023-01-01")
    offsets = [0, 100, 250, 400, 600, 800]
    values = [10.0, 11.5, 11.0, 13.2, 14.1, 16.0]
    days = [start + dt.timedelta(days=o) for o in offsets]
    x = np.array(offsets) / 365.25
    y = np.array(values)
    slope, intercept = np.polyfit(x, y, 1)
    residuals = y - (slope * x + intercept)
    se = math.sqrt(float(np.sum(residuals**2)) / (len(x) - 2) / float(np.sum((x - x.mean()) ** 2)))
    t = stats.t.ppf(0.975, len(x) - 2)
    assert t == pytest.approx(
        2.776, abs=0.0005
    )  # Student t, two-sided 95 %, 4 degrees of freedom (from memory, not verified)
    result = trend.slope_per_year(days, values)
    assert result.slope == pytest.approx(slope, rel=1e-9)
    assert result.low == pytest.approx(slope - t * se, rel=1e-9)
    assert result.high == pytest.approx(slope + t * se, rel=1e-9)
    assert result.low < result.slope < result.high


def test_unordered_points_and_missing_values():
    # The same line in another order, with a missing value that is left out (invented).
    days = [D("2028-01-01"), D("2020-01-01"), D("2026-06-01"), D("2024-01-01")]
    result = trend.slope_per_year(days, [17.0, 1.0, float("nan"), 9.0])
    assert result.points == 3 and result.slope == pytest.approx(2.0, abs=1e-9)
    assert (result.first, result.last) == (D("2020-01-01"), D("2028-01-01"))


@pytest.mark.parametrize("count", [0, 1, 2])
def test_fewer_than_three_points_give_no_slope_and_say_why(count):
    days = [D("2024-01-10"), D("2024-06-10")][:count]
    result = trend.slope_per_year(days, [1.0, 2.0][:count])
    assert result.slope is None and result.low is None and result.high is None
    assert result.reason == f"fewer than 3 points ({count}): no slope"


def test_points_all_on_one_day_give_no_slope():
    result = trend.slope_per_year([D("2024-01-10")] * 3, [1.0, 2.0, 3.0])
    assert result.slope is None and "one day" in result.reason


# -- Regimens ------------------------------------------------------------------------------------------------


def test_a_change_of_interval_starts_a_new_regimen_and_an_induction_is_merged():
    # Invented: IVIg 2 g/kg over 5 days, maintenance 1 g/kg every 21 days within 60 days, then every 42 days.
    periods = [
        TreatmentPeriod("ivig", D("2023-09-01"), D("2023-09-05"), 2.0, "g/kg", None),
        TreatmentPeriod("ivig", D("2023-09-26"), D("2024-05-31"), 1.0, "g/kg", 21),
        TreatmentPeriod("ivig", D("2024-06-01"), None, 1.0, "g/kg", 42),
    ]
    first, second = regimens(periods)
    assert (first.start_date, first.end_date, first.interval_days) == (D("2023-09-01"), D("2024-05-31"), 21)
    assert first.induction == periods[0] and first.maintenance_start == D("2023-09-26")
    assert first.label() == "ivig 1 g/kg every 21 days (after a 2 g/kg induction)"
    assert (second.start_date, second.end_date, second.interval_days, second.induction) == (
        D("2024-06-01"),
        None,
        42,
        None,
    )


def test_an_ongoing_period_ends_the_day_before_the_same_therapy_changes():
    periods = [
        TreatmentPeriod("ivig", D("2023-09-01"), None, 1.0, "g/kg", 21),
        TreatmentPeriod("ivig", D("2024-06-01"), None, 1.0, "g/kg", 42),
    ]
    first, second = regimens(periods)
    assert first.end_date == D("2024-05-31") and second.end_date is None


def test_a_steroid_course_does_not_become_the_induction_of_ivig():
    # The induction rule joins a single course to the same therapy only (module
    # docstring of tracker.response.regimens).
    periods = [
        TreatmentPeriod("corticosteroid", D("2024-01-08"), D("2024-01-12"), 1000.0, "mg", None),
        TreatmentPeriod("ivig", D("2024-02-01"), None, 1.0, "g/kg", 21),
    ]
    steroid, ivig = regimens(periods)
    assert steroid.therapy == "corticosteroid" and steroid.end_date == D("2024-01-12")
    assert ivig.induction is None and ivig.start_date == D("2024-02-01")


def test_a_single_course_more_than_60_days_before_maintenance_stays_its_own_regimen():
    periods = [
        TreatmentPeriod("ivig", D("2024-01-01"), D("2024-01-05"), 2.0, "g/kg", None),
        TreatmentPeriod("ivig", D("2024-03-06"), None, 1.0, "g/kg", 21),
    ]  # 61 days after the course ended
    assert [r.induction for r in regimens(periods)] == [None, None]
    periods[1] = TreatmentPeriod("ivig", D("2024-03-05"), None, 1.0, "g/kg", 21)  # 60 days: the induction
    assert [r.induction for r in regimens(periods)] == [periods[0]]


# -- Invented stories ----------------------------------------------------------------------------------------

# Invented responder: IVIg 2 g/kg induction then 1 g/kg every 21 days; adjusted INCAT 4 → 2 → 1.
RESPONDER_PERIODS = [
    TreatmentPeriod("ivig", D("2024-01-15"), D("2024-01-19"), 2.0, "g/kg", None),
    TreatmentPeriod("ivig", D("2024-02-05"), None, 1.0, "g/kg", 21),
]
RESPONDER_SCORES = [*graded("2024-01-10", 2, 3), *graded("2024-04-10", 1, 2), *graded("2024-07-10", 1, 1)]


def test_story_responder():
    [result] = classify_all(RESPONDER_PERIODS, RESPONDER_SCORES, "2024-07-10")
    assert result.classification == "improved"
    [evidence] = result.evidence
    # Baseline before the induction (ICE, ProCID designs: normatives.md §4.2):
    # adjusted INCAT 2 + 3 − 1 = 4 → 1 + 0 = 1.
    assert (evidence["baseline_date"], evidence["baseline_value"], evidence["value"], evidence["change"]) == (
        D("2024-01-10"),
        4.0,
        1.0,
        -3.0,
    )
    assert evidence["threshold"] == "≥ 1 point" and "Hughes RAC" in evidence["source"]
    assert result.compared == [D("2024-01-10"), D("2024-07-10")]


def test_story_responder_score_changes_against_baseline_previous_and_best():
    plan = regimens(RESPONDER_PERIODS)
    frame, _ = with_computed(scores(RESPONDER_SCORES))
    running = {day: next((r for r in plan if r.covers(day)), None) for day in frame["date"].unique()}
    changes = change.score_changes(frame, scale_table(), running, ResponseSettings())
    last = changes[(changes["scale"] == "adjusted_incat") & (changes["date"] == D("2024-07-10"))].set_index(
        "reference"
    )
    # Adjusted INCAT 4 (2024-01-10, before the induction) → 2 (2024-04-10) → 1
    # (2024-07-10); MIC ≥1 point (ICE).
    assert (last.loc["regimen_baseline", "reference_date"], last.loc["regimen_baseline", "change"]) == (
        D("2024-01-10"),
        -3.0,
    )
    assert (last.loc["previous", "reference_date"], last.loc["previous", "change"]) == (D("2024-04-10"), -1.0)
    assert (last.loc["best", "reference_date"], last.loc["best", "reference_value"]) == (D("2024-04-10"), 2.0)
    assert set(last["verdict"]) == {"improved"} and set(last["threshold"]) == {"≥ 1 point"}
    # The baseline itself is compared with nothing.
    assert changes[(changes["scale"] == "adjusted_incat") & (changes["date"] == D("2024-01-10"))].empty


# Invented relapse after interval extension: IVIg 1 g/kg every 21 days, then every 42 days; INCAT 1 → 3
# (arm 0 → 1, leg 1 → 2), adjusted INCAT 1 → 2.
RELAPSE_PERIODS = [
    TreatmentPeriod("ivig", D("2023-09-01"), D("2024-05-31"), 1.0, "g/kg", 21),
    TreatmentPeriod("ivig", D("2024-06-01"), None, 1.0, "g/kg", 42),
]
RELAPSE_SCORES = [*graded("2023-08-20", 0, 1), *graded("2024-05-15", 0, 1), *graded("2024-09-10", 1, 2)]


def test_story_relapse_after_interval_extension_belongs_to_the_stretched_regimen():
    every_21, every_42 = classify_all(RELAPSE_PERIODS, RELAPSE_SCORES, "2024-09-10")
    assert (every_21.regimen.interval_days, every_21.classification) == (21, "stable")
    assert (every_42.regimen.interval_days, every_42.classification) == (42, "worsened")
    [evidence] = every_42.evidence
    # PATH relapse: ≥1-point increase of the adjusted INCAT (van Schaik IN et al.
    # Lancet Neurol 2018, normatives.md §4.2).
    assert (evidence["baseline_date"], evidence["baseline_value"], evidence["value"]) == (
        D("2024-05-15"),
        1.0,
        2.0,
    )
    frame, _ = with_computed(scores(RELAPSE_SCORES))
    assert value_of(frame, "2024-09-10", "incat") - value_of(frame, "2024-05-15", "incat") == 2  # INCAT 1 → 3


def _nerve_values(rows: list[tuple]) -> pd.DataFrame:
    """Nerve values in the engine's long form from (visit, parameter, where,
    value, temperature, lff, distance)."""
    return pd.DataFrame(
        [
            {
                "visit_key": v,
                "nerve": "median",
                "side": "right",
                "modality": "motor",
                "parameter": p,
                "where": w,
                "value": x,
                "absent": False,
                "temperature_c": t,
                "lff_hz": f,
                "distance_mm": d,
            }
            for v, p, w, x, t, f, d in rows
        ],
        columns=change.NERVE_VALUE_COLUMNS,
    )


def test_story_relapse_nerve_changes_against_the_sdc():
    # Invented studies of the relapse story: forearm velocity 38 → 31 m/s, block 26 → 56 %.
    values = _nerve_values(
        [
            (1, "segment_velocity", "wrist → elbow", 38.0, 33.0, 2.0, 228.0),
            (2, "segment_velocity", "wrist → elbow", 31.0, 33.2, 2.0, 228.0),
            (1, "block_pct", "wrist → elbow", 26.0, 33.0, 2.0, np.nan),
            (2, "block_pct", "wrist → elbow", 56.0, 33.2, 2.0, np.nan),
        ]
    )
    frame = change.nerve_changes(
        values, 2, 1, "regimen_baseline", D("2024-05-15"), reproducibility.shipped(), ResponseSettings()
    )
    rows = frame.set_index("parameter")
    # (31 − 38) / 38 = −18.4 %: within the 27.1 % SDC from Kong X et al. BioMed Eng
    # OnLine 2009;8:33 (normatives.md §3.1).
    assert rows.loc["segment_velocity", "change_pct"] == pytest.approx(-18.42, abs=0.01)
    assert (
        rows.loc["segment_velocity", "sdc"] == 27.1
        and rows.loc["segment_velocity", "verdict"] == "within_noise"
    )
    # No published SDC of the block percentage (normatives.md §3.2, gap): shown, never flagged.
    assert rows.loc["block_pct", "change"] == 30.0 and rows.loc["block_pct", "verdict"] == "no_threshold"
    assert pd.isna(rows.loc["block_pct", "sdc"])
    assert set(frame["less_certain"]) == {""}
    summary = {s["measure"]: s["value"] for s in change.nerve_summary(frame)}
    assert summary["changes_beyond_sdc_worse"] == 0


def test_story_relapse_with_a_laboratory_reproducibility_file(tmp_path):
    # Invented laboratory figures (not for clinical use): velocity SDC 15 %, block SDC 20 percentage points.
    path = tmp_path / "lab.csv"
    path.write_text(
        "parameter,sdc_pct,source\nsegment_velocity,15,invented laboratory study\n"
        "block_pct,20,invented laboratory study\n",
        encoding="utf-8",
    )
    values = _nerve_values(
        [
            (1, "segment_velocity", "wrist → elbow", 38.0, 33.0, 2.0, 228.0),
            (2, "segment_velocity", "wrist → elbow", 31.0, 33.2, 2.0, 228.0),
            (1, "block_pct", "wrist → elbow", 26.0, 33.0, 2.0, np.nan),
            (2, "block_pct", "wrist → elbow", 56.0, 33.2, 2.0, np.nan),
        ]
    )
    frame = change.nerve_changes(
        values, 2, 1, "previous", D("2024-05-15"), reproducibility.from_file(path), ResponseSettings()
    )
    rows = frame.set_index("parameter")
    assert (rows.loc["segment_velocity", "sdc"], rows.loc["segment_velocity", "verdict"]) == (
        15.0,
        "worsened",
    )  # 18.4 % ≥ 15 %
    assert (rows.loc["block_pct", "sdc"], rows.loc["block_pct", "verdict"]) == (
        20.0,
        "worsened",
    )  # +30 points ≥ 20, more block is worse


def test_story_stable():
    # Invented: weekly SCIG; adjusted INCAT 2 throughout (arm 1 → 0 → 1 is not counted).
    periods = [TreatmentPeriod("scig", D("2024-01-11"), None, 0.4, "g/kg", 7)]
    rows = [*graded("2024-01-09", 1, 2), *graded("2024-06-10", 0, 2), *graded("2024-12-10", 1, 2)]
    [result] = classify_all(periods, rows, "2024-12-10")
    assert result.classification == "stable"
    assert result.evidence[0]["verdict"] == "within_threshold" and result.missing == []


NOT_ASSESSABLE = {
    # Invented: the first score comes six months after the start (no baseline).
    "no baseline": [*graded("2024-07-10", 3, 3), *graded("2024-10-10", 1, 1)],
    # Invented: a baseline, then no score while the regimen ran.
    "no follow-up": graded("2024-01-05", 2, 2),
    # Invented: only INCAT totals were written down: the adjusted INCAT cannot be computed.
    "totals only": [("2024-01-05", "incat", 4), ("2024-04-05", "incat", 4)],
    # Invented: nothing at all.
    "no scores": [],
}


@pytest.mark.parametrize("story", list(NOT_ASSESSABLE))
def test_story_missing_scores_are_not_assessable_never_stable(story):
    periods = [TreatmentPeriod("ivig", D("2024-01-08"), None, 1.0, "g/kg", 21)]
    [result] = classify_all(periods, NOT_ASSESSABLE[story], "2024-12-01")
    assert result.classification == "not_assessable"
    assert result.classification != "stable"
    assert result.missing and all(m.startswith("adjusted INCAT score: no score") for m in result.missing)


def test_missing_follow_up_is_named_with_the_baseline_date():
    periods = [TreatmentPeriod("ivig", D("2024-01-08"), None, 1.0, "g/kg", 21)]
    [result] = classify_all(periods, NOT_ASSESSABLE["no follow-up"], "2024-12-01")
    assert result.missing == [
        "adjusted INCAT score: no score after the baseline of 2024-01-05 while the regimen ran (to "
        "2024-12-01)"
    ]


def test_story_steroid_course_then_ivig_classified_per_regimen():
    # Invented: prednisolone 60 mg daily for 13 weeks without effect, then IVIg
    # (induction, then 1 g/kg every 21 days).
    periods = [
        TreatmentPeriod("corticosteroid", D("2024-01-08"), D("2024-04-07"), 60.0, "mg", 1),
        TreatmentPeriod("ivig", D("2024-04-15"), D("2024-04-19"), 2.0, "g/kg", None),
        TreatmentPeriod("ivig", D("2024-05-10"), None, 1.0, "g/kg", 21),
    ]
    rows = [*graded("2024-01-05", 2, 2), *graded("2024-04-05", 2, 2), *graded("2024-08-01", 1, 1)]
    steroid, ivig = classify_all(periods, rows, "2024-08-01")
    assert (steroid.regimen.therapy, steroid.classification) == ("corticosteroid", "stable")
    assert [e["date"] for e in steroid.evidence] == [
        D("2024-04-05")
    ]  # the score after the course ended is not its own
    assert (ivig.regimen.therapy, ivig.classification) == ("ivig", "improved")
    assert (
        ivig.evidence[0]["baseline_date"],
        ivig.evidence[0]["baseline_value"],
        ivig.evidence[0]["value"],
    ) == (D("2024-04-05"), 3.0, 1.0)


# Confirmation: ADVANCE-CIDP 1 (NCT02549170 registry record): ≥1-point increase of the adjusted INCAT on 2
# consecutive scores (normatives.md §4.2). Invented scores on IVIg every 21 days.
CONFIRM_PERIODS = [TreatmentPeriod("ivig", D("2024-01-08"), None, 1.0, "g/kg", 21)]
CONFIRM_SCORES = [*graded("2024-01-05", 1, 1), *graded("2024-04-05", 1, 2), *graded("2024-07-05", 1, 2)]


def test_confirmation_a_single_worsening_is_not_yet_worsened():
    # The confirming visit is missing data: not assessable, never "stable" (and not yet "worsened").
    [once] = classify_all(CONFIRM_PERIODS, CONFIRM_SCORES, "2024-04-05", "trial-aincat-confirmed")
    assert once.classification == "not_assessable"
    assert (
        once.missing
        and "confirming visit is not recorded yet" in once.missing[0]
        and "2024-04-05" in once.missing[0]
    )
    [unconfirmed] = classify_all(CONFIRM_PERIODS, CONFIRM_SCORES, "2024-04-05", "trial-aincat")
    assert unconfirmed.classification == "worsened"  # without confirmation one score is enough


def test_confirmation_two_consecutive_worsenings_are_worsened():
    [twice] = classify_all(CONFIRM_PERIODS, CONFIRM_SCORES, "2024-07-05", "trial-aincat-confirmed")
    assert twice.classification == "worsened"
    assert twice.evidence[0]["confirmed_dates"] == [D("2024-04-05"), D("2024-07-05")]


def test_confirmation_a_worsening_then_a_return_is_not_confirmed():
    rows = [
        *graded("2024-01-05", 1, 1),
        *graded("2024-04-05", 1, 2),
        *graded("2024-07-05", 1, 1),
        *graded("2024-10-05", 1, 2),
    ]
    [result] = classify_all(CONFIRM_PERIODS, rows, "2024-10-05", "trial-aincat-confirmed")
    assert (
        result.classification == "not_assessable"
    )  # worse again on 2024-10-05, awaiting its confirming visit
    [back] = classify_all(CONFIRM_PERIODS, rows, "2024-07-05", "trial-aincat-confirmed")
    assert back.classification == "stable"  # 2024-04-05 was not confirmed: back at baseline on 2024-07-05


# Composite: ADHERE-style evidence of improvement by adjusted INCAT, I-RODS or grip (Allen JA et al. Lancet
# Neurol 2024; thresholds from memory, not verified, normatives.md §4.2). Invented: only the I-RODS moves.
COMPOSITE_PERIODS = [TreatmentPeriod("ivig", D("2024-01-08"), None, 1.0, "g/kg", 21)]


def _composite_scores(i_rods_after: float) -> list[tuple[str, str, float]]:
    return [
        *graded("2024-01-05", 1, 2, i_rods=50, grip_kpa_left=60, grip_kpa_right=70),
        *graded("2024-04-05", 1, 2, i_rods=i_rods_after, grip_kpa_left=62, grip_kpa_right=70),
    ]


def test_composite_i_rods_alone_improving():
    [composite] = classify_all(COMPOSITE_PERIODS, _composite_scores(54), "2024-04-05", "trial-composite")
    assert composite.classification == "improved"
    outcomes = {e["rule_scale"]: e["outcome"] for e in composite.evidence}
    assert outcomes == {"adjusted_incat": "stable", "i_rods": "improved", "grip_kpa_affected": "stable"}
    # The hand weaker at baseline is the left one (60 < 70 kPa); its change +2 kPa is below 8 kPa.
    [grip] = [e for e in composite.evidence if e["rule_scale"] == "grip_kpa_affected"]
    assert grip["scale"] == "grip_kpa_left"
    [aincat] = classify_all(COMPOSITE_PERIODS, _composite_scores(54), "2024-04-05", "trial-aincat")
    assert aincat.classification == "stable"  # the adjusted-INCAT rule set does not see the I-RODS


def test_composite_i_rods_just_below_its_threshold():
    [composite] = classify_all(COMPOSITE_PERIODS, _composite_scores(53.9), "2024-04-05", "trial-composite")
    assert composite.classification == "stable"


def test_mixed_changes_follow_the_setting():
    # Invented: adjusted INCAT worse by 1 while the I-RODS is better by 6 (a rule of
    # ours, ResponseSettings.mixed_changes).
    rows = [*graded("2024-01-05", 1, 1, i_rods=50), *graded("2024-04-05", 1, 2, i_rods=56)]
    plan = regimens(COMPOSITE_PERIODS)
    series = rules.series_by_scale(with_computed(scores(rows))[0])
    composite = rules.rule_sets()["trial-composite"]
    assert rules.classify(plan[0], series, composite, at=D("2024-04-05")).classification == "worsened"
    lenient = ResponseSettings(mixed_changes="not_assessable")
    assert (
        rules.classify(plan[0], series, composite, at=D("2024-04-05"), settings=lenient).classification
        == "not_assessable"
    )


# -- A clinic's own rule-set file ----------------------------------------------------------------------------

HEADER = (
    "rule_set,version,title,scale,threshold,comparator,change_kind,confirm_visits,required,source,status\n"
)


def test_a_clinics_rule_set_file_is_accepted_and_used(tmp_path):
    # Invented local rule: a 2-point change of the MRC sum score (Practical
    # Neurology table, normatives.md §4.1).
    path = tmp_path / "clinic.csv"
    path.write_text(
        HEADER
        + (
            'clinic-mrc,1,"MRC sum 2 points",mrc_sum,2,>=,absolute,1,yes,'
            '"local rule, invented clinic, 2024",local\n'
        ),
        encoding="utf-8",
    )
    available = rules.rule_sets((path,))
    assert available["clinic-mrc"].origin == "clinic.csv" and rules.DEFAULT_RULES in available
    periods = [TreatmentPeriod("ivig", D("2024-01-08"), None, 1.0, "g/kg", 21)]
    rows = [("2024-01-05", "mrc_sum", 50), ("2024-04-05", "mrc_sum", 52)]
    [result] = classify_all(periods, rows, "2024-04-05", "clinic-mrc", available)
    assert result.classification == "improved"


def test_a_bad_rule_set_file_is_refused_with_row_and_column(tmp_path):
    path = tmp_path / "clinic.csv"
    path.write_text(
        HEADER
        + "clinic-one,1,ok,adjusted_incat,1,>=,absolute,1,yes,local rule,local\n"
        + "clinic-two,1,bad scale,incat_total,1,>=,absolute,1,yes,local rule,local\n"
        + "clinic-two,1,bad comparator,mrc_sum,2,=>,absolute,4,maybe,,guess\n"
        + "Clinic Three,1,bad id,mrc_sum,-2,>=,absolute,1,yes,local rule,local\n",
        encoding="utf-8",
    )
    with pytest.raises(InputRejected) as refused:
        rules.rule_sets((path,))
    where = {(p.row, p.column) for p in refused.value.problems}
    assert where == {
        (3, "scale"),
        (4, "comparator"),
        (4, "confirm_visits"),
        (4, "required"),
        (4, "source"),
        (4, "status"),
        (5, "rule_set"),
        (5, "threshold"),
    }


def test_a_rule_set_file_may_not_replace_a_shipped_id_or_miss_a_column(tmp_path):
    path = tmp_path / "clinic.csv"
    path.write_text(
        HEADER + "trial-aincat,2,mine,adjusted_incat,1,>=,absolute,1,yes,local rule,local\n", encoding="utf-8"
    )
    with pytest.raises(InputRejected, match="refused") as refused:
        rules.rule_sets((path,))
    assert [(p.column, p.value) for p in refused.value.problems] == [("rule_set", "trial-aincat")]
    path.write_text("rule_set,version,scale,threshold\nclinic-x,1,mrc_sum,2\n", encoding="utf-8")
    with pytest.raises(InputRejected) as refused:
        rules.rule_sets((path,))
    assert {(p.row, p.column) for p in refused.value.problems} >= {(1, "comparator"), (1, "source")}


# -- Less certain nerve changes ------------------------------------------------------------------------------


def _one_change(then: tuple[float, float, float], now: tuple[float, float, float]) -> str:
    """``less_certain`` of a distal-latency change between two invented studies
    (temperature °C, LFF Hz, distance mm)."""
    values = _nerve_values(
        [(1, "distal_latency", "wrist", 4.0, *then), (2, "distal_latency", "wrist", 4.1, *now)]
    )
    frame = change.nerve_changes(
        values, 2, 1, "previous", D("2024-01-10"), reproducibility.shipped(), ResponseSettings()
    )
    return frame["less_certain"].iloc[0]


@pytest.mark.parametrize(
    ("then", "now", "marked"),
    [
        # Temperature more than 1 °C apart (ResponseSettings.temperature_delta_c; common practice, no source).
        ((33.3, 2, 70), (32.3, 2, 70), ""),  # 1.0 °C apart (0.9999999999999964 in binary) is not more than 1
        ((33.0, 2, 70), (31.9, 2, 70), "limb temperature 33 → 31.9 °C (more than 1 °C apart)"),
        ((33.0, 2, 70), (32.1, 2, 70), ""),
        # Another low-frequency filter (common practice, no source).
        ((33.0, 2, 70), (33.0, 10, 70), "low-frequency filter 2 Hz → 10 Hz"),
        ((33.0, 2, 70), (33.0, float("nan"), 70), "low-frequency filter 2 Hz → not recorded"),
        # Distances more than 10 % apart (ResponseSettings.distance_delta_pct; common practice, no source).
        ((33.0, 2, 200), (33.0, 2, 220), ""),  # exactly 10 %
        ((33.0, 2, 200), (33.0, 2, 221), "distance 200 → 221 mm (more than 10 % apart)"),
        ((33.0, 2, 200), (33.0, 2, 179), "distance 200 → 179 mm (more than 10 % apart)"),
        ((33.0, 2, 200), (33.0, 2, 180), ""),
    ],
)
def test_less_certain_marks_just_below_and_above_each_limit(then, now, marked):
    assert _one_change(then, now) == marked


def test_several_reasons_are_all_named():
    reasons = _one_change((33.0, 2, 200), (31.5, 10, 240))
    assert (
        reasons.count(";") == 2
        and "limb temperature" in reasons
        and "filter" in reasons
        and "distance" in reasons
    )


def test_absent_f_waves_are_a_change_not_a_number():
    values = pd.DataFrame(
        [
            {
                "visit_key": 1,
                "nerve": "tibial",
                "side": "right",
                "modality": "motor",
                "parameter": "f_latency",
                "where": "",
                "value": 52.0,
                "absent": False,
                "temperature_c": 31.0,
                "lff_hz": 2.0,
                "distance_mm": np.nan,
            },
            {
                "visit_key": 2,
                "nerve": "tibial",
                "side": "right",
                "modality": "motor",
                "parameter": "f_latency",
                "where": "",
                "value": np.nan,
                "absent": True,
                "temperature_c": 31.0,
                "lff_hz": 2.0,
                "distance_mm": np.nan,
            },
        ],
        columns=change.NERVE_VALUE_COLUMNS,
    )
    frame = change.nerve_changes(
        values, 2, 1, "previous", D("2024-01-10"), reproducibility.shipped(), ResponseSettings()
    )
    assert frame["verdict"].tolist() == ["worsened"] and pd.isna(frame["value"].iloc[0])
    assert (
        frame["reference_value"].tolist() == [52.0]
        and frame["absent"].tolist() == [True]
        and frame["less_certain"].iloc[0] == ""
    )


def test_every_classification_is_one_of_the_four_words():
    stories = [
        (RESPONDER_PERIODS, RESPONDER_SCORES, "2024-07-10"),
        (RELAPSE_PERIODS, RELAPSE_SCORES, "2024-09-10"),
        (CONFIRM_PERIODS, CONFIRM_SCORES, "2024-07-05"),
    ]
    for rule_set in rules.rule_sets():
        for periods, rows, at in stories:
            assert {c.classification for c in classify_all(periods, rows, at, rule_set)} <= CLASSIFICATIONS
