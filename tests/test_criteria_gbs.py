"""Guillain–Barré classification sets: ``hadden-1998-gbs`` and ``rajabally-2015-gbs``.

Sources named beside each test:
- HADDEN: Hadden RDM, Cornblath DR, Hughes RAC, et al. Ann Neurol 1998;44:780–788 — the demyelinating
  features are verified in a secondary reproduction (reference sheet §4.1 [a]); the axonal, inexcitable and
  normal class definitions are from memory, not verified ([b]).
- RAJABALLY: Rajabally YA, Durand M-C, Mitchell J, Orlikowski D, Nicolas G. J Neurol Neurosurg Psychiatry
  2015;86:115–119 — every threshold from memory, not verified (reference sheet §4.4 [b]).

Limits: the shipped default set (Preston & Shapiro appendix): median DML ULN 4.4 ms, CMAP LLN 4.0 mV, CV LLN
49 m/s, F ULN 31 ms; ulnar 3.3 ms / 6.0 mV / 49 m/s / 32 ms; fibular 6.5 / 2.0 / 44 / 56; tibial 5.8 / 4.0 /
41 / 56 (leg values from memory, not verified). Every study below is invented test data, not a patient.
"""

from __future__ import annotations

import pandas as pd
import pytest

from criteria_cases import (
    Motor,
    Sensory,
    Visit,
    evaluate,
    exact_velocity,
    finding,
    healthy_four_nerves,
    inexcitable,
    outcome,
)
from tracker.criteria import engine
from tracker.criteria.model import MET, NOT_APPLICABLE, NOT_EVALUABLE, NOT_MET, Settings
from tracker.criteria.sets import _gbs
from tracker.criteria.thresholds import load

HADDEN, RAJABALLY = "hadden-1998-gbs", "rajabally-2015-gbs"
BOTH = [HADDEN, RAJABALLY]
EDGE = ["below", "at", "above"]


# Invented normal nerves (the same as healthy_four_nerves), each changeable by keyword.
def median(**kw) -> Motor:
    return Motor("median", **kw)


def ulnar(**kw) -> Motor:
    return Motor("ulnar", **{"amplitudes": (9.0, 8.6, 8.4), "durations": (5.5, 5.8, 6.0), "dml": 2.8, **kw})


def fibular(**kw) -> Motor:
    return Motor(
        "fibular",
        **{
            "amplitudes": (5.0, 4.6, 4.5),
            "durations": (5.5, 6.0, 6.1),
            "dml": 4.5,
            "cv": 48,
            "f_latency": 48,
            **kw,
        },
    )


def tibial(**kw) -> Motor:
    return Motor(
        "tibial",
        **{
            "amplitudes": (10.0, 8.5),
            "durations": (5.5, 6.5),
            "dml": 4.5,
            "cv": 46,
            "f_latency": 50,
            "segment_mm": 400,
            **kw,
        },
    )


def legs_and_ulnar_inexcitable() -> list:
    return [inexcitable("ulnar"), inexcitable("fibular"), inexcitable("tibial")]


def run(criteria: str, nerves: list, settings: Settings | None = None):
    return evaluate([Visit(nerves)], criteria, settings)


def status(criteria: str, nerve: Motor, item: str) -> str:
    return finding(run(criteria, [nerve]), nerve.nerve, item)["status"]


# ---------------------------------------------------------------------------------------------------------
# Contract and tables
# ---------------------------------------------------------------------------------------------------------


@pytest.mark.parametrize("criteria", BOTH)
def test_registered_and_shaped_as_the_contract_says(criteria):
    # DESIGN.md §5: outcome values demyelinating / axonal / inexcitable / equivocal / normal; no extra keys.
    assert criteria in engine.available()
    result = run(criteria, healthy_four_nerves())
    assert result.extra_keys == ()
    assert list(result.outcomes.columns) == ["visit_key", "outcome", "rule"]
    assert set(result.outcomes["outcome"]) <= set(_gbs.OUTCOMES)
    assert result.findings["status"].isin([MET, NOT_MET, NOT_EVALUABLE, NOT_APPLICABLE]).all()
    assert result.findings["source"].notna().all() and (result.findings["source"].str.len() > 0).all()


def test_hadden_table_marks_verified_features_and_memory_classes():
    # HADDEN: features verified (reference sheet [a:S16]); axonal/inexcitable/normal from memory ([b]).
    rows = {r.item: r for r in load(HADDEN).rows}
    for item in (
        "cv",
        "cv_low_cmap",
        "cv_switch",
        "dml",
        "dml_low_cmap",
        "dml_switch",
        "cb",
        "cb_precondition",
        "f_latency",
        "one_nerve_floor",
    ):
        assert rows[item].status == "verified", item
    for item in ("very_low_cmap", "axonal_low_cmap", *_gbs.NORMAL_ITEMS):
        assert rows[item].status == "memory", item
        assert "from memory, not verified" in rows[item].source
    assert all("Ann Neurol 1998;44:780–788" in r.source for r in rows.values())


def test_rajabally_table_is_all_from_memory():
    # RAJABALLY — from memory, not verified: every row says so.
    table = load(RAJABALLY)
    assert {r.status for r in table.rows} == {"memory"}
    assert all(
        "J Neurol Neurosurg Psychiatry 2015;86:115–119" in r.source
        and "from memory, not verified" in r.source
        for r in table.rows
    )


# ---------------------------------------------------------------------------------------------------------
# Hadden 1998 — per-nerve features (verified in a secondary reproduction, reference sheet §4.1 [a])
# ---------------------------------------------------------------------------------------------------------


@pytest.mark.parametrize("cv, expected", [(44.09, MET), (44.1, NOT_MET), (44.11, NOT_MET)], ids=EDGE)
def test_hadden_velocity_below_90_percent_of_lln(cv, expected):
    # HADDEN (verified): CV < 90 % of LLN 49 m/s = 44.1 m/s when distal CMAP ≥ 50 % of LLN.
    result = run(HADDEN, [median(**exact_velocity(cv))])
    assert finding(result, "median", "cv")["status"] == expected
    assert finding(result, "median", "cv")["threshold"] == 44.1


@pytest.mark.parametrize("cv, expected", [(41.64, MET), (41.65, NOT_MET), (41.66, NOT_MET)], ids=EDGE)
def test_hadden_velocity_below_85_percent_when_distal_cmap_is_under_half_the_lln(cv, expected):
    # HADDEN (verified): CV < 85 % of LLN = 41.65 m/s when distal CMAP < 50 % of LLN (1.99 < 2.0 mV).
    result = run(HADDEN, [median(amplitudes=(1.99, 1.9), **exact_velocity(cv))])
    assert finding(result, "median", "cv")["status"] == expected
    assert finding(result, "median", "cv")["threshold"] == 41.65


@pytest.mark.parametrize("amplitude, expected", [(1.99, NOT_MET), (2.0, MET), (2.01, MET)], ids=EDGE)
def test_hadden_velocity_switch_at_half_the_lln(amplitude, expected):
    # HADDEN (verified): the 85 % branch needs distal CMAP < 50 % of LLN 4.0 mV = 2.0 mV; CV 42 m/s lies
    # between the branches (41.65 and 44.1 m/s).
    assert (
        status(HADDEN, median(amplitudes=(amplitude, amplitude * 0.95), **exact_velocity(42.0)), "cv")
        == expected
    )


@pytest.mark.parametrize("dml, expected", [(4.83, NOT_MET), (4.84, NOT_MET), (4.85, MET)], ids=EDGE)
def test_hadden_distal_latency_above_110_percent_of_uln(dml, expected):
    # HADDEN (verified): DML > 110 % of ULN 4.4 ms = 4.84 ms when distal CMAP ≥ LLN (binary 1.1 × 4.4 is
    # 4.840000000000001: the quantised rule keeps "at" not met).
    result = run(HADDEN, [median(dml=dml)])
    assert finding(result, "median", "dml")["status"] == expected
    assert finding(result, "median", "dml")["threshold"] == 4.84


@pytest.mark.parametrize("dml, expected", [(5.27, NOT_MET), (5.28, NOT_MET), (5.29, MET)], ids=EDGE)
def test_hadden_distal_latency_above_120_percent_when_distal_cmap_is_below_lln(dml, expected):
    # HADDEN (verified): DML > 120 % of ULN = 5.28 ms when distal CMAP < 100 % of LLN (3.99 < 4.0 mV).
    result = run(HADDEN, [median(dml=dml, amplitudes=(3.99, 3.8))])
    assert finding(result, "median", "dml")["status"] == expected
    assert finding(result, "median", "dml")["threshold"] == 5.28


@pytest.mark.parametrize("amplitude, expected", [(3.99, NOT_MET), (4.0, MET), (4.01, MET)], ids=EDGE)
def test_hadden_distal_latency_switch_at_the_lln(amplitude, expected):
    # HADDEN (verified): switch at distal CMAP < 100 % of LLN 4.0 mV; DML 5.0 ms lies between 4.84 and 5.28.
    assert status(HADDEN, median(dml=5.0, amplitudes=(amplitude, 3.8)), "dml") == expected


@pytest.mark.parametrize("proximal, expected", [(2.99, MET), (3.0, NOT_MET), (3.01, NOT_MET)], ids=EDGE)
def test_hadden_block_ratio_below_one_half(proximal, expected):
    # HADDEN (verified): proximal/distal amplitude ratio < 0.5 — 3.0/6.0 is exactly 0.5 (a 50 % fall).
    assert status(HADDEN, median(amplitudes=(6.0, proximal)), "cb") == expected


@pytest.mark.parametrize(
    "distal, expected", [(0.79, NOT_APPLICABLE), (0.8, NOT_APPLICABLE), (0.81, MET)], ids=EDGE
)
def test_hadden_block_needs_distal_cmap_above_20_percent_of_lln(distal, expected):
    # HADDEN (verified): block counted only if distal CMAP > 20 % of LLN 4.0 mV = 0.8 mV (strict). A published
    # precondition not fulfilled: the item does not apply (DESIGN.md §5), it is not want of data.
    result = run(HADDEN, [median(amplitudes=(distal, 0.1))])
    row = finding(result, "median", "cb")
    assert row["status"] == expected
    if expected == NOT_APPLICABLE:
        assert row["reason"].startswith("amplitude precondition failed") and "> 20 % of LLN" in row["reason"]


@pytest.mark.parametrize("f, expected", [(37.19, NOT_MET), (37.2, NOT_MET), (37.21, MET)], ids=EDGE)
def test_hadden_f_latency_above_120_percent_of_uln(f, expected):
    # HADDEN (verified): F latency > 120 % of ULN 31 ms = 37.2 ms.
    assert status(HADDEN, median(f_latency=f), "f_latency") == expected


def test_hadden_f_latency_has_no_amplitude_switch():
    # HADDEN (verified): one F threshold whatever the distal CMAP (contrast Rajabally's 50 % switch).
    low = run(HADDEN, [median(f_latency=37.21, amplitudes=(1.0, 0.95))])
    assert finding(low, "median", "f_latency")["status"] == MET
    assert finding(low, "median", "f_latency")["threshold"] == 37.2


def test_hadden_absent_f_waves_are_not_a_feature():
    # HADDEN (verified): the feature is a prolonged latency; absent F-waves are not listed.
    row = finding(run(HADDEN, [median(f_absent=True)]), "median", "f_latency")
    assert row["status"] == NOT_APPLICABLE and "not a demyelinating feature" in row["reason"]


def test_hadden_counts_tibial_block_as_published():
    # HADDEN (verified): no tibial exclusion is written (reference sheet §10
    # Q14); decision: kept as published.
    row = finding(run(HADDEN, [tibial(amplitudes=(10.0, 4.9))]), "tibial", "cb")
    assert row["status"] == MET and row["value"] == 51.0


def test_hadden_wrist_entrapment_removes_the_median_latency():
    # HADDEN (verified) DML > 110 % of ULN; engine choice: a median DML judged due to neuropathy at the wrist
    # is not counted (as in the engine's CIDP sets).
    row = finding(run(HADDEN, [median(dml=6.0, wrist_entrapment=True)]), "median", "dml")
    assert row["status"] == NOT_APPLICABLE and "wrist" in row["reason"]


def test_unknown_distal_cmap_decides_only_where_both_thresholds_agree():
    # HADDEN (verified): DML > 110 % (4.84 ms) or > 120 % (5.28 ms) of ULN by distal CMAP. Distal amplitude
    # not recorded: 6.0 ms exceeds both (met), 4.0 ms neither (not met), 5.0 ms only one (not evaluable).
    def dml_status(dml):
        return finding(run(HADDEN, [median(dml=dml, amplitudes=(None, 7.5))]), "median", "dml")

    assert dml_status(6.0)["status"] == MET
    assert dml_status(4.0)["status"] == NOT_MET
    undecided = dml_status(5.0)
    assert undecided["status"] == NOT_EVALUABLE and "cannot be chosen" in undecided["reason"]
    assert dml_status(6.0)["limit_name"].endswith("both thresholds agree)")


@pytest.mark.parametrize("criteria", BOTH)
def test_block_is_not_read_across_the_elbow_nor_without_a_proximal_site(criteria):
    # HADDEN (verified ratio < 0.5) / RAJABALLY (from memory, not verified: ratio < 0.7). Engine setting
    # block_path "outside_entrapment" (reference sheet §1.4, [b]): a fall only across the ulnar elbow is not
    # a block; a nerve stimulated at one site only has no block finding.
    across_elbow = run(criteria, [ulnar(amplitudes=(9.0, 8.8, 3.0))])
    assert finding(across_elbow, "ulnar", "cb")["status"] == NOT_MET
    assert finding(across_elbow, "ulnar", "cb")["segment"] == "wrist → below_elbow"
    one_site = finding(run(criteria, [median(amplitudes=(8.0,), durations=(5.5,))]), "median", "cb")
    assert one_site["status"] == NOT_EVALUABLE and one_site["reason"].startswith(_gbs.NO_PATH)


@pytest.mark.parametrize("criteria", BOTH)
def test_missing_values_are_not_evaluable_never_normal(criteria):
    # HADDEN / RAJABALLY: a value not measured is "not evaluable", and the study cannot be called normal.
    nerves = healthy_four_nerves()
    nerves[0] = median(dml=None, cv=None, f_latency=None)
    result = run(criteria, nerves)
    for item in ("dml", "cv", "f_latency", "normal_dml", "normal_cv", "normal_f"):
        assert finding(result, "median", item)["status"] == NOT_EVALUABLE, item
    assert finding(result, "median", "normal_f")["reason"] == "F-waves not recorded"
    assert outcome(result) == "equivocal"
    assert outcome(result, "rule") == "not all values could be evaluated: the study cannot be called normal"


@pytest.mark.parametrize("criteria", BOTH)
def test_inexcitable_nerve_findings_say_no_response(criteria):
    # HADDEN / RAJABALLY: an absent response is a finding (amplitude 0 meets "< 10 % of LLN"), while the
    # latency, velocity and block items of that nerve do not apply for that reason (not want of data).
    result = run(criteria, [inexcitable("median"), *healthy_four_nerves()[1:]])
    assert finding(result, "median", "very_low_cmap")["status"] == MET
    assert finding(result, "median", "normal_dcmap")["status"] == NOT_MET
    for item in ("dml", "cv", "cb", "normal_dml"):
        row = finding(result, "median", item)
        assert row["status"] == NOT_APPLICABLE and row["reason"] == _gbs.NO_RESPONSE, item


# ---------------------------------------------------------------------------------------------------------
# Hadden 1998 — classes
# ---------------------------------------------------------------------------------------------------------


def test_hadden_normal_study():
    # HADDEN (normal class from memory, not verified): all values within normal limits in all nerves.
    result = run(HADDEN, healthy_four_nerves())
    assert outcome(result) == "normal"
    assert outcome(result, "rule") == "all values within normal limits in all nerves"


@pytest.mark.parametrize("dml, expected", [(4.39, "normal"), (4.4, "normal"), (4.41, "equivocal")], ids=EDGE)
def test_hadden_normal_needs_distal_latency_at_most_uln(dml, expected):
    # HADDEN (normal class from memory, not verified): DML ≤ 100 % of ULN 4.4 ms; 4.41 ms is abnormal but
    # not a feature (≤ 4.84 ms) — equivocal.
    assert outcome(run(HADDEN, [median(dml=dml), *healthy_four_nerves()[1:]])) == expected


def test_hadden_ratio_of_exactly_one_half_is_neither_block_nor_normal():
    # HADDEN: feature needs ratio < 0.5 (verified); normal needs ratio > 0.5 (from memory, not verified).
    result = run(HADDEN, [median(amplitudes=(8.0, 4.0)), *healthy_four_nerves()[1:]])
    assert finding(result, "median", "cb")["status"] == NOT_MET
    assert finding(result, "median", "normal_ratio")["status"] == NOT_MET
    assert outcome(result) == "equivocal"


def test_hadden_absent_f_waves_are_not_normal():
    # HADDEN (normal class from memory, not verified): F-waves must be present.
    result = run(HADDEN, [median(f_absent=True), *healthy_four_nerves()[1:]])
    assert finding(result, "median", "normal_f")["status"] == NOT_MET
    assert outcome(result) == "equivocal"
    assert outcome(result, "rule").startswith("values outside normal limits")


def test_hadden_demyelinating_in_two_nerves():
    # HADDEN (verified): ≥ 1 feature in each of ≥ 2 nerves — DML 5.0 > 4.84 ms
    # (median), 3.7 > 3.63 ms (ulnar).
    result = run(HADDEN, [median(dml=5.0), ulnar(dml=3.7), fibular(), tibial()])
    assert outcome(result) == "demyelinating"
    assert outcome(result, "rule") == "≥ 1 demyelinating feature in each of ≥ 2 nerves"


def test_hadden_features_may_differ_between_the_two_nerves():
    # HADDEN (verified): a slow median (CV 40 < 44.1 m/s) and a prolonged ulnar F (39 > 38.4 ms).
    result = run(HADDEN, [median(**exact_velocity(40.0)), ulnar(f_latency=39.0), fibular(), tibial()])
    assert outcome(result) == "demyelinating"


def test_hadden_one_feature_in_one_nerve_is_equivocal():
    # HADDEN (verified features; equivocal = anything else, from memory, not verified).
    result = run(HADDEN, [median(dml=5.0), ulnar(), fibular(), tibial()])
    assert outcome(result) == "equivocal"
    assert outcome(result, "rule").startswith("demyelinating feature(s) found")


def test_hadden_two_features_in_one_nerve_need_all_others_inexcitable():
    # HADDEN (verified): ≥ 2 features in one nerve count only if all other nerves are inexcitable.
    two_features = median(dml=6.0, f_latency=40.0, amplitudes=(3.0, 2.8))
    others_normal = run(HADDEN, [two_features, ulnar(), fibular(), tibial()])
    others_inexcitable = run(HADDEN, [two_features, *legs_and_ulnar_inexcitable()])
    assert outcome(others_normal) == "equivocal"
    assert outcome(others_inexcitable) == "demyelinating"
    assert outcome(others_inexcitable, "rule").startswith(
        "≥ 2 demyelinating features in the only excitable nerve"
    )


def test_hadden_two_features_in_a_one_nerve_study_are_not_enough():
    # HADDEN (verified one-nerve rule) — decision: "all others inexcitable" needs at least one other nerve.
    result = run(HADDEN, [median(dml=6.0, f_latency=40.0)])
    assert outcome(result) == "equivocal"


@pytest.mark.parametrize(
    "amplitude, expected", [(0.39, "inexcitable"), (0.4, "demyelinating"), (0.41, "demyelinating")], ids=EDGE
)
def test_hadden_one_nerve_rule_at_ten_percent_of_lln(amplitude, expected):
    # HADDEN (verified "> 10 % of LLN"; the < 10 % inexcitable rule from memory, not verified). Decision
    # (reference sheet §10 Q14): exactly 10 % of LLN (0.4 mV) counts as ≥ 10 %, so no value is left between
    # the rules. The median carries two features (DML 6.0 > 5.28 ms, F 40 > 37.2 ms); others inexcitable.
    nerves = [
        median(dml=6.0, f_latency=40.0, amplitudes=(amplitude, amplitude * 0.9)),
        *legs_and_ulnar_inexcitable(),
    ]
    assert outcome(run(HADDEN, nerves)) == expected


def test_hadden_inexcitable_all_absent():
    # HADDEN (inexcitable from memory, not verified): distal CMAP absent in all nerves.
    result = run(HADDEN, [inexcitable("median"), *legs_and_ulnar_inexcitable()])
    assert outcome(result) == "inexcitable"
    assert outcome(result, "rule") == "distal CMAP absent in all nerves"


def test_hadden_inexcitable_with_one_tiny_response():
    # HADDEN (from memory, not verified): present in only one nerve, with distal
    # CMAP < 10 % of LLN (0.3 < 0.4 mV).
    result = run(HADDEN, [median(amplitudes=(0.3, 0.28)), *legs_and_ulnar_inexcitable()])
    assert outcome(result) == "inexcitable"
    assert "< 10 % of LLN" in outcome(result, "rule")


def test_hadden_inexcitable_needs_every_amplitude_recorded():
    # HADDEN (from memory, not verified): a nerve whose distal amplitude was not recorded is not "absent".
    # Nor is the study axonal: had the median been absent too, it would be inexcitable.
    unknown = Motor(
        "median", dml=None, cv=None, amplitudes=(None, None), durations=(None, None), f_latency=None
    )
    result = run(HADDEN, [unknown, *legs_and_ulnar_inexcitable()])
    assert finding(result, "median", "very_low_cmap")["status"] == NOT_EVALUABLE
    assert outcome(result) == "equivocal"
    assert outcome(result, "rule").startswith("distal CMAP not recorded in every nerve")


def test_hadden_axonal():
    # HADDEN (axonal from memory, not verified; wording as in Health Sci Rep 2024): no demyelinating feature,
    # distal CMAP < 80 % of LLN in ≥ 2 nerves (median 2.0 < 3.2 mV, ulnar 3.0 < 4.8 mV).
    result = run(
        HADDEN, [median(amplitudes=(2.0, 1.9)), ulnar(amplitudes=(3.0, 2.9, 2.8)), fibular(), tibial()]
    )
    assert outcome(result) == "axonal"
    assert (
        outcome(result, "rule")
        == "no demyelinating feature in any nerve and distal CMAP < 80 % of LLN in ≥ 2 nerves"
    )


@pytest.mark.parametrize(
    "amplitude, expected", [(3.19, "axonal"), (3.2, "equivocal"), (3.21, "equivocal")], ids=EDGE
)
def test_hadden_axonal_needs_distal_cmap_below_80_percent_in_two_nerves(amplitude, expected):
    # HADDEN (from memory, not verified): < 80 % of LLN 4.0 mV = 3.2 mV; the
    # ulnar (3.0 mV) is the other nerve.
    nerves = [
        median(amplitudes=(amplitude, amplitude * 0.95)),
        ulnar(amplitudes=(3.0, 2.9, 2.8)),
        fibular(),
        tibial(),
    ]
    result = run(HADDEN, nerves)
    assert outcome(result) == expected
    assert finding(result, "median", "axonal_low_cmap")["threshold"] == 3.2


@pytest.mark.parametrize(
    "amplitude, expected", [(0.39, "axonal"), (0.4, "equivocal"), (0.41, "equivocal")], ids=EDGE
)
def test_hadden_axonal_allows_one_feature_in_a_nerve_below_ten_percent(amplitude, expected):
    # HADDEN (from memory, not verified): one feature allowed in one nerve if its distal CMAP < 10 % of LLN
    # (0.4 mV); the median DML 6.0 ms is that feature (> 5.28 ms); ulnar 3.0 mV is the second low nerve.
    nerves = [
        median(dml=6.0, amplitudes=(amplitude, amplitude * 0.9)),
        ulnar(amplitudes=(3.0, 2.9, 2.8)),
        fibular(),
        tibial(),
    ]
    result = run(HADDEN, nerves)
    assert finding(result, "median", "dml")["status"] == MET
    assert outcome(result) == expected


def test_hadden_axonal_with_inexcitable_nerves_and_a_fair_response():
    # HADDEN (from memory, not verified): inexcitable nerves count among the "< 80 % of LLN" nerves; one
    # nerve at 10 % of LLN or more keeps the study out of the inexcitable class.
    result = run(HADDEN, [median(amplitudes=(0.4, 0.38)), *legs_and_ulnar_inexcitable()])
    assert outcome(result) == "axonal"


def test_hadden_sides_count_as_two_nerves_unless_set_otherwise():
    # HADDEN (verified two-nerve rule); Settings.sides_are_separate_nerves (engine choice, §1.4 of the sheet).
    nerves = [median(side="left", dml=5.0), median(side="right", dml=5.0)]
    assert outcome(run(HADDEN, nerves)) == "demyelinating"
    merged = run(HADDEN, nerves, Settings(sides_are_separate_nerves=False))
    assert outcome(merged) == "equivocal"


def test_one_motor_nerve_and_no_motor_nerve_are_equivocal():
    # HADDEN (classes from memory, not verified) — decision: "all nerves" classes need ≥ 2 motor nerves.
    assert outcome(run(HADDEN, [median()]), "rule").startswith("fewer than 2 motor nerves")
    result = run(HADDEN, [Sensory("median"), Sensory("sural", amplitude=10, cv=45)])
    assert outcome(result) == "equivocal" and outcome(result, "rule").startswith("no motor nerve studied")


def test_many_visits_in_one_pass():
    # HADDEN (verified two-nerve rule; normal class from memory, not verified): a small invented cohort.
    visits = [
        Visit(healthy_four_nerves(), patient="T-1", visit_date="2024-01-10"),
        Visit([median(dml=5.0), ulnar(dml=3.7), fibular(), tibial()], patient="T-1", visit_date="2024-03-10"),
        Visit([inexcitable("median"), *legs_and_ulnar_inexcitable()], patient="T-2", visit_date="2024-02-01"),
    ]
    result = evaluate(visits, HADDEN)
    assert result.outcomes["outcome"].tolist() == ["normal", "demyelinating", "inexcitable"]


# ---------------------------------------------------------------------------------------------------------
# Rajabally 2015 — per-nerve parameters (from memory, not verified)
# ---------------------------------------------------------------------------------------------------------


@pytest.mark.parametrize("cv, expected", [(34.29, MET), (34.3, NOT_MET), (34.31, NOT_MET)], ids=EDGE)
def test_rajabally_velocity_below_70_percent_of_lln(cv, expected):
    # RAJABALLY — from memory, not verified: CV < 70 % of LLN 49 m/s = 34.3 m/s.
    result = run(RAJABALLY, [median(**exact_velocity(cv))])
    assert finding(result, "median", "cv")["status"] == expected
    assert finding(result, "median", "cv")["threshold"] == 34.3


@pytest.mark.parametrize("dml, expected", [(6.59, NOT_MET), (6.6, NOT_MET), (6.61, MET)], ids=EDGE)
def test_rajabally_distal_latency_above_150_percent_of_uln(dml, expected):
    # RAJABALLY — from memory, not verified: DML > 150 % of ULN 4.4 ms = 6.6 ms (strict).
    assert status(RAJABALLY, median(dml=dml), "dml") == expected


@pytest.mark.parametrize("f, expected", [(37.19, NOT_MET), (37.2, NOT_MET), (37.21, MET)], ids=EDGE)
def test_rajabally_f_latency_above_120_percent_of_uln(f, expected):
    # RAJABALLY — from memory, not verified: F > 120 % of ULN 31 ms = 37.2 ms (distal CMAP ≥ 50 % of LLN).
    assert status(RAJABALLY, median(f_latency=f), "f_latency") == expected


@pytest.mark.parametrize("f, expected", [(46.49, NOT_MET), (46.5, NOT_MET), (46.51, MET)], ids=EDGE)
def test_rajabally_f_latency_above_150_percent_when_distal_cmap_is_under_half(f, expected):
    # RAJABALLY — from memory, not verified: F > 150 % of ULN = 46.5 ms when distal CMAP < 50 % of LLN.
    result = run(RAJABALLY, [median(f_latency=f, amplitudes=(1.99, 1.9))])
    assert finding(result, "median", "f_latency")["status"] == expected
    assert finding(result, "median", "f_latency")["threshold"] == 46.5


@pytest.mark.parametrize("amplitude, expected", [(1.99, NOT_MET), (2.0, MET), (2.01, MET)], ids=EDGE)
def test_rajabally_f_switch_at_half_the_lln(amplitude, expected):
    # RAJABALLY — from memory, not verified: switch at distal CMAP < 50 % of LLN 4.0 mV = 2.0 mV; F 40 ms
    # lies between 37.2 and 46.5 ms.
    assert status(RAJABALLY, median(f_latency=40.0, amplitudes=(amplitude, 1.9)), "f_latency") == expected


@pytest.mark.parametrize("distal, expected", [(0.79, NOT_APPLICABLE), (0.8, MET), (0.81, MET)], ids=EDGE)
def test_rajabally_absent_f_waves_need_20_percent_of_lln(distal, expected):
    # RAJABALLY — from memory, not verified: absent F counted when distal CMAP ≥ 20 % of LLN (0.8 mV).
    assert status(RAJABALLY, median(f_absent=True, amplitudes=(distal, 0.7)), "f_absent") == expected


@pytest.mark.parametrize("proximal, expected", [(6.99, MET), (7.0, NOT_MET), (7.01, NOT_MET)], ids=EDGE)
def test_rajabally_block_ratio_below_0_7(proximal, expected):
    # RAJABALLY — from memory, not verified: proximal/distal amplitude ratio < 0.7 (7.0/10.0 is exactly 0.7).
    assert status(RAJABALLY, median(amplitudes=(10.0, proximal)), "cb") == expected


@pytest.mark.parametrize("distal, expected", [(0.79, NOT_APPLICABLE), (0.8, MET), (0.81, MET)], ids=EDGE)
def test_rajabally_block_floor_of_20_percent_of_lln(distal, expected):
    # RAJABALLY — from memory, not verified; the ≥ 20 % of LLN floor for block is an engine choice (table row
    # cb_precondition), the floor of this set's absent-F item.
    assert status(RAJABALLY, median(amplitudes=(distal, 0.3)), "cb") == expected


def test_rajabally_block_excludes_the_tibial_nerve():
    # RAJABALLY — from memory, not verified: block "excluding the tibial nerve"; Hadden counts the same fall.
    tibial_fall = tibial(amplitudes=(10.0, 4.9))
    rajabally = finding(run(RAJABALLY, [tibial_fall]), "tibial", "cb")
    assert rajabally["status"] == NOT_APPLICABLE and "tibial nerve excluded" in rajabally["reason"]
    assert finding(run(HADDEN, [tibial_fall]), "tibial", "cb")["status"] == MET


@pytest.mark.parametrize("proximal, expected", [(7.14, NOT_MET), (7.15, NOT_MET), (7.16, MET)], ids=EDGE)
def test_rajabally_dispersion_above_30_percent(proximal, expected):
    # RAJABALLY — from memory, not verified: duration increase > 30 %; 5.5 → 7.15 ms is exactly +30 %.
    assert status(RAJABALLY, median(durations=(5.5, proximal)), "td") == expected


@pytest.mark.parametrize(
    "nerve, cut_off",
    [("median", 6.6), ("ulnar", 6.7), ("fibular", 7.6), ("tibial", 8.8)],
)
@pytest.mark.parametrize("offset, expected", [(-0.01, NOT_MET), (0.0, MET), (0.01, MET)], ids=EDGE)
def test_rajabally_distal_duration_cut_offs(nerve, cut_off, offset, expected):
    # RAJABALLY — from memory, not verified: the EFNS/PNS 2010 cut-offs (Van den Bergh PYK et al. Eur J
    # Neurol 2010;17:356–363: median ≥ 6.6, ulnar ≥ 6.7, peroneal ≥ 7.6, tibial ≥ 8.8 ms, verified there).
    builders = {"median": median, "ulnar": ulnar, "fibular": fibular, "tibial": tibial}
    distal = round(cut_off + offset, 2)
    nerve_test = builders[nerve](
        durations=(distal, distal + 0.5, distal + 0.6)[: 3 if nerve in ("ulnar", "fibular") else 2]
    )
    result = run(RAJABALLY, [nerve_test])
    assert finding(result, nerve, "dcmap_duration")["status"] == expected
    assert finding(result, nerve, "dcmap_duration")["threshold"] == cut_off


# ---------------------------------------------------------------------------------------------------------
# Rajabally 2015 — classes (from memory, not verified)
# ---------------------------------------------------------------------------------------------------------


def test_rajabally_normal_study():
    # RAJABALLY normal class = Hadden's (decision; from memory, not verified).
    assert outcome(run(RAJABALLY, healthy_four_nerves())) == "normal"


def test_rajabally_two_nerves_with_core_parameters():
    # RAJABALLY — from memory, not verified: DML > 6.6 ms (median) and CV < 34.3 m/s (ulnar).
    nerves = [median(dml=6.7), ulnar(**exact_velocity(30.0, dml=2.8, sites=3)), fibular(), tibial()]
    result = run(RAJABALLY, nerves)
    assert outcome(result) == "demyelinating"
    assert (
        outcome(result, "rule")
        == "≥ 1 of conduction velocity, distal latency, F-wave latency in each of ≥ 2 nerves"
    )


def test_rajabally_absent_f_waves_need_two_nerves_and_another_parameter():
    # RAJABALLY — from memory, not verified: absent F (CMAP ≥ 20 % of LLN) in 2 nerves + another parameter
    # in another nerve (fibular DML 10 > 9.75 ms).
    absent_f = [median(f_absent=True), ulnar(f_absent=True)]
    with_other = run(RAJABALLY, [*absent_f, fibular(dml=10.0), tibial()])
    alone = run(RAJABALLY, [*absent_f, fibular(), tibial()])
    assert outcome(with_other) == "demyelinating"
    assert (
        outcome(with_other, "rule") == "absent F-waves in ≥ 2 nerves plus another parameter in another nerve"
    )
    assert outcome(alone) == "equivocal"


def test_rajabally_block_needs_another_parameter_in_another_nerve():
    # RAJABALLY — from memory, not verified: block (p/d < 0.7) + another parameter in another nerve (ulnar
    # DML 5.0 > 4.95 ms). Block in two nerves and nothing else is not enough (no "block in ≥ 2 nerves" item).
    block = median(amplitudes=(6.0, 2.9))
    with_other = run(RAJABALLY, [block, ulnar(dml=5.0), fibular(), tibial()])
    two_blocks = run(RAJABALLY, [block, ulnar(amplitudes=(9.0, 5.0, 4.9)), fibular(), tibial()])
    same_nerve = run(RAJABALLY, [median(amplitudes=(6.0, 2.9), dml=7.0), ulnar(), fibular(), tibial()])
    assert outcome(with_other) == "demyelinating"
    assert (
        outcome(with_other, "rule") == "conduction block in 1 nerve plus another parameter in another nerve"
    )
    assert outcome(two_blocks) == "equivocal"
    assert outcome(same_nerve) == "equivocal"


def test_rajabally_absent_f_in_one_nerve_counts_as_another_parameter():
    # RAJABALLY — from memory, not verified. Decision: "another parameter" is any other listed per-nerve
    # parameter, absent F-waves (CMAP ≥ 20 % of LLN) included, as in the EFNS/PNS 2010 exemplar.
    result = run(RAJABALLY, [median(amplitudes=(6.0, 2.9)), ulnar(f_absent=True), fibular(), tibial()])
    assert outcome(result) == "demyelinating"


def test_rajabally_dispersion_in_two_nerves():
    # RAJABALLY — from memory, not verified: duration increase > 30 % in ≥ 2 nerves.
    two = run(
        RAJABALLY, [median(durations=(5.5, 7.5)), ulnar(durations=(5.5, 7.5, 7.6)), fibular(), tibial()]
    )
    one = run(RAJABALLY, [median(durations=(5.5, 7.5)), ulnar(), fibular(), tibial()])
    assert outcome(two) == "demyelinating"
    assert outcome(two, "rule") == "temporal dispersion in ≥ 2 nerves"
    assert outcome(one) == "equivocal"


def test_rajabally_distal_duration_needs_another_parameter_in_another_nerve():
    # RAJABALLY — from memory, not verified: distal CMAP duration (median 7.0 ≥ 6.6 ms) + another parameter
    # in another nerve (ulnar DML 5.0 > 4.95 ms).
    with_other = run(RAJABALLY, [median(durations=(7.0, 7.4)), ulnar(dml=5.0), fibular(), tibial()])
    alone = run(RAJABALLY, [median(durations=(7.0, 7.4)), ulnar(), fibular(), tibial()])
    assert outcome(with_other) == "demyelinating"
    assert (
        outcome(with_other, "rule")
        == "distal CMAP duration in 1 nerve plus another parameter in another nerve"
    )
    assert outcome(alone) == "equivocal"


@pytest.mark.parametrize(
    "amplitude, expected", [(0.39, "inexcitable"), (0.4, "demyelinating"), (0.41, "demyelinating")], ids=EDGE
)
def test_rajabally_one_nerve_rule_at_ten_percent_of_lln(amplitude, expected):
    # RAJABALLY — from memory, not verified: ≥ 2 parameters in one nerve if all others inexcitable and its
    # distal CMAP ≥ 10 % of LLN (0.4 mV). Median: DML 7.0 > 6.6 ms, F 47 > 46.5 ms (low-CMAP branch).
    nerves = [
        median(dml=7.0, f_latency=47.0, amplitudes=(amplitude, amplitude * 0.9)),
        *legs_and_ulnar_inexcitable(),
    ]
    result = run(RAJABALLY, nerves)
    assert outcome(result) == expected
    if expected == "demyelinating":
        assert outcome(result, "rule").startswith(
            "≥ 2 of conduction velocity, distal latency, F-wave latency in the only excitable nerve"
        )


def test_rajabally_one_nerve_rule_counts_only_items_that_stand_alone():
    # RAJABALLY — from memory, not verified. Decision: block needs "another parameter in another nerve", so
    # inside the only excitable nerve it cannot be one of the two; block + DML there is not demyelinating.
    nerves = [median(dml=7.0, amplitudes=(6.0, 2.9)), *legs_and_ulnar_inexcitable()]
    result = run(RAJABALLY, nerves)
    assert finding(result, "median", "cb")["status"] == MET
    assert outcome(result) == "equivocal"


def test_rajabally_inexcitable():
    # RAJABALLY inexcitable class = Hadden's (decision; from memory, not verified).
    assert outcome(run(RAJABALLY, [inexcitable("median"), *legs_and_ulnar_inexcitable()])) == "inexcitable"


def test_rajabally_axonal_where_hadden_sees_a_feature():
    # RAJABALLY axonal class = Hadden's (decision; from memory, not verified). Median DML 5.5 ms with a low
    # CMAP (2.0 mV) is a Hadden feature (> 5.28 ms, verified) but not a Rajabally one (≤ 6.6 ms).
    nerves = [median(dml=5.5, amplitudes=(2.0, 1.9)), ulnar(amplitudes=(3.0, 2.9, 2.8)), fibular(), tibial()]
    assert outcome(run(RAJABALLY, nerves)) == "axonal"
    assert outcome(run(HADDEN, nerves)) == "equivocal"


def test_rajabally_dispersion_in_one_nerve_is_not_normal():
    # RAJABALLY — from memory, not verified. Decision: a Rajabally parameter met anywhere keeps the study out
    # of the normal class, though Hadden's normal list (no dispersion item) is satisfied.
    nerves = [median(durations=(5.5, 7.5)), *healthy_four_nerves()[1:]]
    assert outcome(run(HADDEN, nerves)) == "normal"
    assert outcome(run(RAJABALLY, nerves)) == "equivocal"


def test_rajabally_axonal_notes_missing_demyelinating_findings():
    # RAJABALLY axonal class = Hadden's (from memory, not verified): demyelinating parameters are judged on
    # what was measured; the rule says how many could not be judged for missing data.
    nerves = [
        median(amplitudes=(2.0, 1.9), f_latency=None),
        ulnar(amplitudes=(3.0, 2.9, 2.8)),
        fibular(),
        tibial(),
    ]
    result = run(RAJABALLY, nerves)
    assert outcome(result) == "axonal"
    assert outcome(result, "rule").endswith("; 2 demyelinating finding(s) not evaluable for missing data")


def test_findings_frame_has_one_row_per_nerve_and_item():
    # HADDEN / RAJABALLY: the trace holds every item for every motor nerve, each once.
    for criteria in BOTH:
        findings = run(criteria, healthy_four_nerves()).findings
        counts = findings.groupby(["nerve", "item"]).size()
        assert (counts == 1).all()
        assert set(findings["nerve"]) == {"median", "ulnar", "fibular", "tibial"}
        assert pd.api.types.is_float_dtype(findings["value"])


@pytest.mark.parametrize("criteria", BOTH)
def test_block_only_across_the_elbow_does_not_apply(criteria):
    # HADDEN (verified ratio < 0.5) / RAJABALLY (from memory, not verified: < 0.7); engine setting block_path
    # "outside_entrapment": an ulnar nerve stimulated only below and above the elbow has no block segment
    # outside the entrapment site — the item does not apply (DESIGN.md §5), it is not want of data.
    nerve = ulnar(amplitudes=(9.0, 3.0), durations=(5.5, 6.0), labels=("below_elbow", "above_elbow"))
    row = finding(run(criteria, [nerve]), "ulnar", "cb")
    assert row["status"] == NOT_APPLICABLE
    assert row["reason"].startswith(_gbs.NO_PATH_OUTSIDE_ENTRAPMENT)
